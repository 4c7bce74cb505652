"""Audit a stored version on a fresh labelled sample and append the result to the registry (``veil audit``).

The version is read (and verified) from the registry, applied exactly as the
service applies it, and audited by the same probes as at fitting time, all
trained and tested within the fresh sample by k-fold cross-validation.  The
result, with its verdict under the thresholds the version's card records and
what data was audited, becomes an immutable record beside the version
(:mod:`veil.registry.records`); the version itself is not touched.

The record's key is derived from the version, the audit's settings and the
rows and labels exactly as audited, so auditing the same data the same way
again returns the record already stored rather than a second copy, while the
same file audited for another attribute is another audit.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from typing import Any

import numpy as np
from numpy.typing import NDArray

from veil.audit import audit_artifact
from veil.audit.groups import group_fold_problem
from veil.audit.independence_run import IndependenceSettings, settings_for
from veil.audit.report import AuditReport
from veil.checks.verdict import Verdict
from veil.defaults import AUDIT_ROWS, STREAM_CHUNK_ROWS
from veil.errors import DataError
from veil.fitting.store import audit_each_attribute, audit_folds, within_context
from veil.maps.artifact import MapArtifact
from veil.progress import phase
from veil.registry import Registry, current_user
from veil.registry.card import card_claims, card_thresholds, json_safe, verdict_record, worst_verdict
from veil.registry.records import Record
from veil.samples.attributes import attribute_columns, is_table, present_rows
from veil.samples.chunks import Sample
from veil.samples.groups import group_key
from veil.samples.splitting import held_out_rows

AUDITS = "audits"


@dataclass(frozen=True)
class FreshAudit:
    """A fresh audit as stored: its record, the audit and its verdict, and whether it was stored before."""

    record: Record
    audit: AuditReport
    verdict: Verdict
    already_stored: bool


def _rows(
    sample: Sample, *, max_rows: int | None, seed: int, chunk_rows: int, groups: list[NDArray[Any]] | None = None
) -> tuple[NDArray[np.floating], NDArray[Any], NDArray[Any] | None, NDArray[Any] | None]:
    """The sample's rows, or a hash-drawn share of about ``max_rows`` of them, with their task and context labels.

    Each kept row's group is appended to ``groups`` part by part, when the sample has a group column.
    """
    share = 1.0 if max_rows is None else min(1.0, max_rows / max(sample.labelled_rows, 1))
    xs, zs, tasks, contexts = [], [], [], []
    for partition in sample.partitions(chunk_rows):
        chunk = partition.load()
        kept = np.ones(len(chunk), bool) if share >= 1.0 else held_out_rows(chunk.index, fraction=share, seed=seed)
        xs.append(chunk.embeddings[kept])
        zs.append(chunk.attribute[kept])
        if chunk.task is not None:
            tasks.append(chunk.task[kept])
        audited = next(iter(chunk.contexts.values()), None)
        if audited is not None:
            contexts.append(audited[kept])
        if groups is not None and chunk.group is not None:
            groups.append(chunk.group[kept])
    if not xs or sum(len(z) for z in zs) == 0:
        raise DataError("the fresh sample has no labelled rows to audit")
    task, context = (np.concatenate(parts) if parts else None for parts in (tasks, contexts))
    return np.concatenate(xs), np.concatenate(zs), task, context


def audit_key(version_id: str, settings: dict[str, Any], *arrays: NDArray[Any] | None) -> str:
    """The record key of an audit: the version, the settings, and the rows and labels exactly as audited.

    The arrays, not the file names: the same file audited for another
    attribute, task, class merge or embeddings column is another audit.
    """
    digest = hashlib.sha256(json.dumps({"version": version_id, **settings}, sort_keys=True).encode())
    for array in arrays:
        if array is None:
            digest.update(b"none")
            continue
        contiguous = np.ascontiguousarray(array if array.dtype != object else array.astype(str))
        digest.update(f"{contiguous.dtype.descr}{contiguous.shape}".encode())
        digest.update(contiguous.tobytes())
    return digest.hexdigest()[:16]


def audit_stored_version(
    registry: Registry,
    name: str,
    reference: str,
    sample: Sample,
    *,
    nonlinear: bool = True,
    seed: int = 0,
    max_rows: int | None = None,
    chunk_rows: int = STREAM_CHUNK_ROWS,
    notes: Sequence[str] = (),
    thorough: bool = False,
) -> FreshAudit:
    """Audit version ``reference`` of ``name`` on ``sample`` and append the result to the version's audits.

    Parameters
    ----------
    registry : Registry
    name, reference : str
        The eraser and its version (id, sequence number or alias).
    sample : Sample
        Fresh labelled rows: embeddings of the version's dimension, the attribute, optionally the task and a
        context column (``sample.context_key``): every probe is then also measured within each of its values.
    nonlinear : bool, default=True
        Run every probe (otherwise the linear one only).
    seed : int, default=0
        Seeds the folds, the probes and the row draw.
    max_rows : int, optional
        Audit a hash-drawn share of about this many rows.  Default: every row of a sample in memory, about
        :data:`veil.defaults.AUDIT_ROWS` of a streamed one (whose rows may not fit in memory).
    notes : sequence of str
        Notes for the record (how the sample was read).
    thorough : bool, default=False
        The independence tests' thorough setting (see :mod:`veil.audit.independence_run`).

    Raises
    ------
    DataError
        The sample is the version's own fitting sample, has another dimension, or cannot be audited.
    """
    if max_rows is not None and max_rows < 2:
        raise DataError("an audit needs at least 2 rows")
    if max_rows is None and len(sample.partitions(chunk_rows)) > 1:
        max_rows = AUDIT_ROWS
    stored = registry.read_version(name, reference)
    card = stored.card
    if sample.fingerprint == card["data"]["fingerprint_sha256"]:
        raise DataError(
            f"this is the sample {name} {stored.id} was fitted on (its held-out rows are audited in its card); "
            "audit a sample drawn independently of it"
        )
    if sample.dim != card["dim"]:
        raise DataError(f"the sample has {sample.dim} dimensions and {name} {stored.id} takes {card['dim']}")
    _check_guarded(sample.attribute_key, card, f"{name} {stored.id}")
    settings: dict[str, Any] = {"nonlinear": nonlinear, "seed": seed, "max_rows": max_rows}
    column = group_key(sample)
    if column is not None:
        # Only with a group: the key of an audit without one is what it was.
        settings["group"] = column
    if thorough:
        # Only when asked: the key of a fast audit stays what it was before the setting existed.
        settings["thorough"] = True
    independence = settings_for(thorough)
    thresholds = card_thresholds(card)
    group_parts: list[NDArray[Any]] = []
    with phase("reading the fresh sample"):
        x, z, task, given = _rows(sample, max_rows=max_rows, seed=seed, chunk_rows=chunk_rows, groups=group_parts)
    group = np.concatenate(group_parts) if group_parts else None
    context = None if given is None else (sample.context_keys[0], given)
    # Reading is cheap beside the probes: the key names the rows and labels themselves (the context too, only
    # when there is one, so that the key of an audit without one is what it was).
    key = audit_key(
        stored.id, settings, x, z, task, *(() if given is None else (given,)), *(() if group is None else (group,))
    )
    earlier = registry.record(name, stored.id, AUDITS, key)
    if earlier is not None:
        report = AuditReport.from_dict(earlier.body["audit"])
        return FreshAudit(earlier, report, Verdict.from_dict(earlier.body["verdict"]), already_stored=True)
    attributes: list[tuple[str, AuditReport]] = []
    kept_notes = list(notes)
    if x.shape[0] < sample.labelled_rows:
        kept_notes.append(f"audited on a hash-drawn sample of {x.shape[0]} of the {sample.labelled_rows} rows")
    if is_table(z):
        if group is not None:
            raise DataError("group folds (--group) read one categorical attribute; audit several without --group")
        attributes = _audit_each(
            stored.artifact, x, z, task, context, nonlinear=nonlinear, seed=seed, independence=independence
        )
        report = attributes[0][1]
    else:
        labels, codes = np.unique(z, return_inverse=True)
        if labels.size < 2:
            raise DataError(f"the fresh sample holds one class of {sample.attribute_key!r}; an audit needs two or more")
        problem = None if group is None else group_fold_problem(z, group)
        if problem is not None:
            raise DataError(f"--group {column}: {problem}")
        report = audit_artifact(
            stored.artifact,
            x,
            z,
            task=task,
            **within_context(context, None, z),
            folds=audit_folds(codes.astype(np.intp)),
            nonlinear=nonlinear,
            random_state=seed,
            **_grouped(group, column),
            independence=independence,
        )
        fitted = {str(label) for label in card["attribute"]["classes"]}
        unseen = sorted({str(label) for label in labels} - fitted)
        if unseen:
            kept_notes.append(f"classes the version was not fitted on: {', '.join(unseen)}")
    # Judged on the threats the version claims, as its own audit was (every figure for a card without claims).
    claims = card_claims(card)
    judged = verdict_record(report, thresholds, claims)
    entries = [
        {"name": attribute, "audit": one.to_dict(), "verdict": verdict_record(one, thresholds, claims)}
        for attribute, one in attributes
    ]
    if entries:
        judged = worst_verdict(judged, entries)
    body: dict[str, Any] = json_safe(
        {
            "audited_at": datetime.now(UTC).isoformat(timespec="seconds"),
            "audited_by": current_user(),
            "data": {
                "fingerprint_sha256": sample.fingerprint,
                "files": {path.rsplit("/", 1)[-1]: digest for path, digest in sample.files.items()},
                "rows": sample.labelled_rows,
                "audited_rows": int(x.shape[0]),
                "missing_labels_dropped": sample.dropped_rows,
                "attribute": sample.attribute_key,
                "task": sample.task_key,
                "context": sample.context_keys[0] if sample.context_keys else None,
                **({} if column is None else {"group": column}),
            },
            "settings": settings,
            "audit": report.to_dict(),
            "verdict": judged,
            "notes": kept_notes,
            **({"attributes": entries} if entries else {}),
        }
    )
    with phase("storing the audit"):
        record = registry.add_record(name, stored.id, AUDITS, body, key=key)
    return FreshAudit(record, report, Verdict.from_dict(judged), already_stored=False)


def _grouped(group: NDArray[Any] | None, column: str | None) -> dict[str, Any]:
    """The fresh audit's ``group`` and ``group_name`` (none without a group column)."""
    return {} if group is None else {"group": group, "group_name": column}


