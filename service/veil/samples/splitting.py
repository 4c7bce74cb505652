"""Deterministic held-out splits drawn from a seeded hash of the row index.

A hash split needs no shuffle and no second pass: row ``i`` is held out iff
``hash(seed, i) < fraction``, so the same rows are held out however the data
is chunked, streamed or spread over workers.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray

# The SplitMix64 finaliser: a cheap, well-mixed 64-bit hash of an integer.
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_MIX1 = np.uint64(0xBF58476D1CE4E5B9)
_MIX2 = np.uint64(0x94D049BB133111EB)


def _splitmix64(values: NDArray[np.uint64]) -> NDArray[np.uint64]:
    # Array arithmetic on uint64 wraps modulo 2**64, which is what the hash wants.
    z = values + _GOLDEN
    z = (z ^ (z >> np.uint64(30))) * _MIX1
    z = (z ^ (z >> np.uint64(27))) * _MIX2
    return z ^ (z >> np.uint64(31))


def holdout_mask(n_rows: int, *, fraction: float, seed: int, start: int = 0) -> NDArray[np.bool_]:
    """Boolean mask of the held-out rows among rows ``start .. start + n_rows - 1``.

    Parameters
    ----------
    n_rows : int
        Number of rows in this chunk.
    fraction : float
        Expected share of held-out rows, in [0, 1).
    seed : int
        Any non-negative integer; the same seed gives the same split.
    start : int, default=0
        Global index of the chunk's first row.

    Returns
    -------
    mask : ndarray of shape (n_rows,), dtype bool
    """
    if start < 0 or n_rows < 0:
        raise ValueError("start and n_rows must be non-negative")
    return held_out_rows(np.arange(start, start + n_rows, dtype=np.int64), fraction=fraction, seed=seed)


def held_out_rows(index: NDArray[np.integer], *, fraction: float, seed: int) -> NDArray[np.bool_]:
    """Boolean mask of the held-out rows among the rows of global indices ``index``.

    The same as :func:`holdout_mask` for rows that need not be consecutive
    (rows dropped for a missing label keep every other row's index).

    Parameters
    ----------
    index : ndarray of shape (n,), non-negative integers
    fraction : float
        Expected share of held-out rows, in [0, 1).
    seed : int
        Any non-negative integer.

    Returns
    -------
    mask : ndarray of shape (n,), dtype bool
    """
    if not 0.0 <= fraction < 1.0:
        raise ValueError(f"the held-out fraction must be in [0, 1), got {fraction}")
    if seed < 0:
        raise ValueError("seed must be non-negative")
    keyed = _splitmix64(np.asarray(index, dtype=np.uint64) ^ _splitmix64(np.array([seed], dtype=np.uint64)))
    # The top 53 bits as a float in [0, 1).
    uniform = (keyed >> np.uint64(11)).astype(np.float64) * (2.0**-53)
    return uniform < fraction


def give_every_class_both_parts(mask: NDArray[np.bool_], codes: NDArray[np.intp]) -> NDArray[np.bool_]:
    """Repair a hash split of a small sample so each class with 2+ rows has rows on both sides.

    For each class found on one side only, its first row moves to the other
    side.  Large samples are never touched in practice, so a repaired
    in-memory fit and a streamed one agree wherever the stream can agree.
    """
    repaired = mask.copy()
    for c in np.unique(codes):
        rows = np.flatnonzero(codes == c)
        if rows.size >= 2 and (repaired[rows].all() or not repaired[rows].any()):
            repaired[rows[0]] = not repaired[rows[0]]
    return repaired
