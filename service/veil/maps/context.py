"""Mergeable moments of ``x`` and a categorical attribute within each value of a context column.

A ranker compares items of one category (one opening, one query's topic):
there the attribute must not be linearly readable among items of the same
context value, i.e. ``Cov(x', z | context = g) = 0`` for every ``g``.  An
affine map ``x' = x - P (x - μ)`` does that exactly when the range of ``P``
holds every within-value cross-covariance ``Cov(x, z | g)``; LEACE's least
change then comes from whitening as before, with these columns in place of
the population's ``Cov(x, z)`` (the optimality argument only uses the
constraint ``(I - P) C = 0`` for a fixed matrix ``C``).

Only first moments and cross co-moments are kept per value (G × d × C
numbers): the whitening uses the pooled covariance of every row, which the
:class:`~veil.maps.moments.MomentState` beside it holds.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from veil.maps.attribute import as_label_array
from veil.maps.linalg import whitening_factors

Float64Array = NDArray[np.float64]


def checked_context(given: NDArray[np.generic], n_rows: int, *, what: str = "context values") -> NDArray[np.generic]:
    """The context values as labels NumPy can sort and store; ``ValueError`` naming why they cannot be used."""
    if given.ndim != 1 or given.shape[0] != n_rows:
        raise ValueError(f"the context needs one value per row: got shape {given.shape} for {n_rows} rows")
    # Missing values (None, NaN) and mixed types are refused there; object arrays of text become text arrays,
    # which the artifact stores without pickle.
    return as_label_array(given, what=what)


def _no_values() -> NDArray[np.generic]:
    return np.array([], dtype=np.int64)


@dataclass(frozen=True, eq=False)
class ContextMoments:
    """Per value ``g`` of a context: row and class counts, the mean of ``x``, and ``Σ_{i∈g} (x_i - x̄_g)(z_i - z̄_g)ᵀ``.

    Attributes
    ----------
    values : ndarray of shape (G,)
        The context's values, sorted.
    labels : ndarray of shape (C,)
        The attribute's classes, sorted (the columns of ``z``).
    class_counts : ndarray of shape (G, C), int64
        Rows of each class within each value.
    mean_x : ndarray of shape (G, d)
    comoment_xz : ndarray of shape (G, d, C)
        Centred within each value, ``z`` the class indicators.
    pooled : ndarray of shape (P,)
        Values whose rows were pooled into one group (too few rows of some class to be guarded on their own,
        see :meth:`pooled_values`).  When there are any, ``values`` holds the others and the arrays have one row
        more, last: the pooled group's.  Empty otherwise.
    """

    values: NDArray[np.generic]
    labels: NDArray[np.generic]
    class_counts: NDArray[np.int64]
    mean_x: Float64Array
    comoment_xz: Float64Array
    pooled: NDArray[np.generic] = field(default_factory=_no_values)

    @classmethod
    def from_batch(cls, x: NDArray[np.floating], z: NDArray[np.generic], given: NDArray[np.generic]) -> ContextMoments:
        """The moments of rows ``x`` (n, d) with class labels ``z`` (n,) and context values ``given`` (n,)."""
        labels, codes = np.unique(z, return_inverse=True)
        values, groups = np.unique(given, return_inverse=True)
        d, n_classes = x.shape[1], labels.size
        class_counts = np.zeros((values.size, n_classes), dtype=np.int64)
        mean_x = np.zeros((values.size, d))
        comoment_xz = np.zeros((values.size, d, n_classes))
        for g in range(values.size):
            rows = groups == g
            x_g = np.asarray(x[rows], dtype=np.float64)
            counts = np.bincount(codes[rows], minlength=n_classes)
            indicators = np.zeros((x_g.shape[0], n_classes))
            indicators[np.arange(x_g.shape[0]), codes[rows]] = 1.0
            class_counts[g] = counts
            mean_x[g] = x_g.mean(axis=0)
            comoment_xz[g] = (x_g - mean_x[g]).T @ (indicators - counts / x_g.shape[0])
        return cls(values, labels, class_counts, mean_x, comoment_xz)

    @property
    def counts(self) -> NDArray[np.int64]:
        """Rows of each value, shape (G,)."""
        return np.asarray(self.class_counts.sum(axis=1), dtype=np.int64)

    def _aligned(self, values: NDArray[np.generic], labels: NDArray[np.generic]) -> ContextMoments:
        """The same moments over a superset of values and classes (zeros where none were seen)."""
        at_value = np.searchsorted(values, self.values)
        at_label = np.searchsorted(labels, self.labels)
        class_counts = np.zeros((values.size, labels.size), dtype=np.int64)
        class_counts[np.ix_(at_value, at_label)] = self.class_counts
        mean_x = np.zeros((values.size, self.mean_x.shape[1]))
        mean_x[at_value] = self.mean_x
        comoment_xz = np.zeros((values.size, self.mean_x.shape[1], labels.size))
        comoment_xz[np.ix_(at_value, np.arange(self.mean_x.shape[1]), at_label)] = self.comoment_xz
        return ContextMoments(values, labels, class_counts, mean_x, comoment_xz)

    def merge(self, other: ContextMoments) -> ContextMoments:
        """The moments of the union of both sets of rows: Chan, Golub and LeVeque's update within each value."""
        if self.pooled.size or other.pooled.size:
            raise ValueError("moments with pooled context values are final: merge the moments before pooling")
        if self.mean_x.shape[1] != other.mean_x.shape[1]:
            raise ValueError(f"cannot merge moments of {self.mean_x.shape[1]} and {other.mean_x.shape[1]} features")
        values, labels = np.union1d(self.values, other.values), np.union1d(self.labels, other.labels)
        a, b = self._aligned(values, labels), other._aligned(values, labels)
        n_a, n_b = a.counts.astype(np.float64), b.counts.astype(np.float64)
        n = n_a + n_b
        share_b = np.divide(n_b, n, out=np.zeros_like(n), where=n > 0)
        weight = np.divide(n_a * n_b, n, out=np.zeros_like(n), where=n > 0)
        delta_x = b.mean_x - a.mean_x
        p_a = np.divide(a.class_counts, n_a[:, None], out=np.zeros(a.class_counts.shape), where=n_a[:, None] > 0)
        p_b = np.divide(b.class_counts, n_b[:, None], out=np.zeros(b.class_counts.shape), where=n_b[:, None] > 0)
        comoment_xz = (
            a.comoment_xz + b.comoment_xz + weight[:, None, None] * np.einsum("gi,gj->gij", delta_x, p_b - p_a)
        )
        return ContextMoments(
            values,
            labels,
            a.class_counts + b.class_counts,
            a.mean_x + delta_x * share_b[:, None],
            comoment_xz,
        )

    def pooled_values(self, members: NDArray[np.generic]) -> ContextMoments:
        """The same moments with the rows of the values ``members`` pooled into one group (the last row).

        The group's moments are those of the union of its values' rows (the
        merge above), so a guarantee fitted from them holds for the pooled
        rows together, not within each of their values.
        """
        if self.pooled.size:
            raise ValueError("these moments are pooled already")
        inside = np.isin(self.values, members)
        if not inside.any():
            return self
        kept = ContextMoments(
            self.values[~inside], self.labels, self.class_counts[~inside], self.mean_x[~inside],
            self.comoment_xz[~inside],
        )  # fmt: skip
        group = ContextMoments(
            self.values[inside][:1], self.labels, self.class_counts[inside][:1], self.mean_x[inside][:1],
            self.comoment_xz[inside][:1],
        )  # fmt: skip
        for g in np.flatnonzero(inside)[1:]:
            one = ContextMoments(
                group.values, self.labels, self.class_counts[g : g + 1], self.mean_x[g : g + 1],
                self.comoment_xz[g : g + 1],
            )  # fmt: skip
            group = group.merge(one)
        return ContextMoments(
            kept.values,
            self.labels,
            np.concatenate([kept.class_counts, group.class_counts]),
            np.concatenate([kept.mean_x, group.mean_x]),
            np.concatenate([kept.comoment_xz, group.comoment_xz]),
            pooled=self.values[inside],
        )

    def standardized_cross_covariances(self) -> Float64Array:
        """Every value's ``Cov(x, z̃ | g)``, weighted by ``sqrt(n_g / n)`` and stacked, shape (d, Σ_g (C_g - 1)).

        ``z̃`` is the attribute whitened within the value (to its exact rank,
        ``C_g - 1`` for the ``C_g`` classes the value has rows of), so a
        value with one class adds nothing.  Whitened by the pooled
        covariance of the same rows, the stack's singular values are at
        most 1: with ``B_g = sqrt(w_g) Σ^(-1/2) Σ_g^(1/2)``, ``Σ_g B_g B_gᵀ ⪯ I``
        because the pooled covariance is at least the weighted within-value
        ones (the law of total covariance), and each value's canonical
        correlations are at most 1.  A rank cut relative to 1 is then one no
        sample's scale can move.
        """
        total = int(self.counts.sum())
        blocks = []
        for g in range(self.class_counts.shape[0]):
            n_g = int(self.class_counts[g].sum())
            present = int(np.count_nonzero(self.class_counts[g]))
            if n_g == 0 or present < 2:
                continue
            p = self.class_counts[g] / n_g
            eigenvectors, scale = whitening_factors(np.diag(p) - np.outer(p, p), rank=present - 1)
            cross = self.comoment_xz[g] / n_g
            blocks.append(np.sqrt(n_g / total) * (cross @ (eigenvectors * scale)))
        if not blocks:
            return np.zeros((self.mean_x.shape[1], 0))
        return np.hstack(blocks)
