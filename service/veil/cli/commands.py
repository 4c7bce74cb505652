"""What each ``veil`` subcommand does: call the library, print the result.  Output goes to stdout, errors up."""

from __future__ import annotations

import argparse
import json
import os
import sys
from dataclasses import asdict
from pathlib import Path
from typing import Any

from veil.errors import DataError
from veil.registry import DEFAULT_ALIAS, HistoryEvent, Registry
from veil.registry.card import (
    attributes_text,
    card_verdict,
    compare_cards,
    embedding_model_text,
    format_card,
    fresh_audits_text,
    promotion_verdict,
    verdict_text,
)
from veil.registry.evidence import version_evidence

#: Exit status when a verdict reaches ``--fail-on`` (what was asked is done and stored all the same).
VERDICT_FAILED = 3

# The commands that fit, render or clean import their modules when they run: scikit-learn, matplotlib and pyarrow
# take a second to import, and `veil versions` or `veil show` need none of them.


def _print_table(header: list[str], rows: list[list[str]]) -> None:
    widths = [max(len(str(cell)) for cell in column) for column in zip(header, *rows, strict=True)]
    for row in [header, *rows]:
        print("  ".join(f"{cell:{width}}" for cell, width in zip(row, widths, strict=True)).rstrip())


def _sweep_values(text: str) -> list[int | None]:
    """``"8,16,all"`` as the values of a sweep (``all``: the method's own maximum)."""
    values: list[int | None] = []
    for item in text.split(","):
        item = item.strip().lower()
        if item == "all":
            values.append(None)
        elif item.isdigit():
            values.append(int(item))
        else:
            raise DataError(f"--sweep values are whole numbers or 'all', separated by commas; got {item!r}")
    return values


def _open_sample(args: argparse.Namespace, *, streamed: bool) -> Any:
    """The labelled sample ``--data`` and its label options name: read whole, or described for streaming."""
    from veil.samples.groups import columns_to_read, with_group
    from veil.samples.sources import load_labelled_sample
    from veil.samples.streaming import open_stream

    source = {
        "attribute": args.attribute,
        "task": args.task,
        "embeddings_key": args.embeddings,
        "labels": args.labels,
        "drop_missing": args.drop_missing,
        "continuous": args.continuous,
        "joint": args.joint,
        "merge_classes": args.merge_classes,
        "incomplete": args.incomplete_labels,
        # A group column is read as a context column is, then set apart as the sample's group.
        "given": columns_to_read(getattr(args, "given", None), getattr(args, "group", None)),
    }
    sample = open_stream(args.data, **source) if streamed else load_labelled_sample(args.data, **source)
    return with_group(sample, getattr(args, "group", None))


def _audit_thresholds(bands: list[tuple[str, tuple[float, float]]]) -> Any:
    from veil.checks.thresholds import AuditThresholds

    try:
        return AuditThresholds.from_dict({figure: {"warn": warn, "alert": alert} for figure, (warn, alert) in bands})
    except ValueError as error:
        raise DataError(f"--audit-threshold: {error}") from None


def _gate(status: str, fail_on: str | None) -> int:
    """The exit status for a CI job: :data:`VERDICT_FAILED` when ``status`` reaches ``--fail-on``, else 0."""
    from veil.checks.verdict import LEVELS

    if fail_on is not None and LEVELS.index(status) >= LEVELS.index(fail_on):
        print(f"the verdict is {status}, at or above --fail-on {fail_on}", file=sys.stderr)
        return VERDICT_FAILED
    return 0


