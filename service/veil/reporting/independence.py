"""The report's section on the independence tests: one table, each line with what its test asks."""

from __future__ import annotations

import html

from veil.audit.independence_report import NOT_RUN, PERMUTATIONS, TEST_LABELS, TEST_MEANINGS
from veil.audit.report import AuditReport

TITLE = "Independence tests of the erased rows"


def independence_section(audit: AuditReport) -> str:
    """The tests' figures, Holm-corrected p-values, upper bounds and power; a sentence when they were not run."""
    family = audit.independence
    if family is None:
        return "" if not audit.classes else f'<h2>{TITLE}</h2><p class="muted">{html.escape(NOT_RUN)}.</p>'
    header = (
        "test",
        "statistic",
        "p",
        "Holm p",
        "effect",
        "upper bound",
        "smallest t",
        "labels permuted",
        "what it asks",
    )
    head = "<tr>" + "".join(f"<th>{html.escape(cell)}</th>" for cell in header) + "</tr>"
    body = ""
    for test, cells in zip(family.tests, family.table(), strict=True):
        label = TEST_LABELS[test.name] + ("" if test.reader is None else f": {test.reader}")
        shown = (label, *cells[1:7], PERMUTATIONS[test.permutation], f"{TEST_MEANINGS[test.name]} ({test.detail})")
        body += (
            f'<tr data-test="{html.escape(test.name)}">'
            + "".join(f"<td>{html.escape(cell)}</td>" for cell in shown)
            + "</tr>"
        )
    setting = "thorough" if family.thorough else "fast (--thorough for finer figures)"
    text = (
        f"Each p-value is a permutation p-value ({family.permutations} permutations, {setting}); Holm p is "
        f"corrected across the {len(family.tests)} tests, and a test whose Holm p is below {family.alpha:g} "
        f"rejects independence: an alert for the threat it measures. The upper bound is one-sided at "
        f"{1 - family.alpha:.0%}. Smallest t: the least share t of what the map removed, put back "
        f"(x_t = f(x) + t(x - f(x))), that the test detects in {family.power_share:.0%} of {family.power_draws} "
        f"draws of {family.power_rows} rows at {family.alpha:g}: a leak smaller than that could go unseen. "
        "With a group column the labels are permuted by whole groups (each group's labels move as one block to "
        "another group's rows) and a row's neighbours come from other groups: the tests then ask whether the "
        "attribute leaks beyond the group. How to read each: docs/independence.md."
    )
    return f'<h2>{TITLE}</h2><p class="muted">{html.escape(text)}</p><table class="figures">{head}{body}</table>'
