"""The history of live checks: ``veil patrol`` asks a running service for its checks and records each answer.

The service stays stateless and never writes to the registry; the patrol is
a separate process (a loop, or one round per run from a scheduler such as a
Kubernetes CronJob) that calls the service's drift checks and appends each
result to the registry as a record beside the version checked
(:mod:`veil.registry.records`).  ``veil checks`` lists them.

May import: ``veil.registry``, ``veil.checks``, ``veil.samples``,
``veil.errors``, ``veil.progress``, and the client library.  Never the
fitting job, the service or the command line.
"""