def _fit_request(args: argparse.Namespace, *, streamed: bool) -> Any:
    """The :class:`~veil.fitting.request.FitRequest` ``veil fit``'s options describe.

    A sample read whole is one chunk, audited and fitted on all its rows: the reading options and the audit's
    row limit apply to a streamed sample.
    """
    from veil.fitting.methods import parse_parameters
    from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, ReadingSpec, StoreSpec

    method = MethodSpec(
        args.method,
        params=parse_parameters(args.method, args.option),
        holdout=args.holdout,
        seed=args.seed,
        normalize=args.normalize,
        sweep=args.sweep is not None,
        sweep_values=None if not args.sweep else tuple(_sweep_values(args.sweep)),
        targets=tuple(args.target),
        given=None if args.given is None else tuple(args.given),
        guard_population=not args.within_only,
        pool_small_values=args.pool_small_values,
    )
    if args.given is not None and args.continuous:
        # Refused before the sample is read: the within-value moments are those of categorical attributes.
        raise DataError(f"--given guards categorical attributes; {args.continuous[0]!r} is continuous")
    audit = AuditSpec(
        nonlinear=args.probes == "all",
        rows=args.audit_rows if streamed else None,
        thresholds=_audit_thresholds(args.audit_threshold),
        claims=None if args.claim is None else tuple(args.claim),
        group=args.group,
        rows_curve=args.rows_curve,
        live_draws=args.live_draws,
        thorough=args.thorough,
    )
    reading = ReadingSpec()
    if streamed:
        reading = ReadingSpec(
            chunk_rows=args.chunk_rows,
            fit_sample_rows=args.fit_sample_rows,
            engine=args.engine,
            scheduler=args.scheduler,
            workers=args.dask_workers,
        )
    store = StoreSpec(
        args.name, alias=args.alias, reason=args.reason, embedding_model=_embedding_model(args), force=args.force
    )
    return FitRequest(method, store, audit=audit, reading=reading)


def _embedding_model(args: argparse.Namespace) -> Any:
    """The model ``--embedding-model`` names (None without it), refused in one line if it does not read."""
    from veil.samples.embedding_model import EmbeddingModel

    if args.embedding_model is None:
        return None
    try:
        return EmbeddingModel.parse(args.embedding_model)
    except DataError as error:
        raise DataError(f"--embedding-model: {error}") from None


def fit(args: argparse.Namespace) -> int:
    from veil.audit.points import Sweep
    from veil.fitting.job import fit_version
    from veil.fitting.sweep import TargetsMissedError

    streamed = args.stream or args.engine == "dask" or Path(args.data).is_dir()
    request = _fit_request(args, streamed=streamed)
    registry = Registry(args.registry)
    registry.storage.list("")  # a registry that cannot take the version fails now, not after the fit
    try:
        outcome = fit_version(_open_sample(args, streamed=streamed), request, registry=registry)
    except TargetsMissedError as missed:
        # The points, so the targets can be set again with the figures in view; the error itself is one line.
        print(missed.sweep.format_table())
        raise
    if "operating_points" in outcome.card:
        print(Sweep.from_dict(outcome.card["operating_points"]).format_table())
    print(outcome.audit.format_table())
    for line in attributes_text(outcome.card):
        print(line)
    for line in verdict_text(outcome.card):
        print(line)
    print(f"embedding model: {embedding_model_text(outcome.card)}")
    for note in outcome.card["notes"]:
        if note not in outcome.audit.notes:
            print(f"note: {note}")
    if outcome.promotion is not None:
        forced = " (forced)" if outcome.promotion.forced else ""
        print(f"alias {outcome.promotion.alias!r} now points at {outcome.version_id}{forced}")
    print(outcome.version_id)
    if outcome.refused is not None:
        # The version is stored and its id printed: the refusal is of the alias move only.
        print(f"veil fit: stored {outcome.version_id}, but {outcome.refused}", file=sys.stderr)
        return 2
    return _gate(card_verdict(outcome.card).status, args.fail_on)


