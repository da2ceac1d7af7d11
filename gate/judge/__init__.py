"""Stage 5, judging: rules and waivers -> findings with a stable identity; the Verdict and its document."""
