"""The stateless HTTP service (FastAPI): apply, counterfactuals, versions, hot swap, drift and leakage checks.

It reads versions from the registry and never writes to it.

May import: ``veil.registry``, ``veil.checks``, ``veil.maps``, ``veil.errors``.
Never the fitting job, the reports or the CLI.
"""
