"""Stage 6, remedies: structural terms, suggest's search (judged by the one judge), policy editing."""
