"""The fitting job, one path for every sample and engine: one pass, fit, audit, card, store (``veil fit``).

Holds the methods and their options (:mod:`veil.fitting.methods`), the pass
over a sample's partitions (:mod:`veil.fitting.plan`, run here or on Dask
workers by :mod:`veil.fitting.distributed`), the job itself
(:mod:`veil.fitting.job`) and its last steps (:mod:`veil.fitting.store`).

May import every lower stage: ``veil.samples``, ``veil.maps``,
``veil.erasers``, ``veil.audit``, ``veil.checks``, ``veil.registry``,
``veil.reporting``.  Never the service or the command line.
"""
