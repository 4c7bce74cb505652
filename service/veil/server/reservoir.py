"""A fixed-size uniform sample of the raw vectors a replica has seen (reservoir sampling, Algorithm R).

After ``t`` vectors, each of them is in the reservoir with probability
``k / t``; memory is ``k × d`` floats whatever the traffic.  A batch is
folded in with array operations: row ``t + j`` draws a slot uniformly in
``[0, t + j]`` and replaces that slot if it is below ``k``; later rows in a
batch overwrite earlier ones in the same slot, exactly as one at a time.
"""

from __future__ import annotations

import threading

import numpy as np
from numpy.typing import NDArray


class Reservoir:
    def __init__(self, capacity: int, dim: int, *, seed: int = 0) -> None:
        self.capacity = capacity
        self.dim = dim
        self.seen = 0
        self._rows = np.empty((capacity, dim), dtype=np.float32)
        self._rng = np.random.default_rng(seed)
        self._lock = threading.Lock()

    def add(self, batch: NDArray[np.floating]) -> None:
        if self.capacity == 0 or batch.shape[1] != self.dim:
            return
        with self._lock:
            n = batch.shape[0]
            fill = min(max(self.capacity - self.seen, 0), n)
            if fill:
                self._rows[self.seen : self.seen + fill] = batch[:fill]
            rest = np.arange(fill, n)
            if rest.size:
                positions = self.seen + rest  # global index of each row
                slots = self._rng.integers(0, positions + 1)
                chosen = slots < self.capacity
                self._rows[slots[chosen]] = batch[rest[chosen]]
            self.seen += n

    def sample(self) -> NDArray[np.float32]:
        with self._lock:
            return self._rows[: min(self.seen, self.capacity)].copy()


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
