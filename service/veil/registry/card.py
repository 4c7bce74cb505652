"""The version card: everything an auditor or the service needs to know about one stored eraser, as JSON.

A card records the method and parameters, the shape of the map, the fitting
data's fingerprint and split, the full held-out audit, a summary of the
reference statistics (the arrays are in ``reference.npz``), the alert
thresholds, library versions, and who made it when.
"""

from __future__ import annotations

import dataclasses
import math
import platform
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from importlib import metadata
from typing import Any

from veil.audit.context_report import ContextAudit
from veil.audit.group_report import NO_GROUP_FOLDS
from veil.audit.points import Sweep, value_text
from veil.audit.report import PROBE_LABELS, AuditReport, ProbeScore, RegressionScore
from veil.audit.rows_curve import rows_needed_headline
from veil.checks.reference import LEADING_COMPONENTS, REFERENCE_FILE, ReferenceStatistics
from veil.checks.thresholds import AlertThresholds, AuditThresholds
from veil.checks.verdict import ThreatStatus, Verdict, judge_audit, worst
from veil.maps.artifact import MapArtifact
from veil.maps.context import ContextMoments
from veil.samples.chunks import Sample
from veil.samples.embedding_model import EmbeddingModel, fitted_model
from veil.samples.labels import dropped_note

CARD_FORMAT = 1


_LIBRARIES = ("veil", "numpy", "scipy", "scikit-learn")


