"""Linear concept erasers: each fits an affine low-rank map ``x' = x - U Vᵀ (x - μ)``.

Scikit-learn transformers named after their methods (LEACE, INLP, R-LACE,
mean projection); each exports a :class:`~veil.maps.artifact.MapArtifact`.

May import: ``veil.maps``, ``veil.samples`` (the hash split INLP holds rows
out by), ``veil.progress``.  Nothing that reads or writes versions.
"""

from veil.erasers._base import Erasure, LinearErasure, MomentErasure
from veil.erasers.inlp import INLP
from veil.erasers.leace import LEACE
from veil.erasers.mean_projection import MeanProjection
from veil.erasers.rlace import RLACE

__all__ = ["INLP", "LEACE", "RLACE", "Erasure", "LinearErasure", "MeanProjection", "MomentErasure"]
