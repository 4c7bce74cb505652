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
        if self.capacity == 0 or batch.shape[1] != self.dim:
            return
        with self._lock:
            n = batch.shape[0]
            fill = min(max(self.capacity - self.seen, 0), n)
            rest = np.arange(fill, n)
            # Rows offered while fewer than k have been are all candidates; after that, Algorithm R's draw.
            slots = self._rng.integers(0, self.seen + rest + 1) if rest.size else rest
            chosen = slots < self.capacity
            candidates = np.concatenate([np.arange(fill), rest[chosen]])
            if candidates.size:
                self._keep(np.asarray(batch[candidates], dtype=np.float32), slots[chosen])
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


class ReservoirBank:
    """One reservoir per eraser name, created on first traffic (and anew if the dimension changes)."""

    def __init__(self, capacity: int) -> None:
        self.capacity = capacity
        self._reservoirs: dict[str, Reservoir] = {}

    def add(self, name: str, batch: NDArray[np.floating]) -> None:
        reservoir = self._reservoirs.get(name)
        if reservoir is None or reservoir.dim != batch.shape[1]:
            reservoir = self._reservoirs[name] = Reservoir(self.capacity, batch.shape[1])
        reservoir.add(batch)

    def get(self, name: str) -> Reservoir | None:
        return self._reservoirs.get(name)