def _guarded_attributes(card: Mapping[str, Any]) -> list[str]:
    """The attributes a version guards, by name (each of several, or its one attribute)."""
    return [entry["name"] for entry in card.get("attributes", [])] or [card["attribute"]["key"]]


def _check_guarded(attribute_key: str, card: Mapping[str, Any], version: str) -> None:
    """Refuse a fresh sample whose attribute the version does not guard: its verdict would judge nothing it does."""
    guarded = _guarded_attributes(card)
    # A sample of several attributes names them joined by ", " (see veil.samples.sources.AttributeSpec.key).
    unguarded = [name for name in attribute_key.split(", ") if name not in guarded]
    if unguarded:
        raise DataError(
            f"{version} guards {', '.join(repr(g) for g in guarded)}, not {unguarded[0]!r}: audit it for an "
            "attribute it guards (--attribute), or fit a version for this one"
        )


def _audit_each(
    artifact: MapArtifact,
    x: NDArray[np.floating],
    z: NDArray[Any],
    task: NDArray[Any] | None,
    context: tuple[str, NDArray[Any]] | None,
    *,
    nonlinear: bool,
    seed: int,
    independence: IndependenceSettings,
) -> list[tuple[str, AuditReport]]:
    """Each attribute of a fresh sample of several audited on its own (the first categorical one first)."""
    for attribute, continuous, values in attribute_columns(z):
        if not continuous and np.unique(values[present_rows(z, attribute)]).size < 2:
            raise DataError(f"the fresh sample holds one class of {attribute!r}; an audit needs two or more")
    reports = audit_each_attribute(
        z,
        lambda rows, target, folds: audit_artifact(
            artifact,
            x[rows],
            target,
            task=None if task is None else task[rows],
            **within_context(context, rows, target),
            folds=folds,
            nonlinear=nonlinear,
            random_state=seed,
            independence=independence,
        ),
    )
    continuous_ones = {attribute for attribute, is_continuous, _ in attribute_columns(z) if is_continuous}
    return sorted(reports, key=lambda item: item[0] in continuous_ones)
