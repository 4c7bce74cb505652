"""Operating points: a method fitted at several strengths, measured on held-out rows, and one chosen by targets.

Each method has one strength parameter (LEACE's second-moment directions,
INLP's classifiers, R-LACE's rank, transport's directions per class).  A sweep fits the method at
each value of a grid on the fitting rows and measures every point on the
held-out rows with :func:`veil.audit.measure_points.point_figures`.  Targets such as
``nn-attribute <= base + 0.05`` or ``task >= raw - 0.02`` then choose a
point: the least distortion among the points that meet every target.

The point is chosen on the same held-out rows the version's audit reports,
so that audit is optimistic by the choice; the card says so.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from veil.audit.measure_points import baselines, point_figures
from veil.audit.points import FIGURES, Baselines, PointFigures, Sweep, value_text
from veil.erasers import Erasure
from veil.errors import DataError

Value = int | None


@dataclass(frozen=True)
class Strength:
    """The parameter a sweep of one method varies, its default grid and the values it accepts."""

    parameter: str
    grid: tuple[Value, ...]
    least: int
    #: What ``None`` (``all`` on the command line) means for the method, or None where it has no meaning.
    full: str | None = None


#: The strength each method's sweep varies.
STRENGTHS: dict[str, Strength] = {
    "leace": Strength("covariance_directions", (0, 8, 16, 32, 64), least=0),
    "inlp": Strength("max_iter", (1, 2, 4, 8, 16, 32), least=1),
    "rlace": Strength("rank", (1, 2, 4, 8, 16), least=1),
    "transport": Strength("rank", (8, 16, 32, 64, 128, None), least=1, full="the full support"),
}
# What each reference of a target may be compared with.
_REFERENCES = {
    "majority": ("linear", "strongest"),
    "base": ("nn_attribute", "nn_task"),
    "raw": FIGURES,
}
_TARGET = re.compile(
    r"^\s*(?P<figure>[a-z_-]+)\s*(?P<op><=|>=)\s*"
    r"(?:(?P<reference>[a-z]+)\s*(?:(?P<sign>[+-])\s*(?P<offset>\d+(?:\.\d+)?))?|(?P<number>-?\d+(?:\.\d+)?))\s*$"
)


class TargetsMissedError(DataError):
    """No point of a sweep meets every target; the sweep is attached for the caller to show."""

    def __init__(self, message: str, sweep: Sweep) -> None:
        super().__init__(message)
        self.sweep = sweep


@dataclass(frozen=True)
class Target:
    """``figure <= reference + offset`` (or ``>=``); ``reference`` None compares with ``offset`` alone."""

    figure: str
    at_most: bool
    reference: str | None
    offset: float
    text: str

    def bound(self, raw: PointFigures, base: Baselines) -> float | None:
        """The value the figure is compared with (None where the raw rows have no such figure)."""
        if self.reference is None:
            return self.offset
        if self.reference == "majority":
            return base.majority + self.offset
        if self.reference == "base":
            level = base.nn_attribute_base if self.figure == "nn_attribute" else base.nn_task_base
            return None if level is None else level + self.offset
        raw_value = getattr(raw, self.figure)
        return None if raw_value is None else float(raw_value) + self.offset

    def miss(self, point: PointFigures, raw: PointFigures, base: Baselines) -> float:
        """By how much ``point`` misses the target (0 when it meets it)."""
        value: float | None = getattr(point, self.figure)
        bound = self.bound(raw, base)
        if value is None or bound is None:
            raise DataError(f"target {self.text!r} needs a task (--task), and the sample has none")
        return max(0.0, value - bound) if self.at_most else max(0.0, bound - value)


def parse_target(text: str) -> Target:
    """``"nn-attribute <= base + 0.05"`` as a :class:`Target`.

    The figures are ``linear``, ``strongest``, ``nn-attribute``, ``task``,
    ``nn-task`` and ``distortion``; a reference is ``majority`` (for the
    probes), ``base`` (the neighbours' base rates) or ``raw`` (the raw rows'
    own figure), optionally plus or minus a number; or a plain number.

    Raises
    ------
    DataError
        Text that does not read as a target, names an unknown figure, or
        compares a figure with a reference it has none of.
    """
    match = _TARGET.match(text.lower())
    if match is None:
        raise DataError(
            f"target {text!r} does not read as FIGURE <= REFERENCE [+ NUMBER] (e.g. 'linear <= majority + 0.03')"
        )
    figure = match["figure"].replace("-", "_")
    if figure not in FIGURES:
        raise DataError(
            f"target {text!r}: unknown figure; choose one of {', '.join(f.replace('_', '-') for f in FIGURES)}"
        )
    reference = match["reference"]
    if reference is None:
        return Target(figure, match["op"] == "<=", None, float(match["number"]), text.strip())
    if reference not in _REFERENCES:
        raise DataError(f"target {text!r}: unknown reference {reference!r}; choose majority, base or raw")
    if figure not in _REFERENCES[reference]:
        raise DataError(f"target {text!r}: {figure.replace('_', '-')} is not compared with {reference}")
    offset = float(match["offset"] or 0.0) * (-1.0 if match["sign"] == "-" else 1.0)
    return Target(figure, match["op"] == "<=", reference, offset, text.strip())


def sweep_values(method: str, values: Sequence[Value] | None) -> tuple[str, tuple[Value, ...]]:
    """The parameter a sweep of ``method`` varies, and its values (the default grid without ``values``).

    Raises
    ------
    DataError
        The method has no strength to sweep, or a value is one the method does not accept.
    """
    if method not in STRENGTHS:
        raise DataError(f"{method} has no strength to sweep; sweeps exist for {', '.join(STRENGTHS)}")
    strength = STRENGTHS[method]
    chosen = tuple(strength.grid if values is None else values)
    if not chosen:
        raise DataError(f"a sweep of {method} needs at least one value of {strength.parameter}")
    for value in chosen:
        if value is None and strength.full is None:
            raise DataError(f"a sweep of {method} over {strength.parameter} takes numbers only; 'all' has no meaning")
        if value is not None and value < strength.least:
            raise DataError(f"a sweep of {method} needs {strength.parameter} of at least {strength.least}, got {value}")
    return strength.parameter, chosen


def run_sweep(
    method: str,
    values: Sequence[Value] | None,
    fit_at: Callable[[str, Value], Erasure],
    raw: NDArray[np.floating],
    codes: NDArray[np.intp],
    task_codes: NDArray[np.intp] | None,
    *,
    targets: Sequence[Target],
    folds: int,
    nonlinear: bool,
    random_state: int,
) -> tuple[Sweep, list[Erasure]]:
    """Fit and measure every point; choose one if there are targets.

    Parameters
    ----------
    method : str
    values : sequence or None
        Values of the method's strength parameter (None: its default grid).
    fit_at : callable
        ``fit_at(parameter, value)`` returns the method fitted with that value.
    raw : ndarray of shape (n, d)
        Held-out rows.
    codes, task_codes : ndarray of shape (n,)
        Their attribute classes and task classes (or None).

    Returns
    -------
    sweep : Sweep
    fitted : list of Erasure
        The eraser of each point, in grid order.

    Raises
    ------
    TargetsMissedError
        There are targets and no point meets them all.
    """
    parameter, grid = sweep_values(method, values)

    def measured(cleaned: NDArray[np.floating]) -> PointFigures:
        return point_figures(
            raw, cleaned, codes, task_codes, folds=folds, nonlinear=nonlinear, random_state=random_state
        )

    raw_figures = measured(raw)
    base = baselines(codes, task_codes)
    fitted = [fit_at(parameter, value) for value in grid]
    points = tuple(measured(eraser.transform(raw)) for eraser in fitted)
    misses = [sum(target.miss(point, raw_figures, base) for target in targets) for point in points]
    meeting = [index for index, miss in enumerate(misses) if miss == 0.0]
    chosen = min(meeting, key=lambda index: (points[index].distortion, index)) if meeting and targets else None
    sweep = Sweep(method, parameter, grid, points, raw_figures, base, tuple(t.text for t in targets), chosen)
    if targets and chosen is None:
        closest = int(np.argmin(misses))
        missed = [t.text for t in targets if t.miss(points[closest], raw_figures, base) > 0]
        raise TargetsMissedError(
            f"no {method} point of the sweep over {parameter} meets every target; the closest, "
            f"{parameter}={value_text(grid[closest])}, misses {'; '.join(missed)}",
            sweep,
        )
    return sweep, fitted
