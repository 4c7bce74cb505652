"""A standardisation that floors each feature's scale, shared by the erasers' classifiers and the audit's probes."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray
from sklearn.base import BaseEstimator, TransformerMixin

# A coordinate whose spread is below this share of the typical spread is
# treated as dead.  Embedding models carry such coordinates (MiniLM has
# values near 1e-33); scaling them to unit variance lets a probe read
# rounding-level content no dot product downstream can see.
DEAD_SPREAD = 1e-6


class FlooredScaler(TransformerMixin, BaseEstimator):  # type: ignore[misc]
    """Standardise features, flooring each scale at ``DEAD_SPREAD`` times the typical spread."""

    def fit(self, X: NDArray[np.floating], y: object = None) -> FlooredScaler:
        self.mean_ = X.mean(axis=0)
        spread = X.std(axis=0)
        typical = float(np.sqrt(np.mean(spread**2)))
        self.scale_ = np.maximum(spread, DEAD_SPREAD * max(typical, np.finfo(np.float64).tiny))
        return self

    def transform(self, X: NDArray[np.floating]) -> NDArray[np.float64]:
        return np.asarray((X - self.mean_) / self.scale_)
