"""A fixed-size sample of the distinct raw vectors a replica has seen (reservoir sampling, Algorithm R).

Every vector offered gets the same chance: vector ``t`` (counting from 0) is
a candidate with probability ``k / (t + 1)``, always while ``t < k``, and a
candidate takes a slot drawn uniformly in ``[0, k)``.  A batch is folded in
with array operations; later rows in a batch overwrite earlier ones in the
same slot, exactly as one at a time.  Memory is ``k × d`` floats whatever the
traffic.

Search traffic repeats itself: the same query vector arrives again and again.
A repeated vector is held once.  A candidate whose bytes are already held is
dropped, so the sample never holds a vector twice (a drift check would
otherwise see copies of one row on both sides of a cross-validation split and
report the probe's memory as leakage), and repeats never crowd distinct
vectors out.  Only candidates are hashed: every row until the reservoir has
been offered ``k`` rows, then about ``n k / t`` rows of a batch of ``n``, so
the cost on a busy replica falls towards nothing.
"""

from __future__ import annotations

import threading

import numpy as np
from numpy.typing import NDArray


class Reservoir:
    def __init__(self, capacity: int, dim: int, *, seed: int = 0) -> None:
        self.capacity = capacity
        self.dim = dim
        #: Every vector offered, repeats included.
        self.seen = 0
        #: Distinct vectors held, in ``_rows[:held]``.
        self.held = 0
        self._rows = np.empty((capacity, dim), dtype=np.float32)
        # Hash of each held row's bytes -> its slot, and each slot's hash (to forget it when the row is replaced).
        self._slots: dict[int, int] = {}
        self._digests: list[int] = []
        self._rng = np.random.default_rng(seed)
        self._lock = threading.Lock()

    def add(self, batch: NDArray[np.floating]) -> None:
        self.add_many([batch])

    def add_many(self, batches: list[NDArray[np.floating]]) -> None:
        """Offer batches in order, as one stream: the same sample as adding them one by one.

        Only the candidate rows are gathered from the batches, so folding in
        many batches at once costs about one batch's work, not a copy of them all.
        """
        batches = [batch for batch in batches if batch.shape[1] == self.dim]
        if self.capacity == 0 or not batches:
            return
        with self._lock:
            sizes = [batch.shape[0] for batch in batches]
            n = sum(sizes)
            fill = min(max(self.capacity - self.seen, 0), n)
            rest = np.arange(fill, n)
            # Rows offered while fewer than k have been are all candidates; after that, Algorithm R's draw.
            slots = self._rng.integers(0, self.seen + rest + 1) if rest.size else rest
            chosen = slots < self.capacity
            candidates = np.concatenate([np.arange(fill), rest[chosen]])
            if candidates.size:
                self._keep(_gather(batches, sizes, candidates, self.dim), slots[chosen])
            self.seen += n

    def _keep(self, rows: NDArray[np.float32], slots: NDArray[np.int64]) -> None:
        """Store each candidate row unless it is held already; ``slots`` are the draws of the rows after the fill."""
        # Each row's bytes as one object: hashed once, and compared whole when a hash matches, so a distinct
        # vector is never taken for a repeat (a 64-bit hash match alone would not prove it).
        keys = np.ascontiguousarray(rows).view(np.dtype((np.void, rows.shape[1] * 4))).ravel().tolist()
        first_drawn = len(keys) - slots.size
        pending: dict[int, int] = {}  # slot -> the candidate that ends in it, written in one go below
        for index, key in enumerate(keys):
            digest = hash(key)
            slot = self._slots.get(digest)
            if slot is not None:
                held = keys[pending[slot]] if slot in pending else self._rows[slot].tobytes()
                if held == key:
                    continue
            if self.held < self.capacity:
                # Room left (repeats were dropped): a candidate fills the next free slot, whatever it drew.
                slot = self.held
                self.held += 1
                self._digests.append(digest)
            else:
                slot = int(slots[index - first_drawn])
                evicted = self._digests[slot]
                if self._slots.get(evicted) == slot:
                    del self._slots[evicted]
                self._digests[slot] = digest
            self._slots[digest] = slot
            pending[slot] = index
        if pending:
            self._rows[list(pending)] = rows[list(pending.values())]

    def sample(self) -> NDArray[np.float32]:
        """The distinct vectors held (at most ``capacity`` rows)."""
        with self._lock:
            return self._rows[: self.held].copy()

    def snapshot(self) -> tuple[NDArray[np.float32], int]:
        """The distinct vectors held and how many vectors were offered, read together (no batch in between)."""
        with self._lock:
            return self._rows[: self.held].copy(), self.seen


def _gather(
    batches: list[NDArray[np.floating]], sizes: list[int], rows: NDArray[np.int64], dim: int
) -> NDArray[np.float32]:
    """Rows ``rows`` (ascending) of the batches stacked, without stacking them."""
    if len(batches) == 1:
        return np.asarray(batches[0][rows], dtype=np.float32)
    starts = np.cumsum([0, *sizes])
    owner = np.searchsorted(starts, rows, side="right") - 1
    out = np.empty((rows.size, dim), dtype=np.float32)
    for index in np.unique(owner).tolist():
        mine = owner == index
        out[mine] = batches[index][rows[mine] - starts[index]]
    return out


class ReservoirBank:
    """One reservoir per eraser name, created on first traffic (and anew if the dimension changes).

    A request only appends its batch to a list (:meth:`add`): sampling
    happens when the list holds a reservoir's worth of rows, or when the
    sample is read (:meth:`get`), for many batches at once.  At one vector
    per request, sampling each batch as it came cost more than erasing it;
    the rows waiting are at most about ``capacity`` per eraser.
    """

    def __init__(self, capacity: int, *, seed: int = 0) -> None:
        self.capacity = capacity
        self.seed = seed
        self._reservoirs: dict[str, Reservoir] = {}
        self._pending: dict[str, list[NDArray[np.floating]]] = {}
        self._pending_rows: dict[str, int] = {}
        self._lock = threading.Lock()

    def add(self, name: str, batch: NDArray[np.floating]) -> None:
        """Queue a batch of raw vectors for the eraser's reservoir (cheap: the hot path calls it)."""
        if self.capacity == 0:
            return
        with self._lock:
            pending = self._pending.setdefault(name, [])
            if pending and pending[0].shape[1] != batch.shape[1]:
                self._fold(name)  # a new dimension starts a new reservoir: the old traffic goes to the old one
                pending = self._pending.setdefault(name, [])
            pending.append(batch)
            rows = self._pending_rows[name] = self._pending_rows.get(name, 0) + batch.shape[0]
            if rows >= self.capacity:
                self._fold(name)

    def get(self, name: str) -> Reservoir | None:
        """The eraser's reservoir with every batch offered so far folded in."""
        with self._lock:
            self._fold(name)
            return self._reservoirs.get(name)

    def _fold(self, name: str) -> None:
        batches = self._pending.pop(name, None)
        self._pending_rows.pop(name, None)
        if not batches:
            return
        dim = batches[0].shape[1]
        reservoir = self._reservoirs.get(name)
        if reservoir is None or reservoir.dim != dim:
            reservoir = self._reservoirs[name] = Reservoir(self.capacity, dim, seed=self.seed)
        reservoir.add_many(batches)
