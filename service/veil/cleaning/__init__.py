"""Offline cleaning of corpora with a stored version (``veil apply``), chunk by chunk, with a manifest.

The offline twin of the service: it reads versions from the registry and
applies them to files.

May import: ``veil.registry``, ``veil.maps``, ``veil.samples``,
``veil.errors``, ``veil.progress``.  Never the fitting job or the service.
"""
