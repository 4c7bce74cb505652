"""The report's section on the audit within a context: each reader against the floor, the worst value, the skipped."""

from __future__ import annotations

import html
from collections.abc import Sequence

from veil.audit.context_report import FLOOR_MEANING, ContextAudit
from veil.audit.report import PROBE_LABELS, AuditReport

TITLE = "Within the context"


def _table(header: Sequence[str], rows: Sequence[Sequence[str]]) -> str:
    head = "<tr>" + "".join(f"<th>{html.escape(cell)}</th>" for cell in header) + "</tr>"
    body = "".join("<tr>" + "".join(f"<td>{html.escape(cell)}</td>" for cell in row) + "</tr>" for row in rows)
    return f'<table class="context">{head}{body}</table>'


def _readers(context: ContextAudit) -> str:
    """Each reader pooled over the values, before and after erasure, against the floor."""
    rows = [
        [
            PROBE_LABELS[name],
            f"{context.before[name].accuracy:.3f}",
            context.after[name].with_interval(),
            f"{context.floor:.3f}",
            f"{context.after[name].excess:.3f}",
        ]
        for name in context.readers()
    ]
    if context.nn_share_after is not None and context.nn_share_before is not None:
        rows.append(
            [
                "10-NN sharing attribute, neighbours of the same value",
                f"{context.nn_share_before:.3f}",
                f"{context.nn_share_after:.3f}",
                f"base rate {context.nn_base_rate:.3f}",
                f"{context.neighbour_excess:.3f}",
            ]
        )
    header = ["reader", "before", "after [95%]", "floor", "beyond the context"]
    return _table(header, rows)


def _values(context: ContextAudit) -> str:
    """Each value read, the worst one marked, with its rows, floor and each reader's reading after erasure."""
    names = context.readers()
    rows = [
        [
            value.value + (" (worst)" if value.value == context.worst else ""),
            str(value.rows),
            f"{value.floor:.3f}",
            *(f"{value.after[name].accuracy:.3f}" for name in names),
            f"{value.excess:.3f}",
        ]
        for value in context.values
    ]
    header = ["value", "rows", "floor", *(f"{PROBE_LABELS[name]} after" for name in names), "beyond the context"]
    return _table(header, rows)


def context_section(audit: AuditReport) -> str:
    """The section, or nothing for an audit without a context."""
    context = audit.context
    if context is None:
        return ""
    column = "the context" if context.column is None else f"'{context.column}'"
    text = (
        f"Every reader trained and tested within each value of {column} ({len(context.values)} values, "
        f"{context.rows} rows), each row predicted by a reader trained on other rows of its own value, and the "
        f"figures weighted by rows. {FLOOR_MEANING} Beyond the context: the lower edge of the reading's 95% "
        "interval above the floor (0 when it reaches the floor). The worst value is the one with the highest "
        "excess of any reader after erasure."
    )
    parts = [f"<h2>{TITLE}</h2>", f'<p class="muted">{html.escape(text)}</p>']
    if context.after:
        parts += [_readers(context), "<h3>Each value</h3>", _values(context)]
    if context.skipped:
        skipped = "".join(
            f"<li>{html.escape(s.value)} ({s.rows} rows): {html.escape(s.reason)}</li>" for s in context.skipped
        )
        parts.append(f"<p>Values skipped (too few rows to cross-validate within):</p><ul>{skipped}</ul>")
    return "".join(parts)
