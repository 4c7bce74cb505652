"""Linear concept erasers: each fits an affine low-rank map ``x' = x - U Vᵀ (x - μ)``."""

from veil.erasers._base import LinearErasure, MomentErasure
from veil.erasers.inlp import INLP
from veil.erasers.leace import LEACE
from veil.erasers.mean_projection import MeanProjection
from veil.erasers.rlace import RLACE

__all__ = ["INLP", "LEACE", "RLACE", "LinearErasure", "MeanProjection", "MomentErasure"]