def versions(args: argparse.Namespace) -> int:
    registry = Registry(args.registry)
    summaries = registry.versions(args.name)
    on: dict[str, list[str]] = {}
    for state in registry.aliases(args.name).values():
        on.setdefault(state.version, []).append(state.alias)
    for alias, problem in sorted(registry.damaged_aliases(args.name).items()):
        remedy = "point it again with veil promote, or remove it with veil remove-alias"
        print(f"damaged alias {alias!r}: {problem}; {remedy}", file=sys.stderr)
    if args.json:
        print(json.dumps([{**asdict(s), "aliases": sorted(on.get(s.id, []))} for s in summaries], indent=2))
        return 0
    rows = [
        [s.id, s.created_at, s.created_by, s.method, str(s.rank), str(s.dim), ",".join(sorted(on.get(s.id, [])))]
        if s.problem is None
        else [s.id, "DAMAGED", "", "", "", "", ",".join(sorted(on.get(s.id, [])))]
        for s in summaries
    ]
    _print_table(["version", "created", "by", "method", "rank", "dim", "aliases"], rows)
    for summary in summaries:
        if summary.problem is not None:
            print(f"damaged: {summary.problem} (veil verify lists every problem)")
    return 0


def show(args: argparse.Namespace) -> int:
    registry = Registry(args.registry)
    if args.json:
        print(json.dumps(version_evidence(registry, args.name, args.version), indent=2, sort_keys=True))
        return 0
    stored = registry.read_version(args.name, args.version)
    audits = registry.records(args.name, stored.id, "audits")
    print(format_card(stored.id, dict(stored.card)))
    print()
    print(*fresh_audits_text([(record.number, record.body) for record in audits]), sep="\n")
    return 0


def audit(args: argparse.Namespace) -> int:
    from veil.fitting.fresh_audit import audit_stored_version

    registry = Registry(args.registry)
    # An unknown or damaged version fails before the sample is read.
    card = registry.read_version(args.name, args.version).card
    streamed = args.stream or Path(args.data).is_dir()
    sample, context_note = _fresh_sample(args, card, streamed=streamed)
    outcome = audit_stored_version(
        registry,
        args.name,
        args.version,
        sample,
        notes=[] if context_note is None else [context_note],
        nonlinear=args.probes == "all",
        seed=args.seed,
        max_rows=args.rows,
        chunk_rows=args.chunk_rows,
        thorough=args.thorough,
    )
    record = outcome.record
    if args.json:
        print(json.dumps({"number": record.number, "key": record.key, **record.body}, indent=2, sort_keys=True))
        return 0
    print(outcome.audit.format_table())
    for note in record.body["notes"]:
        print(f"note: {note}")
    print(f"verdict: {outcome.verdict.sentence()}")
    where = f"{args.name} {record.version}"
    if outcome.already_stored:
        print(f"this audit was stored before, as fresh audit {record.number} of {where}")
    else:
        print(f"stored as fresh audit {record.number} of {where}")
    return _gate(outcome.verdict.status, args.fail_on)


def _fresh_sample(args: argparse.Namespace, card: Any, *, streamed: bool) -> tuple[Any, str | None]:
    """``veil audit``'s sample, with the context ``--given`` names or the one the version was fitted with.

    The version's own context column is read when the sample has it; a sample without it is audited on the
    population only, and the note returned says so.
    """
    from veil.registry.card import given_columns

    # The audit reads within one column: the first the version was fitted with.
    fitted_with = given_columns(card["given"])[0]["column"] if card.get("given") else None
    if args.given is not None or fitted_with is None:
        return _open_sample(args, streamed=streamed), None
    try:
        return _open_sample(argparse.Namespace(**{**vars(args), "given": fitted_with}), streamed=streamed), None
    except DataError as error:
        # Read again without it: an error that remains is the sample's own, and is raised as such.
        sample = _open_sample(args, streamed=streamed)
        why = str(error)
    return sample, f"not audited within the version's context {fitted_with!r} ({why}): audited as a whole"


