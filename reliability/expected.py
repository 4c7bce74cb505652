"""What each answer should be: the registry's own artifact applied in this process to the batch that was sent."""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray

from veil.registry import Registry

#: Both sides compute in float32 from the same factors; differences are rounding only.
TOLERANCE = 1e-5


class ExpectedOutputs:
    """Checks an answer against the version its ``X-Veil-Version`` header names (outputs computed once per version)."""

    def __init__(self, registry: Registry, name: str, batches: Sequence[NDArray[np.floating]]) -> None:
        self.registry = registry
        self.name = name
        self.batches = [np.asarray(b, dtype=np.float32) for b in batches]
        self._outputs: dict[str, list[NDArray[np.floating]]] = {}

    def preload(self, *versions: str) -> None:
        for version in versions:
            self._expected(version)

    def _expected(self, version: str) -> list[NDArray[np.floating]]:
        outputs = self._outputs.get(version)
        if outputs is None:
            artifact = self.registry.read_version(self.name, version).artifact
            outputs = self._outputs[version] = [artifact.apply(batch) for batch in self.batches]
        return outputs

    def check(self, index: int, output: NDArray[np.floating], version: str) -> str | None:
        if version not in self._outputs:
            return f"answer names version {version!r}, which this check did not expect"
        expected = self._outputs[version][index]
        if output.shape != expected.shape:
            return f"answer has shape {output.shape}, expected {expected.shape}"
        error = float(np.max(np.abs(output - expected)))
        if error > TOLERANCE:
            return f"answer differs from {version}'s output by {error:.2e}"
        return None
