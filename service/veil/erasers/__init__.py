"""Linear concept erasers: each fits an affine low-rank map ``x' = x - U Vᵀ (x - μ)``."""

from veil.erasers._base import BaseEraser, MomentEraser
from veil.erasers.inlp import INLPEraser
from veil.erasers.leace import LeaceEraser
from veil.erasers.mean_projection import MeanProjectionEraser
from veil.erasers.rlace import RLACEEraser

__all__ = ["BaseEraser", "INLPEraser", "LeaceEraser", "MeanProjectionEraser", "MomentEraser", "RLACEEraser"]
