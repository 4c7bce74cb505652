"""Live-check levels calibrated on a version's own noise: each figure's no-drift distribution, stored by sample size.

At fitting time (:mod:`veil.checks.null_draws`) many live samples are drawn
from the held-out rows, which the fit never saw and which carry no drift by
construction, at several sizes; every live figure is computed on each draw.
What is stored per figure and size is the draws' mean, standard deviation,
skewness and a few empirical quantiles (``calibration.npz``, a format of its
own beside ``reference.npz``; a version stored before has neither file and
keeps the fixed levels of :class:`veil.checks.thresholds.AlertThresholds`).

Why a parametric tail.  A family-wise alert level of 0.1% over ten-odd
figures asks each figure for p-values near 1e-4, far beyond what a few
hundred draws can rank (the smallest empirical p-value of ``B`` draws is
``1 / (B + 1)``).  Each figure's tail is therefore a Pearson type III curve
(a gamma curve shifted and scaled) matched to the draws' mean, standard
deviation and skewness: with skewness 0 it is the normal curve, and it takes
the right skew of the norms and distances (a squared norm of a Gaussian mean
is exactly gamma).  A skewness estimated below 0 is taken as 0: a left-skewed
curve ends on the right, and would call any figure beyond that end
impossible, which no finite number of draws can show.  The empirical
quantiles stay stored beside the curve, so that the fit can be checked
against them (the tests do).

Between sizes, the mean (in logs when positive at both ends: norms shrink as
a power of ``n``), the logarithm of the standard deviation and the skewness
are interpolated linearly in ``log n``.  Above the largest size drawn the
largest size's curve holds (see :meth:`FigureNull.curve`); below the
smallest the first two sizes are extrapolated the same way (one size alone:
the spread grows as ``1 / sqrt(n)``, the mean and skewness stay).

A live check computes each figure's p-value at its own sample size, adjusts
them across the figures judged by Holm's step-down method (family-wise error
held under any dependence between the figures), and warns or alerts where an
adjusted p-value is at or below the card's levels (1% and 0.1% by default).
"""

from __future__ import annotations

import io
import math
import zipfile
from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import NDArray
from scipy import stats

CALIBRATION_FILE = "calibration.npz"
#: The layout of ``calibration.npz`` this code writes; a newer one is refused rather than misread.
CALIBRATION_FORMAT = 1
#: Family-wise levels of a calibrated check (warn, alert), recorded on the card.
WARN_LEVEL = 0.01
ALERT_LEVEL = 0.001
#: The empirical quantiles stored beside each curve, to check its fit.
QUANTILES = (0.5, 0.9, 0.99)
#: The two rules a check is judged by.
CALIBRATED = "calibrated"
FIXED = "fixed levels"


def null_key(figure: str, source: str = "", attribute: str = "") -> str:
    """The name a figure's no-drift distribution is stored under (``source``: labels or pseudo-labels)."""
    return "|".join((figure, source, attribute))


