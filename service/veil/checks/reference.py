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
_ATTRIBUTE_FIELDS = ("classes", "class_priors", "class_means", "probe_weights", "probe_bias")


def _folded_probe(
    X: NDArray[np.floating], codes: NDArray[np.intp], random_state: int
) -> tuple[Float64Array, Float64Array]:
    """A pre-erasure logistic probe of ``codes`` folded into raw coordinates: ``(weights, bias)``."""
    from veil.audit.probes import linear_probe  # scikit-learn: only when fitting, never to read a card

    probe = linear_probe(random_state).fit(X, codes)
    scaler, logistic = probe[0], probe[-1]
    # (x - m) / s · wᵀ + b  ==  x · (w / s)ᵀ + (b - (m / s) · wᵀ)
    weights = logistic.coef_ / scaler.scale_
    bias = logistic.intercept_ - weights @ scaler.mean_
    return np.asarray(weights, dtype=np.float64), np.asarray(bias, dtype=np.float64)


def _probe_codes(weights: Float64Array, bias: Float64Array, X: NDArray[np.floating]) -> NDArray[np.intp]:
    scores = np.asarray(X, dtype=np.float64) @ weights.T + bias
    if scores.shape[1] == 1:
        return np.asarray(scores[:, 0] > 0, dtype=np.intp)
    return np.asarray(np.argmax(scores, axis=1), dtype=np.intp)


@dataclass(frozen=True, eq=False)
class AttributeReference:
    """One categorical attribute of several (or their intersection): what its live checks compare against.

    Attributes
    ----------
    name : str
    classes : ndarray of shape (c,), str
    class_priors : ndarray of shape (c,)
    class_means : ndarray of shape (c, d)
    probe_weights : ndarray of shape (c', d)
        Its pre-erasure probe, as :class:`ReferenceStatistics` holds the first attribute's.
    probe_bias : ndarray of shape (c',)
    """

    name: str
    classes: NDArray[np.str_]
    class_priors: Float64Array
    class_means: Float64Array
    probe_weights: Float64Array
    probe_bias: Float64Array

    @classmethod
    def from_fit(
        cls, artifact: MapArtifact, name: str, X: NDArray[np.floating], codes: NDArray[np.intp], *, random_state: int
    ) -> AttributeReference:
        """The reference of attribute ``name`` of the fitting rows ``X`` (``codes`` index its classes)."""
        state = artifact.moments.block(name)
        if state.labels is None:
            raise ValueError(f"attribute {name!r} is continuous; its reference holds classes")
        weights, bias = _folded_probe(X, codes, random_state)
        return cls(name, state.labels.astype(str), state.class_priors, state.class_means, weights, bias)

    def probe_codes(self, X: NDArray[np.floating]) -> NDArray[np.intp]:
        """Class codes this attribute's pre-erasure probe predicts for raw rows (pseudo-labels)."""
        return _probe_codes(self.probe_weights, self.probe_bias, X)


