"""veil: keep a protected attribute out of embeddings, and show that it stays out."""

from veil.artifact import MapArtifact
from veil.erasers import INLP, LEACE, RLACE, MeanProjection
from veil.lowrank import AffineLowRankMap
from veil.moments import MomentState

__version__ = "0.1.0"

__all__ = [
    "INLP",
    "LEACE",
    "RLACE",
    "AffineLowRankMap",
    "MapArtifact",
    "MeanProjection",
    "MomentState",
    "__version__",
]
