"""Post-erasure steps applied to served vectors."""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray


def unit_normalize(x: NDArray[np.floating]) -> NDArray[np.floating]:
    """Scale each row of ``x`` to unit Euclidean length, in place; zero rows stay zero.

    Retrieval stacks compare unit vectors by cosine, and erasure shortens
    vectors unevenly, so a served vector is re-normalised when the eraser asks.
    """
    norms = np.linalg.norm(x, axis=1, keepdims=True)
    np.divide(x, norms, out=x, where=norms > 0)
    return x
