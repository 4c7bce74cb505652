"""Reference statistics of the fitting data, stored with each version for drift and leakage checks on live traffic.

The service compares samples of live traffic to these: the raw mean and the
covariance's eigen-decomposition (for whitened shift figures), the share of
variance in the erased directions, class priors and means, and a linear
probe of the attribute fitted *before* erasure, whose predictions serve as
pseudo-labels when live traffic carries no labels.
"""

from __future__ import annotations

import io
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.maps.artifact import MapArtifact

REFERENCE_FILE = "reference.npz"
# Leading eigenvectors kept; all eigenvalues are kept.
LEADING_COMPONENTS = 128

Float64Array = NDArray[np.float64]


@dataclass(frozen=True, eq=False)
class ReferenceStatistics:
    """What live traffic is compared against.

    Attributes
    ----------
    mean : ndarray of shape (d,)
    eigenvalues : ndarray of shape (d,)
        Of the fitting data's covariance, descending.
    eigenvectors : ndarray of shape (d, m)
        The leading ``m = min(d, 128)`` eigenvectors, as columns.
    erased_variance_share : float
        Share of the fitting data's variance that erasure removes.
    class_priors : ndarray of shape (c,)
    class_means : ndarray of shape (c, d)
    probe_weights : ndarray of shape (c', d)
        Pre-erasure logistic probe folded into raw coordinates:
        ``scores = x @ probe_weights.T + probe_bias`` (``c' = 1`` for two classes).
    probe_bias : ndarray of shape (c',)
    """

    mean: Float64Array
    eigenvalues: Float64Array
    eigenvectors: Float64Array
    erased_variance_share: float
    class_priors: Float64Array
    class_means: Float64Array
    probe_weights: Float64Array
    probe_bias: Float64Array

    @classmethod
    def from_fit(
        cls, artifact: MapArtifact, X: NDArray[np.floating], codes: NDArray[np.intp], *, random_state: int
    ) -> ReferenceStatistics:
        """Statistics of the rows the eraser was fitted on (``codes`` index ``artifact.classes``)."""
        from veil.audit.probes import linear_probe  # scikit-learn: only when fitting, never to read a card

        covariance = artifact.covariance
        eigenvalues, eigenvectors = np.linalg.eigh(covariance)
        order = np.argsort(eigenvalues)[::-1]
        keep = order[: min(LEADING_COMPONENTS, order.size)]
        probe = linear_probe(random_state).fit(X, codes)
        scaler, logistic = probe[0], probe[-1]
        # (x - m) / s · wᵀ + b  ==  x · (w / s)ᵀ + (b - (m / s) · wᵀ)
        weights = logistic.coef_ / scaler.scale_
        bias = logistic.intercept_ - weights @ scaler.mean_
        if artifact.class_priors is None or artifact.class_means is None:
            raise ValueError("reference statistics need a categorical attribute")
        return cls(
            mean=artifact.moments.mean_x.astype(np.float64),
            eigenvalues=np.maximum(eigenvalues[order], 0.0),
            eigenvectors=eigenvectors[:, keep],
            erased_variance_share=artifact.map.removed_variance_share(covariance),
            class_priors=artifact.class_priors,
            class_means=artifact.class_means,
            probe_weights=np.asarray(weights, dtype=np.float64),
            probe_bias=np.asarray(bias, dtype=np.float64),
        )

    def probe_codes(self, X: NDArray[np.floating]) -> NDArray[np.intp]:
        """Class codes the pre-erasure probe predicts for raw rows (pseudo-labels)."""
        scores = np.asarray(X, dtype=np.float64) @ self.probe_weights.T + self.probe_bias
        if scores.shape[1] == 1:
            codes: NDArray[np.intp] = (scores[:, 0] > 0).astype(np.intp)
        else:
            codes = np.argmax(scores, axis=1).astype(np.intp)
        return codes

    def to_bytes(self) -> bytes:
        buffer = io.BytesIO()
        arrays: dict[str, Any] = {
            "mean": self.mean,
            "eigenvalues": self.eigenvalues,
            "eigenvectors": self.eigenvectors,
            "erased_variance_share": np.array(self.erased_variance_share),
            "class_priors": self.class_priors,
            "class_means": self.class_means,
            "probe_weights": self.probe_weights,
            "probe_bias": self.probe_bias,
        }
        np.savez(buffer, allow_pickle=False, **arrays)
        return buffer.getvalue()

    @classmethod
    def from_bytes(cls, data: bytes) -> ReferenceStatistics:
        """Read what :meth:`to_bytes` wrote (``ValueError`` or ``KeyError`` if it is not that)."""
        with np.load(io.BytesIO(data), allow_pickle=False) as stored:
            arrays = {name: stored[name] for name in stored.files}
        return cls(
            mean=arrays["mean"],
            eigenvalues=arrays["eigenvalues"],
            eigenvectors=arrays["eigenvectors"],
            erased_variance_share=float(arrays["erased_variance_share"]),
            class_priors=arrays["class_priors"],
            class_means=arrays["class_means"],
            probe_weights=arrays["probe_weights"],
            probe_bias=arrays["probe_bias"],
        )
