"""What the independence tests add to a verdict: a test rejected at the corrected level is an alert for its threat.

The kernel test is an alert for the nonlinear readers (it sees any difference in distribution, not only a
linear one), the readers' test for the kind of reader it used (linear, or nonlinear), and the
nearest-neighbour test for the neighbours.  Judged like every other figure of the threat: in the headline
when the version claims the threat, shown as not claimed otherwise.  An audit made before the tests says
nothing here.
"""

from __future__ import annotations

from veil.audit.independence_report import TEST_LABELS
from veil.audit.report import AuditReport


def independence_alerts(report: AuditReport) -> dict[str, list[str]]:
    """Each threat's reasons for an alert from the independence tests that reject (none without the tests)."""
    family = report.independence
    alerts: dict[str, list[str]] = {}
    if family is None:
        return alerts
    for test in family.rejected():
        alerts.setdefault(test.threat, []).append(
            f"the {TEST_LABELS[test.name]} finds the erased rows depend on the attribute (Holm-corrected p = "
            f"{test.p_holm:.3g} < {family.alpha:g}; effect at most {test.effect_upper:.3g}) (alert)"
        )
    return alerts