def compare(args: argparse.Namespace) -> int:
    registry = Registry(args.registry)
    left, right = registry.read_version(args.name, args.left), registry.read_version(args.name, args.right)
    print(compare_cards(left.id, dict(left.card), right.id, dict(right.card)))
    return 0


def promote(args: argparse.Namespace) -> int:
    event = Registry(args.registry).promote(
        args.name,
        args.version,
        alias=args.alias,
        reason=args.reason,
        allow_dimension_change=args.allow_dimension_change,
        force=args.force,
    )
    forced = " (forced: the version's verdict is alert)" if event.forced else ""
    print(f"{args.name}: alias {event.alias!r} {event.from_version or '(new)'} -> {event.to_version}{forced}")
    return 0


def rollback(args: argparse.Namespace) -> int:
    registry = Registry(args.registry)
    event = registry.rollback(
        args.name, alias=args.alias, reason=args.reason, allow_dimension_change=args.allow_dimension_change
    )
    print(f"{args.name}: alias {event.alias!r} rolled back {event.from_version} -> {event.to_version}")
    verdict = promotion_verdict(registry.read_version(args.name, event.to_version or "").card)
    if verdict is not None and verdict.status == "alert":
        # Rolling back is the emergency path and is never refused; the history notes the verdict too.
        print(f"note: {event.to_version}'s verdict is {verdict.sentence()}", file=sys.stderr)
    return 0


def remove_alias(args: argparse.Namespace) -> int:
    event = Registry(args.registry).remove_alias(args.name, args.alias, reason=args.reason)
    print(f"{args.name}: alias {event.alias!r} removed (it pointed at {event.from_version or 'an unknown version'})")
    return 0


def history(args: argparse.Namespace) -> int:
    events = Registry(args.registry).history(args.name)
    if args.json:
        print(json.dumps([asdict(e) for e in events], indent=2))
        return 0
    # An audit log, read by time: the events' numbers order the files on disk and stay in --json; no command
    # takes one, so the table does not lead with them.
    rows = [
        [
            e.time,
            e.user,
            e.alias,
            _action_text(e),
            e.from_version or "-",
            e.to_version or "(removed)",
            e.reason,
        ]
        for e in events
    ]
    _print_table(["time", "user", "alias", "action", "from", "to", "reason"], rows)
    return 0


def _action_text(event: HistoryEvent) -> str:
    """A history event's action as the table shows it: forced or unfinished said."""
    return event.action + (" (forced)" if event.forced else "") + ("" if event.applied else " (unfinished)")


def verify(args: argparse.Namespace) -> int:
    results = Registry(args.registry).verify(args.name)
    for result in results:
        print(
            f"ok    {result.name} {result.version}"
            if result.ok
            else f"FAIL  {result.name} {result.version}: {result.problem}"
        )
    failures = sum(not r.ok for r in results)
    print(f"{len(results) - failures} ok, {failures} failed", file=sys.stderr)
    return 1 if failures else 0


def report(args: argparse.Namespace) -> int:
    from veil.reporting import version_report

    out = Path(args.out)
    if not out.parent.is_dir():
        raise DataError(f"the output folder {out.parent} does not exist")
    out.write_text(version_report(Registry(args.registry), args.name, args.version), encoding="utf-8")
    print(out)
    return 0


def apply(args: argparse.Namespace) -> int:
    from veil.cleaning.corpus import apply_to_file, manifest_path

    requested = args.version or args.alias or DEFAULT_ALIAS
    stored = Registry(args.registry).read_version(args.name, requested)
    manifest: dict[str, Any] = apply_to_file(
        stored,
        args.source,
        args.target,
        requested=requested,
        embeddings_key=args.embeddings,
        chunk_rows=args.chunk_rows,
        index_factory=args.index_factory,
    )
    print(f"cleaned {manifest['input']['rows']} rows with {stored.name} {stored.id} into {args.target}")
    print(manifest_path(Path(args.target)))
    return 0


