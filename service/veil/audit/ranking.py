"""Ranking-fairness figures of a query set: who the top-k results are, against who the corpus holds.

For each query's ranked top ``k`` (best first) and the corpus's class shares
``p`` (the base rates):

- **top-k share**: the share of the top ``k`` in each class, against ``p``.
- **skew@k** of class ``a``: ``ln(share_a / p_a)``; MaxSkew@k is its largest
  value over the classes (never below 0, since the shares and ``p`` both sum
  to 1) and MinSkew@k its smallest (``-inf`` when a class is absent from the
  top ``k``, so the share of queries where that happens is reported instead).
- **NDKL**: ``(1/Z) Σ_{i=1..k} KL(D_i ‖ p) / log2(i + 1)`` with ``D_i`` the
  class shares of the top ``i``, ``Z = Σ_{i=1..k} 1 / log2(i + 1)``, and the
  Kullback-Leibler divergence in nats (``0 ln 0 = 0``): 0 when every prefix
  of the ranking has the corpus's shares.
- **exposure share** of class ``a``: the share of the position weights
  ``1 / log2(i + 1)`` (DCG's discount) that falls on results of class ``a``.

Each figure is the mean over queries.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from veil.audit.geometry import unit
from veil.audit.report import RankingFairness

Float64Array = NDArray[np.float64]
_BLOCK = 1024


def position_discounts(k: int) -> Float64Array:
    """``1 / log2(i + 1)`` for positions ``i = 1 .. k``, DCG's discount."""
    return np.asarray(1.0 / np.log2(np.arange(2, k + 2)), dtype=np.float64)


def _one_hot(ranked_codes: NDArray[np.intp], n_classes: int) -> Float64Array:
    return np.asarray(ranked_codes[..., None] == np.arange(n_classes), dtype=np.float64)


def topk_shares(ranked_codes: NDArray[np.intp], n_classes: int) -> Float64Array:
    """Share of each query's ranked results in each class, shape (n_queries, n_classes)."""
    return np.asarray(_one_hot(ranked_codes, n_classes).mean(axis=1))


def skew_at_k(ranked_codes: NDArray[np.intp], base_rates: Float64Array) -> Float64Array:
    """``ln(share / base rate)`` per query and class, shape (n_queries, C); ``-inf`` for an absent class.

    Skew is not defined for a class of base rate 0: such classes are left out of the columns.
    """
    shares = topk_shares(ranked_codes, base_rates.size)
    present = base_rates > 0
    with np.errstate(divide="ignore"):
        return np.asarray(np.log(shares[:, present]) - np.log(base_rates[present]))


def ndkl(ranked_codes: NDArray[np.intp], base_rates: Float64Array) -> Float64Array:
    """Normalised discounted KL divergence of each query's ranking from the base rates, shape (n_queries,)."""
    k = ranked_codes.shape[1]
    counts = np.cumsum(_one_hot(ranked_codes, base_rates.size), axis=1)
    prefix_shares = counts / np.arange(1, k + 1)[None, :, None]  # D_i, shape (n, k, C)
    # 0 ln 0 = 0: absent classes contribute nothing (and base rates of present classes are positive).
    present = prefix_shares > 0
    logs = np.log(np.where(present, prefix_shares, 1.0) / np.where(present, base_rates, 1.0))
    divergences = np.sum(prefix_shares * logs, axis=2)
    discounts = position_discounts(k)
    return np.asarray(divergences @ discounts / discounts.sum())


def exposure_shares(ranked_codes: NDArray[np.intp], n_classes: int) -> Float64Array:
    """Share of each query's position weight (``1 / log2(i + 1)``) on each class, shape (n_queries, n_classes)."""
    discounts = position_discounts(ranked_codes.shape[1])
    return np.asarray(np.einsum("nkc,k->nc", _one_hot(ranked_codes, n_classes), discounts) / discounts.sum())


@dataclass(frozen=True)
class RankingFigures:
    """Means over queries of the ranking-fairness figures of one ranking; per-class tuples follow the classes."""

    k: int
    queries: int
    share: tuple[float, ...]
    exposure_share: tuple[float, ...]
    max_skew: float
    absent_class_share: float
    ndkl: float