@dataclass(frozen=True, eq=False)
class FigureNull:
    """One figure's no-drift distribution at each size drawn: moments of the draws and their quantiles.

    Attributes
    ----------
    sizes : ndarray of shape (k,), int
        Increasing sample sizes.
    draws : ndarray of shape (k,), int
    mean, sd, skew : ndarray of shape (k,)
        Of the figure over the draws (``sd`` already corrected to independent samples where draws shared rows).
    quantiles : ndarray of shape (k, len(QUANTILES))
        Empirical quantiles of the draws.
    """

    sizes: NDArray[np.int64]
    draws: NDArray[np.int64]
    mean: NDArray[np.float64]
    sd: NDArray[np.float64]
    skew: NDArray[np.float64]
    quantiles: NDArray[np.float64]

    @classmethod
    def from_draws(
        cls, by_size: dict[int, NDArray[np.float64]], *, spread_factor: dict[int, float] | None = None
    ) -> FigureNull:
        """From each size's draws of the figure; ``spread_factor`` widens a size's spread (finite-population)."""
        sizes = sorted(by_size)
        values = [np.asarray(by_size[size], dtype=np.float64) for size in sizes]
        factor = spread_factor or {}
        skews = [float(stats.skew(v)) if v.size > 2 and np.ptp(v) > 0 else 0.0 for v in values]
        return cls(
            sizes=np.array(sizes, dtype=np.int64),
            draws=np.array([v.size for v in values], dtype=np.int64),
            mean=np.array([v.mean() for v in values]),
            sd=np.array([v.std(ddof=1) * factor.get(size, 1.0) for size, v in zip(sizes, values, strict=True)]),
            skew=np.array([max(0.0, s) if math.isfinite(s) else 0.0 for s in skews]),
            quantiles=np.array([np.quantile(v, QUANTILES) for v in values]),
        )

    def curve(self, n: int) -> tuple[float, float, float]:
        """The ``(mean, sd, skew)`` at sample size ``n``: interpolated in ``log n`` between the sizes drawn.

        Beyond the largest size drawn the largest size's curve holds.  The shift figures level off at the
        reference's own error, which every live sample carries, so a mean extended along its fall would sink
        below that floor while the spread shrank, and large quiet samples would alarm; held, a larger sample is
        judged by a wider curve than its own, which can only miss, never invent, a change.  Below the smallest
        size the first segment is extended (smaller samples spread more, and the extension widens the curve).
        """
        logs = np.log(self.sizes.astype(np.float64))
        last = self.sizes.size - 1
        if n >= self.sizes[last]:
            return float(self.mean[last]), float(self.sd[last]), float(self.skew[last])
        if self.sizes.size == 1:
            return float(self.mean[0]), float(self.sd[0] * math.sqrt(self.sizes[0] / n)), float(self.skew[0])
        u = math.log(n)
        # The segment holding n, or the first one when n lies below the smallest size.
        i = int(np.clip(np.searchsorted(logs, u) - 1, 0, self.sizes.size - 2))
        t = (u - logs[i]) / (logs[i + 1] - logs[i])
        a, b = float(self.mean[i]), float(self.mean[i + 1])
        mean = math.exp((1 - t) * math.log(a) + t * math.log(b)) if a > 0 and b > 0 else (1 - t) * a + t * b
        sd_a, sd_b = (float(s) for s in self.sd[i : i + 2])
        if min(sd_a, sd_b) > 0:
            sd = math.exp((1 - t) * math.log(sd_a) + t * math.log(sd_b))
        else:
            # A size whose draws did not spread at all: logs would overflow or vanish; a straight line does neither.
            sd = max(0.0, (1 - t) * sd_a + t * sd_b)
        skew = float(np.clip((1 - t) * self.skew[i] + t * self.skew[i + 1], self.skew.min(), self.skew.max()))
        return mean, sd, skew

    def p_value(self, value: float, n: int) -> float:
        """``P(figure ≥ value)`` for a no-drift sample of ``n`` rows, on the Pearson type III tail."""
        mean, sd, skew = self.curve(n)
        # A figure within round-off of the mean is at the mean: the curve's centre, never its tail.
        scale = max(abs(mean), abs(value), 1.0)
        if sd <= scale * 1e-12:
            return 1.0 if value <= mean + scale * 1e-9 else 0.0
        p = float(stats.pearson3.sf(value, skew, loc=mean, scale=sd))
        # A figure or curve that is not a number says nothing about drift: it never alarms.
        return p if math.isfinite(p) else 1.0


@dataclass(frozen=True, eq=False)
class LiveCalibration:
    """Every figure's no-drift distribution for one version, and the family-wise levels its checks use."""

    nulls: dict[str, FigureNull]
    held_out_rows: int
    warn: float = WARN_LEVEL
    alert: float = ALERT_LEVEL
    correction: str = "holm"
    format: int = CALIBRATION_FORMAT

    def card_entry(self) -> dict[str, Any]:
        """What the card records: the rule, its levels, and what the levels were calibrated on."""
        sizes = sorted({int(size) for null in self.nulls.values() for size in null.sizes})
        return {
            "rule": CALIBRATED,
            "file": CALIBRATION_FILE,
            "format": self.format,
            "warn": self.warn,
            "alert": self.alert,
            "correction": self.correction,
            "held_out_rows": self.held_out_rows,
            "sizes": sizes,
            "figures": sorted(self.nulls),
        }

    def to_bytes(self) -> bytes:
        arrays: dict[str, Any] = {
            "format": np.array(self.format),
            "levels": np.array([self.warn, self.alert]),
            "held_out_rows": np.array(self.held_out_rows),
            "keys": np.array(sorted(self.nulls), dtype=str),
            "quantile_levels": np.array(QUANTILES),
        }
        for position, key in enumerate(sorted(self.nulls)):
            null = self.nulls[key]
            for part in ("sizes", "draws", "mean", "sd", "skew", "quantiles"):
                arrays[f"{position}.{part}"] = getattr(null, part)
        buffer = io.BytesIO()
        np.savez(buffer, allow_pickle=False, **arrays)
        return buffer.getvalue()

    @classmethod
    def from_bytes(cls, data: bytes) -> LiveCalibration:
        """Read what :meth:`to_bytes` wrote (``ValueError`` if it is not that, naming what is wrong)."""
        try:
            with np.load(io.BytesIO(data), allow_pickle=False) as stored:
                arrays = {name: stored[name] for name in stored.files}
            version = int(arrays["format"])
            if version != CALIBRATION_FORMAT:
                raise ValueError(f"calibration format {version} is not one this veil reads ({CALIBRATION_FORMAT})")
            nulls = {
                str(key): _checked_null(
                    str(key), *(arrays[f"{position}.{part}"] for part in ("sizes", "draws", "mean", "sd", "skew",
                                                                           "quantiles"))
                )
                for position, key in enumerate(arrays["keys"])
            }  # fmt: skip
            warn, alert = (float(level) for level in arrays["levels"])
            return cls(nulls, int(arrays["held_out_rows"]), warn, alert)
        except ValueError:
            raise
        # np.load and the conversions raise these on bytes that are not a calibration file.
        except (KeyError, TypeError, IndexError, EOFError, OSError, zipfile.BadZipFile) as error:
            raise ValueError(f"not a calibration file ({type(error).__name__}: {error})") from None


