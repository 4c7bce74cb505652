"""veil: keep a protected attribute out of embeddings, and show that it stays out."""

from veil.artifact import EraserArtifact
from veil.erasers import INLPEraser, LeaceEraser, MeanProjectionEraser, RLACEEraser
from veil.lowrank import AffineLowRankMap
from veil.moments import MomentState

__version__ = "0.1.0"

__all__ = [
    "AffineLowRankMap",
    "EraserArtifact",
    "INLPEraser",
    "LeaceEraser",
    "MeanProjectionEraser",
    "MomentState",
    "RLACEEraser",
    "__version__",
]
