"""Reading samples: labelled embeddings from files, in memory or streamed, and the hash split of their rows.

Holds the sources (``.npz``, ``.npy`` with a labels file, Parquet, folders of
shards), missing-label handling, Arrow list columns, the committed Harbourline
sample, and the partitions and chunks the fitting job reads
(:mod:`veil.samples.chunks`).

May import: ``veil.errors``, ``veil.progress``, ``veil.defaults``.  Nothing
else of veil, so every later stage can read samples.
"""
