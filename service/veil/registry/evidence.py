"""One JSON document per version for auditors' own tooling: the card, its verdict, fresh audits and live checks.

``veil show NAME VERSION --json`` prints it; ``docs/version-evidence.schema.json``
is its JSON Schema.  The card's fields stay at the top level (as the card
file holds them), and the document adds the version id, the verdict of the
fitting-time audit (judged now by the default thresholds, and marked so,
for a card written before verdicts), and the version's records.
"""

from __future__ import annotations

from typing import Any

from veil.registry.card import card_thresholds, card_verdict
from veil.registry.records import Record
from veil.registry.registry import Registry

EVIDENCE_FORMAT = 1
FRESH_AUDITS = "audits"
LIVE_CHECKS = "checks"


def _listed(records: list[Record]) -> list[dict[str, Any]]:
    return [{"number": record.number, "key": record.key, **record.body} for record in records]


def version_evidence(registry: Registry, name: str, reference: str) -> dict[str, Any]:
    """The evidence document of version ``reference`` of ``name`` (the version and every record verified)."""
    stored = registry.read_version(name, reference)
    card = dict(stored.card)
    verdict = card.get("verdict")
    if verdict is None:
        verdict = {**card_verdict(card).to_dict(), "thresholds": card_thresholds(card).to_dict()}
        verdict["judged_by_defaults"] = True
    return {
        **card,
        "evidence_format": EVIDENCE_FORMAT,
        "version": stored.id,
        "verdict": verdict,
        "fresh_audits": _listed(registry.records(name, stored.id, FRESH_AUDITS)),
        "live_checks": _listed(registry.records(name, stored.id, LIVE_CHECKS)),
    }
