"""Distortion, neighbourhood and fairness figures of an erased embedding."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

Float64Array = NDArray[np.float64]
_BLOCK = 1024


def unit(x: NDArray[np.floating]) -> Float64Array:
    """Each row scaled to unit length in float64 (zero rows stay zero)."""
    x64 = np.asarray(x, dtype=np.float64)
    norms = np.linalg.norm(x64, axis=1, keepdims=True)
    return np.asarray(x64 / np.where(norms > 0, norms, 1.0))


def relative_distortion(raw: NDArray[np.floating], erased: NDArray[np.floating]) -> float:
    """``E‖x' - x‖² / E‖x - μ‖²``: the share of the data's spread that erasure moved."""
    raw64 = np.asarray(raw, dtype=np.float64)
    moved = float(np.mean(np.sum((np.asarray(erased, dtype=np.float64) - raw64) ** 2, axis=1)))
    spread = float(np.mean(np.sum((raw64 - raw64.mean(axis=0)) ** 2, axis=1)))
    return moved / spread if spread > 0 else 0.0


def mean_cosine(raw: NDArray[np.floating], erased: NDArray[np.floating]) -> float:
    """Mean cosine similarity between each vector and its erased version."""
    return float(np.mean(np.sum(unit(raw) * unit(erased), axis=1)))


def nearest_neighbours(x: NDArray[np.floating], k: int, apart: NDArray[np.intp] | None = None) -> NDArray[np.intp]:
    """Indices of each row's ``k`` nearest other rows by cosine, shape (n, k), in blocks of rows.

    With ``apart`` (each row's group), a row's neighbours are found among the rows of the other groups only.
    """
    rows = unit(x)
    n = rows.shape[0]
    if n <= k:
        raise ValueError(f"need more than {k} rows for {k}-nearest-neighbour figures, got {n}")
    if apart is not None and n - int(np.bincount(apart).max()) < k:
        raise ValueError(f"need {k} rows outside each row's group for {k}-nearest-neighbour figures across groups")
    out = np.empty((n, k), dtype=np.intp)
    for start in range(0, n, _BLOCK):
        stop = min(start + _BLOCK, n)
        similarity = rows[start:stop] @ rows.T
        similarity[np.arange(stop - start), np.arange(start, stop)] = -np.inf
        if apart is not None:
            similarity[apart[start:stop, None] == apart[None, :]] = -np.inf
        out[start:stop] = np.argpartition(-similarity, k, axis=1)[:, :k]
    return out


def neighbour_overlap(a: NDArray[np.intp], b: NDArray[np.intp]) -> float:
    """Mean share of each row's neighbours in ``a`` that are also its neighbours in ``b``."""
    k = a.shape[1]
    shared = [np.intersect1d(ra, rb, assume_unique=True).size for ra, rb in zip(a, b, strict=True)]
    return float(np.mean(shared) / k)


def neighbour_label_share(neighbours: NDArray[np.intp], codes: NDArray[np.intp]) -> float:
    """Mean share of each row's neighbours that carry the row's label."""
    return float(np.mean(codes[neighbours] == codes[:, None]))


def label_base_rate(codes: NDArray[np.intp]) -> float:
    """The share :func:`neighbour_label_share` has when neighbours are drawn at random.

    A row of class ``c`` shares its label with ``(n_c - 1) / (n - 1)`` of the others.
    """
    counts = np.bincount(codes)
    n = codes.size
    return float(np.sum(counts * (counts - 1)) / (n * (n - 1)))


def tpr_gap_rms(task: NDArray[np.intp], predicted: NDArray[np.intp], attribute: NDArray[np.intp]) -> float:
    """Root-mean-square over task classes of the true-positive-rate gap between the two attribute groups.

    For task class ``y``: ``TPR_g(y) = P(ŷ = y | y, group g)``; classes
    missing from a group are skipped.
    """
    groups = np.unique(attribute)
    if groups.size != 2:
        raise ValueError("the TPR gap needs a binary attribute")
    gaps = []
    for y in np.unique(task):
        rates = []
        for g in groups:
            rows = (task == y) & (attribute == g)
            if rows.any():
                rates.append(float(np.mean(predicted[rows] == y)))
        if len(rates) == 2:
            gaps.append(rates[0] - rates[1])
    return float(np.sqrt(np.mean(np.square(gaps)))) if gaps else 0.0
