"""What the report's plots need from the held-out rows, kept with the version so a report can be drawn again later."""

from __future__ import annotations

import io
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

PLOT_DATA_FILE = "plotdata.npz"
# Enough points to show structure, few enough for a light page.
SCATTER_POINTS = 1500


def _leading_plane(x: NDArray[np.float64]) -> NDArray[np.float32]:
    """Coordinates of the rows on their own two leading principal axes (signs fixed for stable pictures)."""
    centred = x - x.mean(axis=0)
    _, _, vt = np.linalg.svd(centred, full_matrices=False)
    axes = vt[:2].T
    axes *= np.where(axes[np.argmax(np.abs(axes), axis=0), range(axes.shape[1])] < 0, -1.0, 1.0)
    plane: NDArray[np.float32] = (centred @ axes).astype(np.float32)
    return plane


@dataclass(frozen=True, eq=False)
class PlotData:
    """Held-out figures for the report.

    Attributes
    ----------
    plane_before, plane_after : ndarray of shape (m, 2)
        Each held-out sample (at most 1,500 rows) on its own two leading
        principal axes, before and after erasure.
    plane_codes : ndarray of shape (m,)
        The attribute class code of each plotted row.
    distortion : ndarray of shape (n,)
        ``‖x' − x‖² / E‖x − μ‖²`` per held-out row (its mean is the audit's distortion figure).
    """

    plane_before: NDArray[np.float32]
    plane_after: NDArray[np.float32]
    plane_codes: NDArray[np.intp]
    distortion: NDArray[np.float32]

    @classmethod
    def from_heldout(
        cls, raw: NDArray[np.floating], erased: NDArray[np.floating], codes: NDArray[np.intp], *, seed: int
    ) -> PlotData:
        raw64, erased64 = np.asarray(raw, dtype=np.float64), np.asarray(erased, dtype=np.float64)
        spread = float(np.mean(np.sum((raw64 - raw64.mean(axis=0)) ** 2, axis=1)))
        moved = np.sum((erased64 - raw64) ** 2, axis=1) / (spread if spread > 0 else 1.0)
        rows = np.arange(raw64.shape[0])
        if rows.size > SCATTER_POINTS:
            rows = np.sort(np.random.default_rng(seed).choice(rows, size=SCATTER_POINTS, replace=False))
        return cls(
            plane_before=_leading_plane(raw64[rows]),
            plane_after=_leading_plane(erased64[rows]),
            plane_codes=np.asarray(codes)[rows].astype(np.intp),
            distortion=moved.astype(np.float32),
        )

    def to_bytes(self) -> bytes:
        buffer = io.BytesIO()
        np.savez(
            buffer,
            allow_pickle=False,
            plane_before=self.plane_before,
            plane_after=self.plane_after,
            plane_codes=self.plane_codes,
            distortion=self.distortion,
        )
        return buffer.getvalue()

    @classmethod
    def from_bytes(cls, data: bytes) -> PlotData:
        with np.load(io.BytesIO(data), allow_pickle=False) as stored:
            return cls(
                plane_before=stored["plane_before"],
                plane_after=stored["plane_after"],
                plane_codes=stored["plane_codes"],
                distortion=stored["distortion"],
            )
