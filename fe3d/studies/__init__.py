"""Studies over whole runs: mesh-refinement studies (refinement.py) and uncertainty ensembles
(ensemble.py, sampling.py, ensemble_results.py), both on one executor (executors.py)."""
