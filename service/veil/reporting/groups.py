"""The report's section across groups: the linear probe on ordinary folds, on group folds and as a transfer probe.

Each line carries its meaning (:data:`~veil.audit.group_report.READING_MEANINGS`); an audit without a group column
says that no group folds were used.
"""

from __future__ import annotations

import html
from collections.abc import Sequence

from veil.audit.group_report import NO_GROUP_FOLDS, READING_LABELS
from veil.audit.report import AuditReport

TITLE = "Across groups"


def table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    """A plain table styled as the context's (the report's stylesheet sets its wrapping and borders)."""
    head = "<tr>" + "".join(f"<th>{html.escape(cell)}</th>" for cell in header) + "</tr>"
    body = "".join("<tr>" + "".join(f"<td>{html.escape(cell)}</td>" for cell in row) + "</tr>" for row in rows)
    return f'<table class="context">{head}{body}</table>'


def groups_section(audit: AuditReport) -> str:
    """The section; for an audit without a group column, one sentence saying no group folds were used."""
    groups = audit.groups
    if groups is None:
        text = (
            f"{NO_GROUP_FOLDS} (veil fit --group COLUMN holds whole groups out and keeps each in one fold of every "
            "probe). Where rows share an author, an account or a name that tells the attribute, the folds above "
            "can over-read."
        )
        return f'<h2>{TITLE}</h2><p class="muted">{html.escape(text[0].upper() + text[1:])}</p>'
    name, after = groups.worst_linear()
    text = (
        f"Every probe of this audit ran on group folds. {groups.describe()[0].upper()}{groups.describe()[1:]}. "
        "The linear probe read three ways, side by side; the verdict judges the linear threat on the worst of "
        f"them, here the {READING_LABELS[name]} reading, {after.with_interval()}."
    )
    header = ["reading", "before", "after [95%]", "majority", "what it means"]
    parts = [f"<h2>{TITLE}</h2>", f'<p class="muted">{html.escape(text)}</p>', table(header, groups.rows())]
    if groups.note is not None:
        parts.append(f"<p>{html.escape(groups.note[0].upper() + groups.note[1:])}.</p>")
    return "".join(parts)