def serve(args: argparse.Namespace) -> int:
    from veil.server.run import serve_forever  # the web stack is loaded only to serve

    serve_forever(
        registry=args.registry, names=args.names or [], alias=args.alias, host=args.host, port=args.port,
        workers=args.workers, http=args.http,
    )  # fmt: skip
    return 0


def _admin_token() -> str | None:
    """``VEIL_ADMIN_TOKEN``, else the file of that name in ``VEIL_SECRETS_DIR`` (where the service reads it too)."""
    token = os.environ.get("VEIL_ADMIN_TOKEN")
    secrets = os.environ.get("VEIL_SECRETS_DIR")
    if token is None and secrets:
        stored = Path(secrets) / "veil_admin_token"
        token = stored.read_text().strip() if stored.is_file() else None
    return token or None


def _posted_sample(args: argparse.Namespace) -> Any:
    """The sample ``--sample`` names, as the patrol posts it (None: check the service's recent traffic)."""
    import numpy as np

    from veil.patrol.rounds import PostedSample
    from veil.samples.sources import check_embeddings, file_sha256

    keys: list[str] = args.attribute
    unknown = sorted(set(args.continuous) - set(keys))
    if unknown:
        raise DataError(f"--continuous {unknown[0]} names no --attribute")
    if args.sample is None:
        if keys or args.given:
            raise DataError("--attribute and --given name columns inside a --sample file; give the sample too")
        return None
    if args.given and not keys:
        raise DataError("--given needs the attribute's labels (--attribute): within a value, pseudo-labels say nothing")
    path = Path(args.sample)
    if not path.is_file():
        raise DataError(f"{path} does not exist")
    columns: dict[str, Any] = {}
    context_column: Any = None
    try:
        if path.suffix.lower() == ".npy":
            if keys or args.given:
                raise DataError(f"{path.name} holds vectors only; labels and a context come with a .npz sample")
            vectors = np.load(path, allow_pickle=False)
        elif path.suffix.lower() == ".npz":
            with np.load(path, allow_pickle=False) as arrays:
                wanted = (args.embeddings, *keys, *([args.given] if args.given else []))
                missing = [key for key in wanted if key not in arrays]
                if missing:
                    raise DataError(f"{path.name} has no array {missing[0]!r}; it has {', '.join(arrays.files)}")
                vectors = arrays[args.embeddings]
                columns = {key: arrays[key] for key in keys}
                if args.given is not None:
                    context_column = arrays[args.given]
        else:
            raise DataError(f"a --sample is a .npy or .npz file, not {path.suffix or 'a file without a suffix'}")
    except (ValueError, OSError) as error:
        raise DataError(f"{path} cannot be read as a sample ({error})") from None
    vectors = check_embeddings(vectors, source=str(path))
    context = None
    if args.given is not None:
        if context_column.shape != (vectors.shape[0],):
            raise DataError(
                f"{path.name}: {args.given!r} holds {context_column.size} values for {vectors.shape[0]} vectors"
            )
        context = [str(v) for v in context_column]
    labels: dict[str, list[str] | list[float]] = {}
    for key, column in columns.items():
        if column.shape != (vectors.shape[0],):
            raise DataError(f"{path.name}: {key!r} holds {column.size} labels for {vectors.shape[0]} vectors")
        try:
            labels[key] = [float(v) for v in column] if key in args.continuous else [str(v) for v in column]
        except (TypeError, ValueError):
            raise DataError(
                f"{path.name}: the continuous attribute {key!r} holds values that are not numbers"
            ) from None
    # One categorical attribute's class names go as a list, which the service reads as the version's first
    # attribute's (as every version of one attribute takes them); otherwise labels go by attribute.
    posted: list[str] | dict[str, list[str] | list[float]] | None = labels or None
    if len(keys) == 1 and keys[0] not in args.continuous:
        posted = [str(v) for v in labels[keys[0]]]
    return PostedSample(vectors=vectors, labels=posted, file=path.name, sha256=file_sha256(path), context=context)


