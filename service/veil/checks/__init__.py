"""The live checks: reference statistics stored with each version, alert thresholds, drift and leakage figures.

The fitting job computes the reference statistics and the service compares
samples of live traffic against them.

May import: ``veil.maps``, ``veil.audit`` (its probes), ``veil.samples``,
``veil.errors``.  Never the registry, the fitting job or the service.
"""
