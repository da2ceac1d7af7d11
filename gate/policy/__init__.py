"""Stage 0, the policy: frozen models of the YAML policy, the only YAML reader, the starter policy."""
