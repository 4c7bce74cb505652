"""Offline cleaning of corpora with a stored version (``veil apply``), chunk by chunk, with a manifest.

The offline twin of the service: it reads versions from the registry and
applies them to files (``corpus.py``), or into a faiss inner-product index,
and searches a raw index as if it held cleaned vectors (``index.py``, the
optional ``faiss`` extra).

May import: ``veil.registry``, ``veil.maps``, ``veil.samples``,
``veil.errors``, ``veil.progress``.  Never the fitting job or the service.
"""
