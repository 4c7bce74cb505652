"""Deterministic held-out splits drawn from a seeded hash of the row index.

A hash split needs no shuffle and no second pass: row ``i`` is held out iff
``hash(seed, i) < fraction``, so the same rows are held out however the data
is chunked, streamed or spread over workers.
"""

from __future__ import annotations

import hashlib

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


def group_hashes(groups: NDArray[np.generic]) -> NDArray[np.uint64]:
    """A stable 64-bit key of each row's group, from the text of its value (the same in every process and run).

    Python's own ``hash`` of a string changes from process to process; a digest of the value's text does not,
    so a group lands on the same side of the split on every worker and in every chunk.
    """
    values, inverse = np.unique(np.asarray(groups).astype(str), return_inverse=True)
    keys = np.array(
        [int.from_bytes(hashlib.blake2b(value.encode(), digest_size=8).digest(), "little") for value in values],
        dtype=np.uint64,
    )
    return keys[inverse.reshape(-1)]


def held_out_groups(groups: NDArray[np.generic], *, fraction: float, seed: int) -> NDArray[np.bool_]:
    """Boolean mask of the held-out rows when whole groups are held out: row ``i`` iff its group's hash is drawn.

    Every row of a group falls on the same side, so the audit judges groups the fit never saw; the share of
    held-out rows is ``fraction`` in expectation over groups (a few large groups make it vary more than rows do).
    """
    return held_out_rows(group_hashes(groups), fraction=fraction, seed=seed)


def give_every_class_both_groups(
    mask: NDArray[np.bool_], codes: NDArray[np.intp], groups: NDArray[np.generic]
) -> NDArray[np.bool_]:
    """:func:`give_every_class_both_parts` moving whole groups: a class on one side gets its first row's group moved.

    A class carried by one group only stays on one side (moving it would put the group on both).
    """
    repaired = mask.copy()
    names = np.asarray(groups).astype(str)
    for c in np.unique(codes):
        rows = np.flatnonzero(codes == c)
        if np.unique(names[rows]).size >= 2 and (repaired[rows].all() or not repaired[rows].any()):
            moved = names == names[rows[0]]
            repaired[moved] = not repaired[rows[0]]
    return repaired
