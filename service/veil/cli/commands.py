"""What each ``veil`` subcommand does: call the library, print the result.  Output goes to stdout, errors up."""

from __future__ import annotations

import argparse
import json
import sys
from dataclasses import asdict
from pathlib import Path
from typing import Any

from veil.errors import DataError
from veil.registry import DEFAULT_ALIAS, Registry
from veil.registry.card import compare_cards, format_card

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
        elif item.isdigit() and int(item) > 0:
            values.append(int(item))
        else:
            raise DataError(f"--sweep values are positive integers or 'all', separated by commas; got {item!r}")
    return values


def fit(args: argparse.Namespace) -> int:
    from veil.audit.points import Sweep
    from veil.fitting.job import fit_version
    from veil.fitting.methods import parse_parameters
    from veil.fitting.sweep import TargetsMissedError
    from veil.samples.sources import load_labelled_sample
    from veil.samples.streaming import open_stream

    params = parse_parameters(args.method, args.option)
    sweep_values = None if not args.sweep else _sweep_values(args.sweep)
    registry = Registry(args.registry)
    registry.storage.list("")  # a registry that cannot take the version fails now, not after the fit
    common: dict[str, Any] = {
        "registry": registry,
        "name": args.name,
        "method": args.method,
        "params": params,
        "holdout": args.holdout,
        "seed": args.seed,
        "normalize": args.normalize,
        "nonlinear": args.probes == "all",
        "alias": args.alias,
        "reason": args.reason,
        "sweep": args.sweep is not None,
        "sweep_values": sweep_values,
        "targets": args.target,
    }
    source = {
        "attribute": args.attribute,
        "task": args.task,
        "embeddings_key": args.embeddings,
        "labels": args.labels,
        "drop_missing": args.drop_missing,
    }
    try:
        if args.stream or args.engine == "dask" or Path(args.data).is_dir():
            outcome = fit_version(
                open_stream(args.data, **source),
                chunk_rows=args.chunk_rows,
                audit_rows=args.audit_rows,
                fit_sample_rows=args.fit_sample_rows,
                engine=args.engine,
                scheduler=args.scheduler,
                workers=args.dask_workers,
                **common,
            )
        else:
            outcome = fit_version(load_labelled_sample(args.data, **source), **common)
    except TargetsMissedError as missed:
        # The points, so the targets can be set again with the figures in view; the error itself is one line.
        print(missed.sweep.format_table())
        raise
    if "operating_points" in outcome.card:
        print(Sweep.from_dict(outcome.card["operating_points"]).format_table())
    print(outcome.audit.format_table())
    for note in outcome.card["notes"]:
        if note not in outcome.audit.notes:
            print(f"note: {note}")
    if outcome.promotion is not None:
        print(f"alias {outcome.promotion.alias!r} now points at {outcome.version_id}")
    print(outcome.version_id)
    return 0


def versions(args: argparse.Namespace) -> int:
    registry = Registry(args.registry)
    summaries = registry.versions(args.name)
    on: dict[str, list[str]] = {}
    for state in registry.aliases(args.name).values():
        on.setdefault(state.version, []).append(state.alias)
    if args.json:
        print(json.dumps([{**asdict(s), "aliases": sorted(on.get(s.id, []))} for s in summaries], indent=2))
        return 0
    rows = [
        [s.id, s.created_at, s.created_by, s.method, str(s.rank), str(s.dim), ",".join(sorted(on.get(s.id, [])))]
        for s in summaries
    ]
    _print_table(["VERSION", "CREATED", "BY", "METHOD", "RANK", "DIM", "ALIASES"], rows)
    return 0


def show(args: argparse.Namespace) -> int:
    stored = Registry(args.registry).read_version(args.name, args.version)
    if args.json:
        print(json.dumps({"version": stored.id, **stored.card}, indent=2, sort_keys=True))
    else:
        print(format_card(stored.id, dict(stored.card)))
    return 0


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
    )
    print(f"{args.name}: alias {event.alias!r} {event.from_version or '(new)'} -> {event.to_version}")
    return 0


def rollback(args: argparse.Namespace) -> int:
    event = Registry(args.registry).rollback(
        args.name, alias=args.alias, reason=args.reason, allow_dimension_change=args.allow_dimension_change
    )
    print(f"{args.name}: alias {event.alias!r} rolled back {event.from_version} -> {event.to_version}")
    return 0


def history(args: argparse.Namespace) -> int:
    events = Registry(args.registry).history(args.name)
    if args.json:
        print(json.dumps([asdict(e) for e in events], indent=2))
        return 0
    rows = [
        [
            str(e.event),
            e.time,
            e.user,
            e.alias,
            e.action if e.applied else f"{e.action} (unfinished)",
            e.from_version or "-",
            e.to_version,
            e.reason,
        ]
        for e in events
    ]
    _print_table(["EVENT", "TIME", "USER", "ALIAS", "ACTION", "FROM", "TO", "REASON"], rows)
    return 0


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
    from veil.reporting import PLOT_DATA_FILE, PlotData, render_report

    out = Path(args.out)
    if not out.parent.is_dir():
        raise DataError(f"the output folder {out.parent} does not exist")
    stored = Registry(args.registry).read_version(args.name, args.version)
    plots = PlotData.from_bytes(stored.files[PLOT_DATA_FILE])
    out.write_text(render_report(stored.id, dict(stored.card), stored.artifact.history, plots), encoding="utf-8")
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


HANDLERS = {
    "fit": fit,
    "versions": versions,
    "show": show,
    "compare": compare,
    "promote": promote,
    "rollback": rollback,
    "history": history,
    "verify": verify,
    "report": report,
    "apply": apply,
    "serve": serve,
}
