"""The stateless HTTP service (FastAPI): apply, counterfactuals, versions, hot swap, drift and leakage checks."""
