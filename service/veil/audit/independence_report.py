"""The independence tests of an audit as records: each test's figures, the family's correction and its power.

Plain data (no scikit-learn), so that cards, verdicts and reports read them;
the measuring is in :mod:`veil.audit.independence` and :mod:`veil.audit.power`.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

#: The tests, in the order tables list them; the last two run within a context, when the audit has one.
TESTS = ("kernel", "readers", "neighbours", "kernel-context", "neighbours-context")

TEST_LABELS = {
    "kernel": "aggregated kernel two-sample test",
    "readers": "classifier two-sample test (strongest reader)",
    "neighbours": "nearest-neighbour two-sample test (10-NN)",
    "kernel-context": "within the context: aggregated kernel two-sample test",
    "neighbours-context": "within the context: nearest-neighbour two-sample test (10-NN)",
}

#: What each test asks of the erased rows, for tables.
TEST_MEANINGS = {
    "kernel": "do the classes' erased rows differ in distribution anywhere a Gaussian kernel sees (means, spreads, "
    "shapes), at any of several bandwidths at once? Effect: the share of the rows' kernel spread the class "
    "explains, above what shuffled labels give",
    "readers": "does the strongest reader's held-out prediction match the attribute more often than with the labels "
    "shuffled? Effect: its accuracy above majority; the bound covers every reader that ran",
    "neighbours": "do a row's 10 nearest neighbours share its class more often than with the labels shuffled? "
    "Effect: the 10-NN same-class share above its mean under shuffled labels",
    "kernel-context": "the kernel test within each value of the context: the classes are compared within each "
    "value and the labels shuffled within each value, so what the context alone tells is not counted",
    "neighbours-context": "the neighbour test within each value of the context: neighbours found among rows of "
    "the same value, the labels shuffled within each value",
}

#: How a test's labels were permuted, and what that means, for tables and the report.
PERMUTATIONS = {
    "rows": "row by row",
    "groups": "whole groups: each group's labels moved as one block to another group's rows",
    "within groups": "within each group (a group holds more than one class, so its block cannot move)",
    "within context values": "within each context value",
}

#: The threat of :data:`veil.checks.verdict.THREATS` a rejected test is an alert for (the readers' test: that of
#: the reader it used, see :meth:`IndependenceTest.threat`).
TEST_THREATS = {
    "kernel": "nonlinear",
    "neighbours": "neighbours",
    "kernel-context": "context-nonlinear",
    "neighbours-context": "context-neighbours",
}


@dataclass(frozen=True)
class IndependenceTest:
    """One test of independence between the erased rows and the attribute.

    Attributes
    ----------
    name : str
        One of :data:`TESTS`.
    statistic : float
        The observed statistic (kernel: the largest standardised statistic over the bandwidths; readers: the
        strongest reader's accuracy; neighbours: the 10-NN same-class share).
    p_value : float
        The permutation p-value (ties with the observed statistic are split at random, seeded, so that it is
        uniform when there is no dependence).
    p_holm : float
        The p-value after Holm's step-down correction across the family of tests that ran.
    effect : float
        The effect's point estimate above chance, in the test's unit (see :data:`TEST_MEANINGS`).
    effect_upper : float
        Its one-sided upper confidence bound at the family's confidence level.
    rows : int
        The rows the test read.
    reader : str, optional
        The readers' test: the reader whose predictions it used (one of :data:`veil.audit.report.PROBES`).
    detail : str
        How the test was set up (bandwidths, rows), for the report.
    smallest_strength : float or None
        The smallest planted strength ``t`` (``x_t = f(x) + t (x - f(x))``) this test detected in
        :attr:`IndependenceAudit.power_share` of the draws at ``alpha``; None when no strength of the grid was
        detected, or power was not measured.
    power_measured : bool
        Whether this test's power was measured (the readers' test only with the thorough setting: it refits the
        reader on every draw).
    permutation : str
        How the labels were permuted, one of :data:`PERMUTATIONS`: row by row; with a group column, whole groups'
        labels moved as units ("groups") or, where a group holds more than one class, within each group; the
        context tests within each context value.
    """

    name: str
    statistic: float
    p_value: float
    p_holm: float
    effect: float
    effect_upper: float
    rows: int
    reader: str | None = None
    detail: str = ""
    smallest_strength: float | None = None
    power_measured: bool = False
    permutation: str = "rows"

    @property
    def threat(self) -> str:
        """The threat a rejection of this test is an alert for."""
        if self.name == "readers":
            return "linear" if self.reader == "linear" else "nonlinear"
        return TEST_THREATS[self.name]

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> IndependenceTest:
        # Records stored before the field: the context tests permuted within each context value, the rest rows.
        default = "within context values" if str(data.get("name", "")).endswith("-context") else "rows"
        return cls(**{"permutation": default, **data})


@dataclass(frozen=True)
class IndependenceAudit:
    """The family of independence tests of one audit, with its level, costs and power.

    Attributes
    ----------
    tests : tuple of IndependenceTest
    alpha : float
        The family's level: a test whose Holm-corrected p-value is below it rejects independence.
    permutations : int
        Permutations behind each p-value.
    thorough : bool
        Whether the thorough setting ran (more permutations, a finer power grid, more draws).
    power_grid : tuple of float
        The planted strengths measured, ascending (empty: power was not measured).
    power_draws : int
        Draws at each strength: each a random quarter of the rows (stratified), planted, then tested.
    power_rows : int
        Rows in each draw.
    power_share : float
        The share of draws a strength must be detected in.
    seed : int
    """

    tests: tuple[IndependenceTest, ...]
    alpha: float
    permutations: int
    thorough: bool
    power_grid: tuple[float, ...] = ()
    power_draws: int = 0
    power_rows: int = 0
    power_share: float = 0.8
    seed: int = 0

    def rejected(self) -> tuple[IndependenceTest, ...]:
        """The tests that reject independence at the family's level (Holm-corrected)."""
        return tuple(test for test in self.tests if test.p_holm < self.alpha)

    def test(self, name: str) -> IndependenceTest | None:
        return next((test for test in self.tests if test.name == name), None)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> IndependenceAudit:
        return cls(
            **{
                **data,
                "tests": tuple(IndependenceTest.from_dict(test) for test in data["tests"]),
                "power_grid": tuple(data.get("power_grid", ())),
            }
        )

    def table(self) -> list[tuple[str, str, str, str, str, str, str, str]]:
        """``(test, statistic, p, Holm p, effect, upper bound, smallest t, labels permuted)`` rows, as text."""
        rows = []
        for test in self.tests:
            label = TEST_LABELS[test.name] + ("" if test.reader is None else f": {test.reader}")
            rows.append(
                (
                    label,
                    f"{test.statistic:.3f}",
                    f"{test.p_value:.4f}",
                    f"{test.p_holm:.4f}" + (" reject" if test.p_holm < self.alpha else ""),
                    f"{test.effect:+.4f}",
                    f"{test.effect_upper:.4f}",
                    self.strength_text(test),
                    test.permutation,
                )
            )
        return rows

    def strength_text(self, test: IndependenceTest) -> str:
        """The smallest strength detected, as text: a value, "above the grid", or "not measured"."""
        if not self.power_grid or not test.power_measured:
            return "with --thorough" if self.power_grid and test.name == "readers" else "not measured"
        if test.smallest_strength is None:
            return f"> {self.power_grid[-1]:g}"
        return f"{test.smallest_strength:g}"

    def lines(self) -> list[str]:
        """The tests as text lines for terminals: a header, one line per test, then how to read them."""
        setting = "thorough" if self.thorough else "fast"
        head = (
            f"independence tests ({setting}: {self.permutations} permutations each, Holm-corrected across "
            f"{len(self.tests)} at alpha {self.alpha:g}; upper bounds one-sided at {1 - self.alpha:.0%})"
        )
        labels = ("test", "statistic", "p", "Holm p", "effect", "upper", "smallest t", "permuted")
        rows = [labels, *self.table()]
        widths = [max(len(row[i]) for row in rows) for i in range(len(labels))]
        lines = [head]
        lines += ["  " + "  ".join(f"{cell:{widths[i]}}" for i, cell in enumerate(row)).rstrip() for row in rows]
        if self.power_grid:
            lines.append(
                f"  smallest t: the least planted strength x_t = f(x) + t(x - f(x)) detected in "
                f"{self.power_share:.0%} of {self.power_draws} draws of {self.power_rows} rows at alpha "
                f"{self.alpha:g} (grid {', '.join(f'{t:g}' for t in self.power_grid)})"
            )
        for way in sorted({test.permutation for test in self.tests} - {"rows", "within context values"}):
            lines.append(f"  permuted {way}: {PERMUTATIONS[way]}")
        return lines


#: What the report says in place of the tests for an audit stored before them.
NOT_RUN = "independence tests: not run (this audit was made before veil ran them)"