def json_safe(value: Any) -> Any:
    """JSON-safe: NumPy scalars to Python, NaN/inf to None (strict JSON has neither), recursively."""
    if hasattr(value, "item") and not isinstance(value, (list, dict, str)):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {str(k): json_safe(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [json_safe(v) for v in value]
    return value


def software_versions() -> dict[str, str]:
    versions = {"python": platform.python_version()}
    for library in _LIBRARIES:
        try:
            versions[library] = metadata.version(library)
        except metadata.PackageNotFoundError:
            versions[library] = "unknown"
    return versions


# What a card says of a map kind whose guarantees differ from the linear methods'.
KIND_CAUTIONS = {
    "class-transport": (
        "this map reads the attribute in order to remove it: a stored linear classifier infers each row's class "
        "and the row is moved by that class's map; it is not affine, so its figures are measured on the "
        "held-out rows, not guaranteed, and where the classifier errs a row is moved by another class's map"
    ),
    "context-transport": (
        "this map reads the attribute and the context in order to remove the attribute within each context value: "
        "stored linear classifiers infer each row's context value, then its class, and the row is moved by that "
        "value's class map; it is not affine, so its figures are measured on the held-out rows, not guaranteed, "
        "and where a classifier errs a row is moved by another value's or class's map"
    ),
}


def build_card(
    *,
    name: str,
    artifact: MapArtifact,
    sample: Sample,
    fit_rows: int,
    split_seed: int,
    holdout: float,
    audit: AuditReport,
    reference: ReferenceStatistics,
    thresholds: AlertThresholds,
    user: str,
    notes: list[str],
    operating_points: dict[str, Any] | None = None,
    audit_thresholds: AuditThresholds | None = None,
    attribute_audits: Sequence[tuple[str, AuditReport]] = (),
    request: Mapping[str, Any] | None = None,
    embedding_model: EmbeddingModel | None = None,
    claims: tuple[str, ...] = ("linear",),
) -> dict[str, Any]:
    """The card of a freshly fitted version (a JSON-safe dict).

    ``request`` is the fit's description as asked for (:meth:`veil.fitting.request.FitRequest.to_dict`).
    ``embedding_model`` is the model the request names; the card records it, or else the one the sample file
    states (see :func:`embedding_model_record`).
    ``claims`` are the threats the version claims to guard (:data:`veil.checks.verdict.THREATS`): its verdict's
    headline judges them, and every later audit of it.

    For several attributes, ``attribute_audits`` holds each one's audit (``audit`` is the first categorical
    one's, which heads the card); the card then lists them under ``attributes`` (see :func:`attributes_record`).
    """
    classes = [] if artifact.classes is None else [str(c) for c in artifact.classes]
    if reference.attributes:
        classes = [str(c) for c in reference.attributes[0].classes]
    if sample.dropped_rows:
        notes = [*notes, dropped_note(sample.dropped_rows, sample.labelled_rows + sample.dropped_rows)]
    if artifact.kind in KIND_CAUTIONS:
        notes = [KIND_CAUTIONS[artifact.kind], *notes]
    card: dict[str, Any] = {
        "card_format": CARD_FORMAT,
        "name": name,
        "method": artifact.method,
        "params": dict(artifact.params),
        "normalize": artifact.normalize,
        "map_kind": artifact.kind,
        **artifact.map.describe(),
        "dtype": str(sample.dtype),
        "embedding_model": embedding_model_record(embedding_model, sample.embedding_model, artifact.map.dim),
        "attribute": {"key": sample.attribute_key, "classes": classes, "priors": reference.class_priors.tolist()},
        "task": None if sample.task_key is None else {"key": sample.task_key},
        "data": {
            "fingerprint_sha256": sample.fingerprint,
            "files": {path.rsplit("/", 1)[-1]: digest for path, digest in sample.files.items()},
            "rows": sample.labelled_rows,
            "missing_labels_dropped": sample.dropped_rows,
            "fit_rows": fit_rows,
            "heldout_rows": audit.n_heldout,
        },
        "split": {"kind": "row-index hash", "seed": split_seed, "holdout": holdout},
        "audit": audit.to_dict(),
        "reference": {
            "file": REFERENCE_FILE,
            "erased_variance_share": reference.erased_variance_share,
            "leading_components": min(LEADING_COMPONENTS, artifact.map.dim),
            "pre_erasure_probe": "logistic regression on standardised raw embeddings, fitted on the fit rows",
        },
        "thresholds": thresholds.to_dict(),
        "claims": list(claims),
        "verdict": verdict_record(audit, audit_thresholds or AuditThresholds(), claims),
        "software": software_versions(),
        "created_at": datetime.now(UTC).isoformat(timespec="seconds"),
        "created_by": user,
        "notes": notes,
    }
    if request is not None:
        card["request"] = dict(request)
    if artifact.pins is not None:
        card["pinned_coordinates"] = artifact.pins.coordinates.tolist()
    if artifact.moments.given is not None:
        card["given"] = given_record(artifact)
    if operating_points is not None:
        card["operating_points"] = operating_points
    if attribute_audits:
        entries = attributes_record(artifact, attribute_audits, audit_thresholds or AuditThresholds(), claims)
        card["attributes"] = entries
        card["verdict"] = worst_verdict(card["verdict"], entries)
    return dict(json_safe(card))


def embedding_model_record(
    requested: EmbeddingModel | None, in_sample: EmbeddingModel | None, dim: int
) -> dict[str, Any] | None:
    """The model a version was fitted on: name, version (None if not stated), dimension and who named it.

    None when neither the request nor the sample file names one: the version then accepts any caller's model.
    """
    fitted = fitted_model(requested, in_sample)
    if fitted is None:
        return None
    model, stated_by = fitted
    return {"name": model.name, "version": model.version, "dim": dim, "stated_by": stated_by}


def card_model(card: Mapping[str, Any]) -> EmbeddingModel | None:
    """The embedding model a card records; None for a version fitted without one or stored before cards had one."""
    record = card.get("embedding_model")
    return None if record is None else EmbeddingModel(record["name"], record.get("version"))


def embedding_model_text(card: Mapping[str, Any]) -> str:
    """The card's embedding model in a line: what it is and whose vectors the service takes."""
    record = card.get("embedding_model")
    if record is not None:
        model = EmbeddingModel(record["name"], record.get("version"))
        source = ", named by the sample file" if record.get("stated_by") == "sample file" else ""
        versions = "" if model.version is not None else " (no model version recorded: any version of it is accepted)"
        return (
            f"{model.text}, dim {record['dim']}{source}; a caller stating another model (X-Veil-Embedding-Model) "
            f"is refused{versions}"
        )
    if "embedding_model" in card:
        why = "the fit named none (veil fit --embedding-model NAME@VERSION)"
    else:
        why = "stored before versions recorded their model"
    return f"not recorded: {why}; any caller's model is accepted, only the dimension ({card['dim']}) is checked"


def given_record(artifact: MapArtifact) -> dict[str, Any]:
    """The contexts a version guards its attributes within: each column with its values and their fitting rows
    (and the values pooled into one group, if any), and whether the population as a whole is guarded too."""
    given = artifact.moments.given
    assert given is not None
    return {
        "columns": [_column_record(column, given.of_column(column)[0]) for column in given.columns],
        "guard_population": _guards_population(artifact),
    }


def _column_record(column: str, moments: ContextMoments) -> dict[str, Any]:
    counts = moments.counts.tolist()
    record: dict[str, Any] = {"column": column, "values": [str(value) for value in moments.values]}
    if not moments.pooled.size:
        return {**record, "rows": counts}
    pooled = {"values": [str(value) for value in moments.pooled], "rows": counts[-1]}
    return {**record, "rows": counts[:-1], "pooled": pooled}


def given_columns(record: Mapping[str, Any]) -> list[dict[str, Any]]:
    """The columns of a card's ``given`` entry, each ``{column, values, rows[, pooled]}``.

    Cards written when a version had one context hold that column's entry
    itself (``column``, ``values``, ``rows``): read as a list of one.
    """
    if "columns" in record:
        return [dict(entry) for entry in record["columns"]]
    return [{"column": record["column"], "values": record["values"], "rows": record["rows"]}]


def _guards_population(artifact: MapArtifact) -> bool:
    # Transport within a context moves the classes within each value only; LEACE after it guards the population.
    if artifact.kind == "context-transport":
        return bool(artifact.params.get("then_leace", False))
    return bool(artifact.params.get("guard_population", True))


def given_text(record: Mapping[str, Any]) -> str:
    """One line on the contexts a card records."""
    population = "the population as a whole too" if record["guard_population"] else "not the population as a whole"
    columns = given_columns(record)
    parts = []
    for entry in columns:
        pooled = entry.get("pooled")
        extra = "" if pooled is None else f" (and {len(pooled['values'])} small ones pooled into one group)"
        parts.append(f"each of the {len(entry['values'])} values of {entry['column']!r}{extra}")
    # Every column covers the same fitting rows.
    rows = sum(columns[0]["rows"]) + int(columns[0].get("pooled", {}).get("rows", 0))
    each = ", each column on its own" if len(columns) > 1 else ""
    return f"within {' and within '.join(parts)}{each} ({rows} fitting rows); {population}"


def attributes_record(
    artifact: MapArtifact,
    audits: Sequence[tuple[str, AuditReport]],
    thresholds: AuditThresholds,
    claims: tuple[str, ...] | None,
) -> list[dict[str, Any]]:
    """Each attribute of a version of several: its kind, classes and shares, fitting rows, audit and verdict."""
    kinds = {block.name: block.kind for block in artifact.moments.blocks}
    entries = []
    for name, report in audits:
        state = artifact.moments.block(name)
        entries.append(
            {
                "name": name,
                "kind": kinds[name],
                "classes": [] if state.labels is None else [str(c) for c in state.labels],
                "priors": None if state.labels is None else state.class_priors.tolist(),
                "fit_rows": int(state.count),
                "audit": report.to_dict(),
                "verdict": verdict_record(report, thresholds, claims),
            }
        )
    return entries


def worst_verdict(headline: dict[str, Any], attributes: list[dict[str, Any]]) -> dict[str, Any]:
    """The card's verdict over several attributes: the worst status any reaches, with every reason named.

    Each threat, too, is at the worst status it reaches for any attribute, measured where any attribute measured it.
    """
    status = worst(entry["verdict"]["status"] for entry in attributes)
    reasons = [f"{entry['name']}: {reason}" for entry in attributes for reason in entry["verdict"].get("reasons", [])]
    merged = {**headline, "status": status, "reasons": reasons}
    if "threats" in headline:
        verdicts = [(entry["name"], Verdict.from_dict(entry["verdict"])) for entry in attributes]
        merged["threats"] = {
            threat: dataclasses.asdict(
                ThreatStatus(
                    worst(verdict.threats[threat].status for _, verdict in verdicts),
                    [f"{name}: {reason}" for name, verdict in verdicts for reason in verdict.threats[threat].reasons],
                    measured=any(verdict.threats[threat].measured for _, verdict in verdicts),
                )
            )
            for threat in headline["threats"]
        }
    return merged


def attributes_text(card: Mapping[str, Any]) -> list[str]:
    """One line per attribute of a version of several: the linear probe before and after, and the strongest probe.

    Empty for a version of one attribute (its figures are the card's headline).
    """
    lines = []
    for entry in card.get("attributes", []):
        report = AuditReport.from_dict(entry["audit"])
        before, after = report.leakage.linear_before, report.leakage.linear_after
        head = f"  {entry['name']} ({entry['kind']}, {entry['fit_rows']} fitting rows): "
        if isinstance(before, RegressionScore) and isinstance(after, RegressionScore):
            lines.append(head + f"ridge R² {before.r2:.3f} → {after.r2:.3f} (0: no linear trace)")
            continue
        if isinstance(before, ProbeScore) and isinstance(after, ProbeScore):
            text = (
                f"linear probe {before.accuracy:.3f} → {after.accuracy:.3f} [{after.interval_low:.3f}, "
                f"{after.interval_high:.3f}] (majority {after.majority:.3f})"
            )
            strongest = report.strongest_after()
            lines.append(head + text + ("" if strongest is None else f"; strongest after: {strongest}"))
        lines.append(f"    verdict: {Verdict.from_dict(entry['verdict']).sentence()}")
    return ["attributes (each audited on the held-out rows):", *lines] if lines else []


def card_audit(card: Mapping[str, Any]) -> AuditReport:
    audit = AuditReport.from_dict(card["audit"])
    # Cards written before the audit named its classes hold them in the attribute (sorted, as the audit's codes).
    if audit.classes is None and card["attribute"]["classes"]:
        audit = dataclasses.replace(audit, classes=tuple(card["attribute"]["classes"]))
    return audit


def verdict_record(audit: AuditReport, thresholds: AuditThresholds, claims: tuple[str, ...] | None) -> dict[str, Any]:
    """An audit's verdict with the thresholds it was judged by, as a card or an audit record stores it.

    ``claims``: the threats the version claims (None: judged on every figure, for a card without claims).
    """
    return {"thresholds": thresholds.to_dict(), **judge_audit(audit, thresholds, claims).to_dict()}


def card_claims(card: Mapping[str, Any]) -> tuple[str, ...] | None:
    """The threats a card's version claims to guard (None: a card written before versions claimed threats)."""
    claims = card.get("claims")
    return None if claims is None else tuple(claims)


def card_thresholds(card: Mapping[str, Any]) -> AuditThresholds:
    """The audit thresholds a card records (the defaults for a card written before it recorded any)."""
    recorded = card.get("verdict")
    return AuditThresholds() if recorded is None else AuditThresholds.from_dict(recorded["thresholds"])


def card_verdict(card: Mapping[str, Any]) -> Verdict:
    """The verdict of a card's own audit: as recorded, or judged now by the defaults for an older card."""
    recorded = card.get("verdict")
    if recorded is None:
        return judge_audit(card_audit(card), AuditThresholds())
    return Verdict.from_dict(recorded)


def promotion_verdict(card: Mapping[str, Any]) -> Verdict | None:
    """The verdict a promotion of this version is judged by: the card's own (None: a card with no audit at all)."""
    return None if "verdict" not in card and "audit" not in card else card_verdict(card)


def verdict_text(card: Mapping[str, Any]) -> list[str]:
    """The card's verdict as lines: the headline, then each threat, or the rule it was judged by."""
    verdict = card_verdict(card)
    headline = f"verdict at fitting time: {verdict.sentence()}" + ("" if "verdict" in card else _DEFAULTS_NOTE)
    return [headline, *(f"  {line}" for line in verdict.threat_lines())]


def protocol_text(audit: AuditReport) -> str:
    """How the card's probes were trained and tested."""
    if audit.protocol is None:
        return "not recorded (the card was written before the audit recorded its protocol)"
    return audit.protocol.describe(audit.n_heldout)


def _dropped(card: dict[str, Any]) -> str:
    # Cards written before rows could be dropped for a missing label have no count.
    dropped = card["data"].get("missing_labels_dropped", 0)
    return f" ({dropped} dropped for a missing label)" if dropped else ""


def method_text(card: dict[str, Any]) -> str:
    """The method and the shape of its map, in a few words."""
    # Cards written before map kinds existed hold affine low-rank maps.
    if card.get("map_kind", "affine-lowrank") == "affine-lowrank":
        return f"{card['method']} (rank {card['rank']}, dim {card['dim']})"
    return (
        f"{card['method']} ({card['map_kind']} map, not affine: {card['class_maps']} class maps of "
        f"{card['rank']} directions, then rank {card['rank_after']}, dim {card['dim']})"
    )


def pins_text(card: Mapping[str, Any]) -> str:
    """What the version writes into coordinates without spread; for one stored before pinning, that it carries them."""
    if "pinned_coordinates" not in card:
        return (
            "nothing: stored before pinning, this version passes coordinates without spread through, where a model "
            "that standardises its features can read the attribute at rounding level; refit to pin them"
        )
    coordinates = card["pinned_coordinates"]
    if not coordinates:
        return "no coordinate lacked spread in the fitting data"
    return f"coordinate(s) {', '.join(map(str, coordinates))} hold the fitting mean (no spread in the fitting data)"


def _headline(card: dict[str, Any]) -> list[tuple[str, str]]:
    """The figures people compare between versions, as (label, text) pairs."""
    audit = card_audit(card)
    lk, ut = audit.leakage, audit.utility
    rows = [
        ("method", method_text(card)),
        ("created", f"{card['created_at']} by {card['created_by']}"),
        ("data", f"{card['data']['rows']} rows{_dropped(card)}, sha256 {card['data']['fingerprint_sha256'][:16]}…"),
        ("split", f"{card['split']['holdout']:.0%} held out, seed {card['split']['seed']}"),
        ("probes", protocol_text(audit)),
    ]
    if isinstance(lk.linear_after, ProbeScore) and isinstance(lk.linear_before, ProbeScore):
        rows.append(("majority baseline", f"{lk.linear_after.majority:.3f}"))
        rows.append(("linear probe before", f"{lk.linear_before.accuracy:.3f}"))
        rows.append(
            (
                "linear probe after",
                f"{lk.linear_after.accuracy:.3f} [{lk.linear_after.interval_low:.3f}, "
                f"{lk.linear_after.interval_high:.3f}]",
            )
        )
    elif isinstance(lk.linear_after, RegressionScore) and isinstance(lk.linear_before, RegressionScore):
        rows.append(("ridge R² before / after", f"{lk.linear_before.r2:.3f} / {lk.linear_after.r2:.3f}"))
    for name, before, after in lk.probes():
        if name != "linear" and isinstance(before, ProbeScore) and isinstance(after, ProbeScore):
            rows.append((f"{PROBE_LABELS[name]} before / after", f"{before.accuracy:.3f} / {after.accuracy:.3f}"))
    strongest = audit.strongest_after()
    if strongest is not None:
        rows.append(("strongest probe after", strongest))
    rows += [
        ("relative distortion", f"{ut.relative_distortion:.4f}"),
        ("mean cosine(x, x')", f"{ut.mean_cosine:.4f}"),
        ("10-NN overlap", f"{ut.knn_overlap_at_10:.3f}"),
    ]
    if ut.task_accuracy_after is not None and ut.task_accuracy_before is not None:
        rows.append(("task accuracy before / after", f"{ut.task_accuracy_before:.3f} / {ut.task_accuracy_after:.3f}"))
    if audit.retrieval is not None:
        rt = audit.retrieval
        rows.append(
            (
                "10-NN sharing attribute",
                f"{rt.attribute_share_before:.3f} → {rt.attribute_share_after:.3f} (base {rt.attribute_base_rate:.3f})",
            )
        )
    if audit.context is not None:
        rows.append(("within the context", context_headline(audit.context)))
    rows.append(("across groups", NO_GROUP_FOLDS if audit.groups is None else audit.groups.headline()))
    if isinstance(lk.linear_after, ProbeScore):
        rows.append(("rows needed", rows_needed_headline(audit.rows_needed)))
    if audit.ranking is not None:
        rk = audit.ranking
        rows.append((f"NDKL@{rk.k}", f"{rk.ndkl_before:.4f} → {rk.ndkl_after:.4f} (0: every prefix at the base rates)"))
        rows.append((f"MaxSkew@{rk.k}", f"{rk.max_skew_before:.3f} → {rk.max_skew_after:.3f}"))
    return rows


def context_headline(context: ContextAudit) -> str:
    """The audit within a context in one line: the linear probe and the strongest against the floor, the worst value."""
    if not context.after:
        return f"no value of {context.column or 'the context'} has the rows to cross-validate within"
    linear = context.after["linear"]
    text = (
        f"linear probe {context.before['linear'].accuracy:.3f} → {linear.accuracy:.3f}, floor {context.floor:.3f}, "
        f"beyond the context {linear.excess:.3f}"
    )
    strongest = context.strongest()
    if strongest is not None and strongest != "linear":
        text += f"; {PROBE_LABELS[strongest]} beyond it {context.after[strongest].excess:.3f}"
    return text + ("" if context.worst is None else f"; worst value {context.worst!r}")


def operating_points_text(record: dict[str, Any]) -> list[str]:
    """The sweep a card records: its points, its targets and the point chosen (lines of text)."""
    sweep = Sweep.from_dict(record)
    lines = [f"operating points: {sweep.method} over {sweep.parameter}, measured on the held-out rows"]
    lines += sweep.format_table().splitlines()
    if sweep.targets:
        lines.append("targets: " + "; ".join(sweep.targets))
        lines.append(f"chosen: {sweep.parameter}={value_text(sweep.values[sweep.chosen or 0])}, {record['rule']}")
        lines.append(f"note: {record['selection']}")
    return lines


_DEFAULTS_NOTE = " (judged by the default thresholds: the card was written before it recorded a verdict)"


def format_card(version_id: str, card: dict[str, Any]) -> str:
    """The card for a terminal: headline figures, the full audit table, thresholds and provenance."""
    lines = [f"{card['name']} {version_id}", *verdict_text(card)]
    width = max(len(label) for label, _ in _headline(card))
    lines += [f"  {label:{width}}  {text}" for label, text in _headline(card)]
    attribute = card["attribute"]
    lines.append(f"  {'attribute':{width}}  {attribute['key']}: {', '.join(attribute['classes'])}")
    if card.get("given"):
        lines.append(f"  {'context':{width}}  guarded {given_text(card['given'])}")
    if card.get("task"):
        lines.append(f"  {'task':{width}}  {card['task']['key']}")
    lines.append(f"  {'embedding model':{width}}  {embedding_model_text(card)}")
    lines.append(f"  {'pinned':{width}}  {pins_text(card)}")
    lines.append(f"  {'parameters':{width}}  " + ", ".join(f"{k}={v}" for k, v in sorted(card["params"].items())))
    lines += ["", card_audit(card).format_table()]
    if "attributes" in card:
        lines += ["", *attributes_text(card)]
    if "operating_points" in card:
        lines += ["", *operating_points_text(card["operating_points"])]
    lines += ["", "audit thresholds (warn / alert):"]
    audit_bands = card_thresholds(card).to_dict()
    lines += [f"  {figure}: {band['warn']} / {band['alert']}" for figure, band in audit_bands.items()]
    lines += [live_levels_text(card)]
    if card.get("live_levels", {}).get("rule") == "calibrated":
        lines += ["fixed live-check bands (warn / alert), for the figures without draws:"]
    else:
        lines += ["live-check thresholds (warn / alert):"]
    lines += [f"  {figure}: {band['warn']} / {band['alert']}" for figure, band in card["thresholds"].items()]
    lines.append("software: " + ", ".join(f"{k} {v}" for k, v in card["software"].items()))
    lines += [f"note: {note}" for note in card.get("notes", [])]
    return "\n".join(lines)


def live_levels_text(card: Mapping[str, Any]) -> str:
    """The rule the version's live checks are judged by, in one line (a card from before says fixed levels)."""
    levels = card.get("live_levels", {})
    if levels.get("rule") != "calibrated":
        return "live checks: fixed levels (no calibration stored with this version)"
    sizes = ", ".join(str(size) for size in levels["sizes"])
    return (
        f"live checks: calibrated levels: p-values against no-drift draws of the {levels['held_out_rows']} held-out "
        f"rows at {sizes} rows, {levels['correction'].title()}-adjusted; warn at {levels['warn']:g}, alert at "
        f"{levels['alert']:g}"
    )


def fresh_audits_text(records: list[tuple[int, dict[str, Any]]]) -> list[str]:
    """A version's fresh audits (``(number, body)`` of its audit records, oldest first) as lines of text."""
    if not records:
        return ["fresh audits: none (veil audit NAME VERSION --data FRESH records one)"]
    lines = ["fresh audits:"]
    for number, body in records:
        data = body["data"]
        verdict = Verdict.from_dict(body["verdict"])
        lines.append(
            f"  {number}. {body['audited_at']} by {body['audited_by']}: {data['attribute']} on {data['audited_rows']} "
            f"rows of {', '.join(data['files']) or 'a sample'} (sha256 {data['fingerprint_sha256'][:12]})"
            + ("" if "group" not in data else f", group folds by {data['group']!r}")
            + f", {verdict.sentence()}"
        )
    return lines


def compare_cards(left_id: str, left: dict[str, Any], right_id: str, right: dict[str, Any]) -> str:
    """Two versions' headline figures side by side."""
    left_rows, right_rows = dict(_headline(left)), dict(_headline(right))
    labels = list(dict.fromkeys([*left_rows, *right_rows]))
    width = max(len(label) for label in labels)
    column = max(len(left_id), *(len(v) for v in left_rows.values()))
    lines = [f"{'':{width}}  {left_id:{column}}  {right_id}"]
    lines += [
        f"{label:{width}}  {left_rows.get(label, '-'):{column}}  {right_rows.get(label, '-')}" for label in labels
    ]
    return "\n".join(lines)
