"""Writers, one per artefact. They read a Verdict and never recompute."""