@dataclass(frozen=True, eq=False)
class ContinuousReference:
    """One continuous attribute of several: its spread on the fitting rows and a pre-erasure ridge probe.

    The probe's predictions serve as pseudo-values when live traffic carries no values.

    Attributes
    ----------
    name : str
    value_mean, value_std : float
        Of the attribute on the fitting rows.
    probe_weights : ndarray of shape (d,)
        ``value = x @ probe_weights + probe_bias`` on raw rows.
    probe_bias : float
    """

    name: str
    value_mean: float
    value_std: float
    probe_weights: Float64Array
    probe_bias: float

    @classmethod
    def from_fit(cls, name: str, X: NDArray[np.floating], values: NDArray[Any]) -> ContinuousReference:
        """The reference of continuous attribute ``name`` from the fitting rows ``X`` and their ``values``."""
        from veil.audit.probes import ridge_probe  # scikit-learn: only when fitting, never to read a card

        target = np.asarray(values, dtype=np.float64)
        probe = ridge_probe().fit(X, target)
        scaler, ridge = probe[0], probe[-1]
        # (x - m) / s · w + b  ==  x · (w / s) + (b - (m / s) · w)
        weights = np.asarray(ridge.coef_, dtype=np.float64) / scaler.scale_
        bias = float(ridge.intercept_ - weights @ scaler.mean_)
        return cls(name, float(target.mean()), float(target.std()), weights, bias)

    def probe_values(self, X: NDArray[np.floating]) -> Float64Array:
        """The values the pre-erasure probe predicts for raw rows (pseudo-values)."""
        return np.asarray(np.asarray(X, dtype=np.float64) @ self.probe_weights + self.probe_bias)


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
    attributes : tuple of AttributeReference
        For a version of several attributes: each categorical one's reference
        (the fields above are then the first one's); empty otherwise.
    continuous : tuple of ContinuousReference
        For a version of several attributes: each continuous one's reference.
    """

    mean: Float64Array
    eigenvalues: Float64Array
    eigenvectors: Float64Array
    erased_variance_share: float
    class_priors: Float64Array
    class_means: Float64Array
    probe_weights: Float64Array
    probe_bias: Float64Array
    attributes: tuple[AttributeReference, ...] = ()
    continuous: tuple[ContinuousReference, ...] = ()

    @classmethod
    def from_fit(
        cls,
        artifact: MapArtifact,
        X: NDArray[np.floating],
        codes: NDArray[np.intp],
        *,
        random_state: int,
        attributes: tuple[AttributeReference, ...] = (),
        continuous: tuple[ContinuousReference, ...] = (),
    ) -> ReferenceStatistics:
        """Statistics of the rows the eraser was fitted on (``codes`` index ``artifact.classes``).

        For several attributes, ``attributes`` holds each categorical one's
        reference, and the class figures here are the first one's.
        """
        covariance = artifact.covariance
        eigenvalues, eigenvectors = np.linalg.eigh(covariance)
        order = np.argsort(eigenvalues)[::-1]
        keep = order[: min(LEADING_COMPONENTS, order.size)]
        if attributes:
            first = attributes[0]
            priors, means, weights, bias = first.class_priors, first.class_means, first.probe_weights, first.probe_bias
        elif continuous:
            # Every attribute is continuous: no classes, and each attribute's reference is in ``continuous``.
            d = artifact.map.dim
            priors, means, weights, bias = np.zeros(0), np.zeros((0, d)), np.zeros((0, d)), np.zeros(0)
        else:
            if artifact.class_priors is None or artifact.class_means is None:
                raise ValueError("reference statistics need a categorical attribute")
            priors, means = artifact.class_priors, artifact.class_means
            weights, bias = _folded_probe(X, codes, random_state)
        return cls(
            mean=artifact.moments.mean_x.astype(np.float64),
            eigenvalues=np.maximum(eigenvalues[order], 0.0),
            eigenvectors=eigenvectors[:, keep],
            erased_variance_share=artifact.map.removed_variance_share(covariance),
            class_priors=priors,
            class_means=means,
            probe_weights=weights,
            probe_bias=bias,
            attributes=attributes,
            continuous=continuous,
        )

    def probe_codes(self, X: NDArray[np.floating]) -> NDArray[np.intp]:
        """Class codes the pre-erasure probe predicts for raw rows (pseudo-labels)."""
        return _probe_codes(self.probe_weights, self.probe_bias, X)

    def whitening(self) -> Float64Array:
        """Whitening in the leading eigen-directions kept, dropping numerically null ones: shape (d, r)."""
        values = self.eigenvalues[: self.eigenvectors.shape[1]]
        keep = values > values[0] * 1e-10 if values.size else values.astype(bool)
        return np.asarray(self.eigenvectors[:, keep] / np.sqrt(values[keep]), dtype=np.float64)

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
        if self.attributes:
            arrays["attributes.names"] = np.array([attribute.name for attribute in self.attributes], dtype=str)
        for position, attribute in enumerate(self.attributes):
            arrays.update({f"attributes.{position}.{key}": getattr(attribute, key) for key in _ATTRIBUTE_FIELDS})
        if self.continuous:
            arrays["continuous.names"] = np.array([one.name for one in self.continuous], dtype=str)
        for position, one in enumerate(self.continuous):
            arrays[f"continuous.{position}.value"] = np.array([one.value_mean, one.value_std])
            arrays[f"continuous.{position}.probe_weights"] = one.probe_weights
            arrays[f"continuous.{position}.probe_bias"] = np.array(one.probe_bias)
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
            attributes=tuple(
                AttributeReference(str(name), *(arrays[f"attributes.{position}.{key}"] for key in _ATTRIBUTE_FIELDS))
                for position, name in enumerate(arrays.get("attributes.names", np.array([], dtype=str)))
            ),
            continuous=tuple(
                ContinuousReference(
                    str(name),
                    float(arrays[f"continuous.{position}.value"][0]),
                    float(arrays[f"continuous.{position}.value"][1]),
                    arrays[f"continuous.{position}.probe_weights"],
                    float(arrays[f"continuous.{position}.probe_bias"]),
                )
                for position, name in enumerate(arrays.get("continuous.names", np.array([], dtype=str)))
            ),
        )
