"""Defaults shared by the library and the ``veil`` command line.

They live here, in a module that imports nothing but ``os``, so that the command line can
show them without importing the modules that use them (and scikit-learn,
pyarrow or matplotlib with those): ``veil versions`` must start fast.
"""

from __future__ import annotations

import os

#: The fitting methods ``veil fit --method`` accepts (``veil.fitting.METHODS`` maps them to estimators).
METHOD_NAMES = ("leace", "meanproj", "inlp", "rlace", "transport")
#: Key (.npz) or column (Parquet) of the embeddings.
EMBEDDINGS_KEY = "embedding"
#: Rows cleaned at a time by ``veil apply``.
APPLY_CHUNK_ROWS = 8192
#: The faiss index ``veil apply --out X.faiss`` builds when none is named: exact inner-product search.
INDEX_FACTORY = "Flat"
#: Rows read at a time by a streamed fit.
STREAM_CHUNK_ROWS = 65536
#: Held-out rows a streamed fit audits (a hash sample).
AUDIT_ROWS = 20_000
#: Fitting rows INLP (logistic / SVM) and R-LACE see in a streamed fit (a hash sample).
FIT_SAMPLE_ROWS = 50_000
#: Where a streamed fit runs.
ENGINES = ("local", "dask")
#: A class of a protected attribute with fewer fitting rows than this is refused: its mean is mostly noise and
#: the audit cannot measure it.  Merge it with others explicitly (``veil fit --merge-classes``).
MIN_CLASS_ROWS = 5
#: A class with fewer fitting rows than this gets a note on the card that its figures are uncertain (common
#: practice: some tens of rows before a class mean or a per-class recall is read with confidence).
FEW_CLASS_ROWS = 30
#: No-drift live samples drawn from the held-out rows per sample size for each probe figure, to calibrate a
#: version's live-check levels (each draw is a cross-validated probe: these dominate the cost of calibrating).
#: ``VEIL_LIVE_DRAWS`` in the environment replaces it; 0 stores no calibration (the test suite sets 0 for the
#: fits that do not test calibration, which then keep the fixed levels).
LIVE_PROBE_DRAWS = int(os.environ.get("VEIL_LIVE_DRAWS") or 40)