def _checked_null(key: str, *parts: NDArray[Any]) -> FigureNull:
    """One stored figure's curve, refused unless its sizes increase from 1 and every part is finite and aligned."""
    sizes, draws, mean, sd, skew, quantiles = (np.asarray(part) for part in parts)
    k = sizes.shape[0] if sizes.ndim == 1 else 0
    aligned = k > 0 and all(part.shape == (k,) for part in (draws, mean, sd, skew))
    if not aligned or quantiles.shape != (k, len(QUANTILES)):
        raise ValueError(f"the curve of {key} has parts of different lengths")
    if sizes[0] < 1 or np.any(np.diff(sizes) <= 0):
        raise ValueError(f"the sizes of {key} do not increase from 1")
    if not all(np.isfinite(part).all() for part in (mean, sd, skew, quantiles)) or np.any(sd < 0):
        raise ValueError(f"the curve of {key} holds a value that is not finite, or a negative spread")
    return FigureNull(
        sizes.astype(np.int64), draws.astype(np.int64), mean.astype(np.float64), sd.astype(np.float64),
        skew.astype(np.float64), quantiles.astype(np.float64),
    )  # fmt: skip


def holm_adjusted(p_values: list[float]) -> list[float]:
    """Holm's step-down adjusted p-values (in the order given): reject at level ``α`` where adjusted ≤ ``α``."""
    k = len(p_values)
    order = sorted(range(k), key=lambda i: p_values[i])
    adjusted = [0.0] * k
    running = 0.0
    for rank, i in enumerate(order):
        running = max(running, min(1.0, (k - rank) * p_values[i]))
        adjusted[i] = running
    return adjusted


@dataclass(frozen=True)
class JudgedFigure:
    """One figure of a check as its rule judged it."""

    figure: str
    value: float
    #: The statistic the p-value reads (the figure itself, or the unclipped quantity behind it).
    statistic: float | None = None
    p_value: float | None = None
    adjusted_p_value: float | None = None
    level: str = "ok"


def at_level(p: float, level: float) -> bool:
    """An adjusted p-value at or below a level; a relative 1e-9 of the level absorbs round-off at the boundary."""
    return p <= level * (1 + 1e-9)


def judge_calibrated(
    calibration: LiveCalibration, rows: int, figures: list[tuple[str, str, float, float]]
) -> list[JudgedFigure]:
    """Each ``(label, null key, figure, statistic)`` with its p-value at ``rows``, Holm-adjusted over them all."""
    raw = [calibration.nulls[key].p_value(statistic, rows) for _, key, _, statistic in figures]
    adjusted = holm_adjusted(raw)
    judged = []
    for (label, _, value, statistic), p, q in zip(figures, raw, adjusted, strict=True):
        level = "alert" if at_level(q, calibration.alert) else "warn" if at_level(q, calibration.warn) else "ok"
        judged.append(JudgedFigure(label, value, statistic, p, q, level))
    return judged


def reason_of(figure: JudgedFigure, calibration: LiveCalibration) -> str:
    """One reason line for a calibrated figure at a level."""
    limit = calibration.alert if figure.level == "alert" else calibration.warn
    return (
        f"{figure.figure} {figure.value:.3f}: p = {figure.p_value:.2g} (Holm-adjusted {figure.adjusted_p_value:.2g}) "
        f"reaches {figure.level} ({limit:g})"
    )