def patrol(args: argparse.Namespace) -> int:
    from veil.patrol.loop import run_patrol
    from veil_client import VeilError

    registry = Registry(args.registry)
    registry.versions(args.name)  # an unknown eraser fails before the first round
    service, replicas = _patrolled(args)
    try:
        summary = run_patrol(
            registry,
            args.name,
            service=service,
            token=os.environ.get("VEIL_DATA_TOKEN"),
            # A replica's recent raw vectors are an admin route: other callers' embeddings.
            admin_token=_admin_token(),
            replicas=replicas,
            sample=_posted_sample(args),
            every=args.every,
            rounds=1 if args.once else args.rounds,
            say=lambda line: print(line, flush=True),
        )
    except VeilError as error:
        print(f"veil patrol: the service at {service} did not answer: {error}", file=sys.stderr)
        return 1
    return _gate(summary.worst, args.fail_on)


def _patrolled(args: argparse.Namespace) -> tuple[str, Any]:
    """What ``veil patrol`` asks: one service as it always has, or replicas whose samples each round merges."""
    from veil.patrol.replicas import ReplicaSet

    if not args.service and not args.replicas_of:
        raise DataError("give the service to check: --service URL (repeatable) or --replicas-of URL")
    if len(args.service) == 1 and not args.replicas_of:
        return args.service[0], None
    replicas = ReplicaSet(services=tuple(args.service), replicas_of=tuple(args.replicas_of))
    return replicas.describe(), replicas


def _since(text: str | None) -> Any:
    """``--since``: an ISO date or time (UTC unless it says otherwise), or a span back from now."""
    from datetime import UTC, datetime, timedelta

    if text is None:
        return None
    units = {"m": 60, "h": 3600, "d": 86400}
    if text[:-1].isdigit() and text[-1:] in units:
        return datetime.now(UTC) - timedelta(seconds=int(text[:-1]) * units[text[-1]])
    try:
        moment = datetime.fromisoformat(text)
    except ValueError:
        raise DataError(
            f"--since {text!r}: give an ISO date or time (2026-12-01T08:00) or a span (30m, 24h, 7d)"
        ) from None
    return moment if moment.tzinfo is not None else moment.replace(tzinfo=UTC)


def checks(args: argparse.Namespace) -> int:
    from veil.patrol.rounds import check_history

    records = check_history(Registry(args.registry), args.name, since=_since(args.since))
    if args.json:
        listed = [{"number": record.number, "key": record.key, **record.body} for record in records]
        print(json.dumps(listed, indent=2, sort_keys=True))
        return 0
    if not records:
        print(f"no recorded checks of {args.name}" + ("" if args.since is None else f" since {args.since}"))
        return 0
    rows = [
        [
            record.body["checked_at"],
            record.version,
            str(record.body["report"].get("rows", "")),
            _checked_text(record.body),
            record.body["status"],
            "; ".join(record.body["reasons"]),
        ]
        for record in records
    ]
    _print_table(["checked at", "version", "rows", "checked", "status", "reasons"], rows)
    return 0


def _checked_text(body: dict[str, Any]) -> str:
    """The ``checked`` column: what was checked, and for a merged check its replicas."""
    from veil.patrol.rounds import replicas_summary

    if "replicas" not in body:
        return str(body["checked"]["kind"])
    return f"{body['checked']['kind']}: {replicas_summary(body['replicas'], body['checked'])}"


HANDLERS = {
    "fit": fit,
    "audit": audit,
    "versions": versions,
    "show": show,
    "compare": compare,
    "promote": promote,
    "rollback": rollback,
    "remove_alias": remove_alias,
    "history": history,
    "verify": verify,
    "report": report,
    "apply": apply,
    "serve": serve,
    "patrol": patrol,
    "checks": checks,
}
