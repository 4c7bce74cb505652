"""Rows needed: the held-out linear leakage against the fitting rows, a curve through it, and its projection.

A linear eraser fitted on ``n`` rows removes the class-mean difference it
*estimated*; the estimate misses the true one by sampling error, about
``sqrt(2d/n)`` whitened units in ``d`` dimensions, and what it misses stays
readable on rows the fit never saw.  The audit therefore refits the same
method on nested, stratified, seeded shares of the fitting rows (1/8, 1/4
and 1/2; the full fit is the fourth point), measures each fit's held-out
linear excess (the audit's standardised linear reader, its accuracy above
majority on the held-out rows), and fits ``excess ≈ a · n^(-b)``.

Why ``b`` is fitted, and bounded to ``[1/2, 1]``: the residual class-mean
difference shrinks like ``n^(-1/2)``.  A reader that estimates the residual
direction well turns that distance into accuracy about linearly (``b = 1/2``);
when the residual is small against the reader's own estimation noise (its
``d`` weights learnt from the held-out rows), the direction it learns is
itself only partly right and the excess goes like the distance squared
(``b = 1``).  Measured on the large committed sample (LEACE, 7,267 held-out
rows; docs/methods.md, "Rows needed"), the local exponent grows from about
0.3 at a few hundred fitting rows to about 1 at several thousand, so no one
exponent holds: fixed at 1/2, the curve through a fit of 2,092 rows projected
0.045 at 16,733 rows where 0.024 was measured, and with ``b`` fitted within
``[1/2, 1]`` it projected 0.041 (from a fit of 4,183 rows: 0.044 and 0.033).
The fitted exponent is kept, as the closer of the two, and the projection it
gives is conservative (more rows than needed); :attr:`LearningCurve.fastest_rows`
gives the other end, the excess falling like ``1/rows`` from the fit on.

Plain data and a small least-squares fit (NumPy and SciPy): cards and
reports read these records; the refitting is in :mod:`veil.audit.rows_measure`.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike
from scipy.optimize import minimize_scalar

#: The shares of the fitting rows the audit refits on (the full fit is the last point).
SHARES = (1 / 8, 1 / 4, 1 / 2)
#: The bounds of the fitted exponent (see the module's docstring).
EXPONENT_BOUNDS = (0.5, 1.0)
#: Points a curve needs: two parameters, and one more to say anything of the fit.
MIN_POINTS = 3

#: What the stored record says of a version whose audit did not measure the curve.
NOT_RECORDED = "not measured (stored before the audit measured the rows a fit needs)"


@dataclass(frozen=True)
class PowerLaw:
    """``excess(n) = scale · n^(-exponent)``."""

    scale: float
    exponent: float

    def __call__(self, rows: float) -> float:
        return float(self.scale * rows ** (-self.exponent))

    def rows_for(self, level: float) -> float:
        """The rows at which the curve reaches ``level`` (0 for a curve that reads nothing)."""
        if self.scale <= 0:
            return 0.0
        return float((self.scale / level) ** (1 / self.exponent))


def fit_power_law(rows: ArrayLike, excess: ArrayLike, bounds: tuple[float, float] = EXPONENT_BOUNDS) -> PowerLaw:
    """Least squares of ``excess ≈ a · rows^(-b)`` with ``a >= 0`` and ``b`` within ``bounds``.

    In the excess's own units, not in logarithms: a held-out excess can be 0
    or below (noise around a curve that has reached majority), and each point's
    sampling error is about the same (the same held-out rows read them all).
    For a given ``b`` the best ``a`` is a one-dimensional least squares in
    closed form; ``b`` is then the bounded minimum of the residual sum of squares.
    """
    n = np.asarray(rows, dtype=np.float64)
    y = np.asarray(excess, dtype=np.float64)
    if n.ndim != 1 or n.shape != y.shape or n.size < 2:
        raise ValueError(f"need two or more (rows, excess) points of equal length, got {n.shape} and {y.shape}")
    if not (np.all(n > 0) and np.all(np.isfinite(y))):
        raise ValueError("rows must be positive and every excess finite")
    low, high = bounds
    if not 0 < low <= high:
        raise ValueError(f"the exponent's bounds need 0 < low <= high, got {bounds}")
    # Rows relative to the largest: the same fit, with powers near 1 whatever the sample's size.
    relative = n / n.max()

    def scale_at(b: float) -> float:
        x = relative ** (-b)
        return max(0.0, float(x @ y / (x @ x)))

    def residual(b: float) -> float:
        return float(np.sum((y - scale_at(b) * relative ** (-b)) ** 2))

    if low == high:
        exponent = low
    else:
        found = minimize_scalar(residual, bounds=(low, high), method="bounded", options={"xatol": 1e-6})
        # The bounded search stops within its tolerance of an edge: the edge itself is checked too.
        exponent = min((float(found.x), low, high), key=residual)
    return PowerLaw(scale=scale_at(exponent) * float(n.max()) ** exponent, exponent=exponent)


@dataclass(frozen=True)
class LearningCurve:
    """The held-out linear excess at each fitting-row count, the curve through it and the rows it projects.

    Attributes
    ----------
    rows : tuple of int
        Fitting rows of each point, increasing (the last is the version's own fit).
    excess : tuple of float
        The linear reader's held-out accuracy minus the baseline (majority, or the floor within a context).
    baseline : str
        ``"majority"`` or ``"floor"``.
    threshold : float
        The warn level of the card's linear threat the projection aims under.
    scale, exponent : float
        The fitted ``excess ≈ scale · rows^(-exponent)``.
    expected : float
        The curve at the version's own fitting rows.
    projected_rows : int
        Fitting rows at which the curve falls under ``threshold`` (at most the version's own when it already has).
    fastest_rows : int
        The same if the excess fell like ``1/rows`` from the version's own fit on (the upper bound of the
        exponent): the other end of the projection.  On the large committed sample the population's measured
        curve stayed between the two; within a context it once fell faster than ``1/rows`` (docs/methods.md).
    """

    rows: tuple[int, ...]
    excess: tuple[float, ...]
    baseline: str
    threshold: float
    scale: float
    exponent: float
    expected: float
    projected_rows: int
    fastest_rows: int

    @classmethod
    def fitted(
        cls,
        rows: tuple[int, ...],
        excess: tuple[float, ...],
        *,
        baseline: str,
        threshold: float,
        bounds: tuple[float, float] = EXPONENT_BOUNDS,
    ) -> LearningCurve:
        if threshold <= 0:
            raise ValueError(f"the projection needs a positive threshold, got {threshold}")
        law = fit_power_law(rows, excess, bounds)
        expected = law(rows[-1])
        return cls(
            rows=tuple(int(n) for n in rows),
            excess=tuple(float(e) for e in excess),
            baseline=baseline,
            threshold=float(threshold),
            scale=law.scale,
            exponent=law.exponent,
            expected=expected,
            # Rounded to 6 decimals first: round-off in a crossing that falls on a whole row must not add a row.
            projected_rows=math.ceil(round(law.rows_for(threshold), 6)),
            fastest_rows=math.ceil(round(rows[-1] * max(expected, 0.0) / threshold, 6)),
        )

    @property
    def law(self) -> PowerLaw:
        return PowerLaw(self.scale, self.exponent)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> LearningCurve:
        return cls(**{**data, "rows": tuple(data["rows"]), "excess": tuple(data["excess"])})

    def sentence(self, dim: int, where: str = "") -> str:
        """The curve in one sentence, as the card and the report say it."""
        above = f"above {self.baseline}{where}"
        head = (
            f"with {self.rows[-1]:,} rows for {dim} dimensions expect about {_about(self.expected)} {above} out of "
            "sample"
        )
        if round(self.expected, 9) < self.threshold:
            return f"{head}, under the linear threat's warn level of {self.threshold:g}"
        return (
            f"{head}; about {_about_rows(self.projected_rows)} rows bring it under {self.threshold:g} (about "
            f"{_about_rows(self.fastest_rows)} if it falls like 1/rows from here)"
        )


@dataclass(frozen=True)
class RowsNeeded:
    """The audit's rows-needed figures: the curve over the population and, with a context, within it.

    ``population`` is None when the curve was not measured; ``reason`` then
    says why.  ``seconds`` is what the refits and their readers cost.
    """

    dim: int
    heldout: int
    population: LearningCurve | None
    context: LearningCurve | None = None
    context_column: str | None = None
    reason: str | None = None
    seconds: float = 0.0

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> RowsNeeded:
        population, context = data.get("population"), data.get("context")
        return cls(
            dim=int(data["dim"]),
            heldout=int(data["heldout"]),
            population=None if population is None else LearningCurve.from_dict(population),
            context=None if context is None else LearningCurve.from_dict(context),
            context_column=data.get("context_column"),
            reason=data.get("reason"),
            seconds=float(data.get("seconds", 0.0)),
        )

    def sentences(self) -> list[str]:
        """One sentence for the population, one within the context (if measured); why not, if not measured."""
        if self.population is None:
            return [f"rows needed: not measured ({self.reason or 'no reason recorded'})"]
        lines = [self.population.sentence(self.dim)]
        if self.context is not None:
            column = "the context" if self.context_column is None else repr(self.context_column)
            lines.append(self.context.sentence(self.dim, f" within {column}"))
        return lines

    def table(self) -> list[tuple[str, str]]:
        """``(fitting rows, excess)`` rows of each curve, fitted value beside the measured one."""
        rows = []
        for name, curve in (("population", self.population), ("within the context", self.context)):
            if curve is None:
                continue
            for n, measured in zip(curve.rows, curve.excess, strict=True):
                rows.append((f"{name}, {n:,} fitting rows", f"{measured:+.3f} (curve {curve.law(n):.3f})"))
        return rows


def rows_needed_headline(record: RowsNeeded | None) -> str:
    """The rows needed in one line, as the card's headline gives it (an older card: not measured)."""
    if record is None:
        return NOT_RECORDED
    if record.population is None:
        return f"not measured: {record.reason or 'no reason recorded'}"
    return "; ".join(record.sentences())


def rows_needed_lines(record: RowsNeeded | None) -> list[str]:
    """What ``veil show`` and the full audit print: the sentences, the points, how the curve was fitted."""
    if record is None:
        return [f"rows needed: {NOT_RECORDED}"]
    lines = [f"rows needed: {sentence}" for sentence in record.sentences()]
    if record.population is None:
        return lines
    for label, value in record.table():
        lines.append(f"  {label}: held-out linear excess {value}")
    for curve in (record.population, record.context):
        if curve is not None:
            lines.append(
                f"  curve: excess ≈ {curve.scale:.3g} · rows^-{curve.exponent:.2f} above {curve.baseline} "
                f"(read on {record.heldout:,} held-out rows; refits took {record.seconds:.1f} s)"
            )
    return lines


def _about(value: float) -> str:
    """A share to two decimals, or one significant figure below 0.01 (0 for a curve that reads nothing)."""
    if value <= 0:
        return "0"
    return f"{value:.2f}" if value >= 0.01 else f"{value:.1g}"


def _about_rows(rows: int) -> str:
    """Rows to two significant figures, with thousands separators (6,000; 14,000; 850)."""
    if rows < 100:
        return str(rows)
    digits = len(str(rows)) - 2
    return f"{round(rows, -digits):,}"
