"""Studies over whole runs: mesh-refinement studies (and, later, parameter ensembles)."""