def ranking_figures(ranked_codes: NDArray[np.intp], base_rates: Float64Array) -> RankingFigures:
    """Every figure of the module docstring for ranked results of shape (n_queries, k), as class codes.

    Raises
    ------
    ValueError
        No queries or results, or a class with a base rate of 0 among the results.
    """
    n, k = ranked_codes.shape
    if n == 0 or k == 0:
        raise ValueError(f"ranking figures need at least one query and one result, got shape {ranked_codes.shape}")
    base = np.asarray(base_rates, dtype=np.float64)
    if np.any(base[np.unique(ranked_codes)] <= 0):
        raise ValueError("a ranked result belongs to a class with no share of the corpus")
    skews = skew_at_k(ranked_codes, base)
    return RankingFigures(
        k=k,
        queries=n,
        share=tuple(float(v) for v in topk_shares(ranked_codes, base.size).mean(axis=0)),
        exposure_share=tuple(float(v) for v in exposure_shares(ranked_codes, base.size).mean(axis=0)),
        max_skew=float(skews.max(axis=1).mean()),
        absent_class_share=float(np.mean(np.isneginf(skews).any(axis=1))),
        ndkl=float(ndkl(ranked_codes, base).mean()),
    )


def _best_first(scores: Float64Array, k: int) -> NDArray[np.intp]:
    """The ``k`` columns of largest score in one row, best first, equal scores by column index."""
    kth = np.partition(scores, scores.size - k)[scores.size - k]
    # Every column tied with the k-th score is a candidate, so which of them make the cut never depends on the
    # order a partition happened to leave them in.
    candidates = np.flatnonzero(scores >= kth)
    order = np.lexsort((candidates, -scores[candidates]))
    return np.asarray(candidates[order[:k]], dtype=np.intp)


def ranked_neighbours(
    queries: NDArray[np.floating], corpus: NDArray[np.floating], k: int, *, exclude: NDArray[np.intp] | None = None
) -> NDArray[np.intp]:
    """Each query's ``k`` corpus rows of largest inner product (float64), best first, shape (n_queries, k).

    ``exclude[i]`` is a corpus row query ``i`` must not get (itself, when the
    queries are corpus rows).  Equal scores are ordered by row index.
    """
    corpus64 = np.asarray(corpus, dtype=np.float64)
    queries64 = np.asarray(queries, dtype=np.float64)
    n = queries64.shape[0]
    available = corpus64.shape[0] - (0 if exclude is None else 1)
    if available < k:
        raise ValueError(f"need {k} corpus rows for each query's top {k}, got {available}")
    out = np.empty((n, k), dtype=np.intp)
    for start in range(0, n, _BLOCK):
        stop = min(start + _BLOCK, n)
        scores = queries64[start:stop] @ corpus64.T
        if exclude is not None:
            scores[np.arange(stop - start), exclude[start:stop]] = -np.inf
        for row in range(stop - start):
            out[start + row] = _best_first(scores[row], k)
    return out


def ranking_before_after(
    raw: NDArray[np.floating],
    erased: NDArray[np.floating],
    codes: NDArray[np.intp],
    k: int,
    *,
    queries: NDArray[np.intp] | None = None,
    classes: int | None = None,
) -> RankingFairness:
    """Ranking-fairness figures of rows as queries against all rows but themselves (cosine), raw and erased.

    Parameters
    ----------
    raw, erased : ndarray of shape (n, d)
        The same rows before and after erasure.
    codes : ndarray of shape (n,)
        Each row's class; the base rates are the class shares of all ``n`` rows.
    k : int
        Results per query.
    queries : ndarray of shape (m,), optional
        The rows that query (default: every row).
    classes : int, optional
        How many classes the codes index (default: up to the largest code).  A class with no row here (a live
        sample without it) gets a share and a base rate of 0, and the other figures are over the classes present.
    """
    n = raw.shape[0]
    asking = np.arange(n) if queries is None else np.asarray(queries, dtype=np.intp)
    width = max(int(codes.max()) + 1, classes or 0)
    present, local = np.unique(codes, return_inverse=True)
    base = np.bincount(local, minlength=present.size) / n
    figures = []
    for vectors in (raw, erased):
        corpus = unit(vectors)
        ranked = ranked_neighbours(corpus[asking], corpus, k, exclude=asking)
        figures.append(ranking_figures(local[ranked], base))
    before, after = figures

    def spread(values: tuple[float, ...]) -> tuple[float, ...]:
        """Per-class values of the classes present, placed at their codes among all ``width`` classes."""
        full = np.zeros(width)
        full[present] = values
        return tuple(float(v) for v in full)

    return RankingFairness(
        k=k,
        queries=int(asking.size),
        base_rate=spread(tuple(float(v) for v in base)),
        share_before=spread(before.share),
        share_after=spread(after.share),
        exposure_share_before=spread(before.exposure_share),
        exposure_share_after=spread(after.exposure_share),
        max_skew_before=before.max_skew,
        max_skew_after=after.max_skew,
        absent_class_share_before=before.absent_class_share,
        absent_class_share_after=after.absent_class_share,
        ndkl_before=before.ndkl,
        ndkl_after=after.ndkl,
    )
