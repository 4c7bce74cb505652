"""The within-context figures of docs/methods.md, measured on stored versions.

Usage: ``.venv/bin/python scripts/measure_within_context.py [--sample small|large] [--holdout SHARE] [--pins-only]
[--json FILE] [--registry DIR] [NAME ...]`` (every method of ``CONFIGS`` when no NAME is given).  docs/methods.md
quotes three runs: the default (the large sample, held-out share 0.25); ``--sample small --holdout 0.5`` (the
small sample's within-field figures); ``--sample small --holdout 0.3 --pins-only`` (the channel the pins close, in
the small sample's float32 embeddings; the large sample's float16 storage rounds it away).

Protocol.  The large committed sample (24,000 rows of 384-d all-MiniLM-L6-v2
embeddings; attribute ``pronoun``, context and task ``field``).  Each method
is fitted and stored by :func:`veil.fitting.job.fit_version`, exactly as
``veil fit --holdout 0.25 --seed 0 --task field [--given field]`` does
(17,923 fitting rows drawn by the job's row-index hash); its own audit is the
linear one.  Every figure is then measured on the 6,077 held-out rows, cleaned
by the stored artifact's ``apply`` (what the service serves: a transport
within the field infers the field):

- within the field: the audit's own within-context measurement
  (:func:`veil.audit.within.context_audit`, every reader: linear, quadratic,
  RBF kernel, boosted trees, MLP; 5 stratified folds within each field,
  seed 0, pooled by rows), the floor, and the 10-NN pronoun share within the
  field against its base rate;
- over the population, from the stored card: the linear probe against the
  majority, the task (field) probe, the relative distortion
  ``E‖x' − x‖² / E‖x − μ‖²``, the rank and the map kind;
- pins: scikit-learn's standardised logistic regression reads the pronoun
  over the held-out rows (5 stratified folds, seed 0) with every coordinate
  and without the coordinates without spread in the fitting rows (three), for
  the stored artifact and for the same artifact without its pins.

One core (other jobs share the machine).  The versions go to a temporary
registry, or to ``--registry DIR``, which keeps them for ``veil show``.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import tempfile
import time
from collections.abc import Mapping
from pathlib import Path
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import StratifiedKFold, cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from threadpoolctl import threadpool_limits

from veil.audit.context_report import ContextAudit
from veil.audit.within import context_audit
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.maps.artifact import MapArtifact
from veil.maps.context_transport import ContextTransportMap
from veil.maps.linalg import dead_coordinates
from veil.registry import Registry
from veil.registry.card import method_text
from veil.samples.harbourline import SAMPLE_FILES, load_harbourline_profiles
from veil.samples.sources import LabelledSample
from veil.samples.splitting import give_every_class_both_parts, holdout_mask

HOLDOUT = 0.25
SEED = 0
FOLDS = 5
NONLINEAR = ("quadratic", "kernel", "trees", "mlp")

#: Each method as ``veil fit`` is asked for it (None: the raw rows).
CONFIGS: dict[str, MethodSpec | None] = {
    "raw": None,
    "leace": MethodSpec("leace"),
    "leace-given": MethodSpec("leace", given="field"),
    "leace-given-within-only": MethodSpec("leace", given="field", guard_population=False),
    "meanproj-given": MethodSpec("meanproj", given="field"),
    "inlp": MethodSpec("inlp"),
    "rlace": MethodSpec("rlace"),
    "transport": MethodSpec("transport"),
    "transport-given": MethodSpec("transport", given="field"),
    "transport-given-leace": MethodSpec("transport", given="field", params={"then_leace": True}),
}


@dataclasses.dataclass(frozen=True)
class Rows:
    sample: str
    holdout: float
    x: NDArray[np.float32]
    z: NDArray[np.str_]
    field: NDArray[np.str_]
    held: NDArray[np.bool_]


def _rows(size: Literal["small", "large"], holdout: float) -> Rows:
    profiles = load_harbourline_profiles(size=size)
    codes = np.unique(profiles.pronoun, return_inverse=True)[1]
    # The fitting job's split (veil.fitting.plan): the row-index hash, repaired so each class is on both sides.
    held = give_every_class_both_parts(holdout_mask(codes.size, fraction=holdout, seed=SEED), codes)
    return Rows(size, holdout, profiles.embedding, profiles.pronoun, profiles.field, held)


def _sample(rows: Rows, *, given: bool) -> LabelledSample:
    contexts = {"field": rows.field} if given else {}
    return LabelledSample(
        embeddings=rows.x, attribute=rows.z, attribute_key="pronoun", task=rows.field, task_key="field",
        files={SAMPLE_FILES[rows.sample]: "committed"}, contexts=contexts, context_keys=tuple(contexts),
    )  # fmt: skip


def _fit(name: str, spec: MethodSpec, rows: Rows, registry: Registry) -> tuple[MapArtifact, Mapping[str, Any], float]:
    spec = dataclasses.replace(spec, holdout=rows.holdout, seed=SEED)
    request = FitRequest(spec, StoreSpec(name), audit=AuditSpec(nonlinear=False))
    start = time.perf_counter()
    outcome = fit_version(_sample(rows, given=spec.given is not None), request, registry=registry)
    seconds = time.perf_counter() - start
    stored = registry.read_version(name, outcome.version_id)
    if stored.card["data"]["fit_rows"] != np.count_nonzero(~rows.held):
        raise RuntimeError("the script's split is not the fitting job's")
    return stored.artifact, stored.card, seconds


def _standardised_linear(x: NDArray[np.floating], z: NDArray[np.str_]) -> float:
    reader = make_pipeline(StandardScaler(), LogisticRegression(max_iter=3000))
    folds = StratifiedKFold(FOLDS, shuffle=True, random_state=SEED)
    return float(cross_val_score(reader, x, z, cv=folds).mean())


def _pins(x: NDArray[np.floating], z: NDArray[np.str_], dead: NDArray[np.intp]) -> dict[str, float]:
    """The standardised linear reader with every coordinate, and without the coordinates without spread."""
    live = np.setdiff1d(np.arange(x.shape[1]), dead)
    every, without = _standardised_linear(x, z), _standardised_linear(x[:, live], z)
    return {"with": every, "without": without, "added": every - without}


def _within(raw: NDArray[np.floating], erased: NDArray[np.floating], rows: Rows) -> ContextAudit:
    z = rows.z[rows.held]
    classes, codes = np.unique(z, return_inverse=True)
    return context_audit(
        raw, erased, codes.astype(np.intp), rows.field[rows.held], classes=tuple(map(str, classes)),
        column="field", folds=FOLDS, nonlinear=True, random_state=SEED,
    )  # fmt: skip


def _dead(rows: Rows) -> NDArray[np.intp]:
    """The coordinates without spread in the fitting rows (the pins' rule, :func:`dead_coordinates`)."""
    return dead_coordinates(np.cov(rows.x[~rows.held].astype(np.float64), rowvar=False))


def _worst(within: ContextAudit) -> dict[str, Any] | None:
    """The field read farthest beyond its own floor: its rows, floor and readings."""
    worst = within.worst_value()
    if worst is None:
        return None
    readings = {reader: score.accuracy for reader, score in worst.after.items()}
    return {"value": worst.value, "rows": worst.rows, "floor": worst.floor, "after": readings}


def measure_pins(name: str, rows: Rows, registry: Registry) -> dict[str, Any]:
    """The pins alone: the standardised linear reader with and without those coordinates, pinned and not."""
    spec = CONFIGS[name]
    raw, z_held, dead = rows.x[rows.held], rows.z[rows.held], _dead(rows)
    figures: dict[str, Any] = {"name": name, "sample": rows.sample, "dead_coordinates": dead.tolist()}
    if spec is None:
        return {**figures, "pins": _pins(raw, z_held, dead)}
    artifact, _, _ = _fit(f"{rows.sample}-{name}", spec, rows, registry)
    figures["pins"] = _pins(artifact.apply(raw), z_held, dead)
    figures["pins_removed"] = _pins(dataclasses.replace(artifact, pins=None).apply(raw), z_held, dead)
    return figures


def measure(name: str, rows: Rows, registry: Registry) -> dict[str, Any]:
    spec = CONFIGS[name]
    raw = rows.x[rows.held]
    z_held = rows.z[rows.held]
    dead = _dead(rows)
    figures: dict[str, Any] = {"name": name, "fit_rows": int(np.count_nonzero(~rows.held)), "held_rows": raw.shape[0]}
    if spec is None:
        erased: NDArray[np.floating] = raw
        figures["pins"] = _pins(raw, z_held, dead)
    else:
        artifact, card, seconds = _fit(name, spec, rows, registry)
        erased = artifact.apply(raw)
        audit = card["audit"]
        figures.update(
            fit_seconds=seconds,
            map=method_text(dict(card)),
            population_linear=audit["leakage"]["linear_after"]["accuracy"],
            majority=audit["leakage"]["linear_after"]["majority"],
            raw_population_linear=audit["leakage"]["linear_before"]["accuracy"],
            task=audit["utility"]["task_accuracy_after"],
            raw_task=audit["utility"]["task_accuracy_before"],
            distortion=audit["utility"]["relative_distortion"],
            nn_population=audit["retrieval"]["attribute_share_after"],
            nn_population_base=audit["retrieval"]["attribute_base_rate"],
            pinned=[] if artifact.pins is None else artifact.pins.coordinates.tolist(),
        )
        figures["pins"] = _pins(erased, z_held, dead)
        figures["pins_removed"] = _pins(dataclasses.replace(artifact, pins=None).apply(raw), z_held, dead)
        if isinstance(artifact.map, ContextTransportMap):
            known = np.searchsorted(artifact.map.values, rows.field[rows.held])
            figures["context_inferred_right"] = float(np.mean(artifact.map.inferred_values(raw) == known))
    within = _within(raw, erased, rows)
    strongest = max(NONLINEAR, key=lambda reader: within.after[reader].accuracy)
    figures.update(
        dead_coordinates=dead.tolist(),
        floor=within.floor,
        within={reader: score.accuracy for reader, score in within.after.items()},
        strongest_nonlinear=strongest,
        nn_within=within.nn_share_after,
        nn_within_base=within.nn_base_rate,
        worst_value=_worst(within),
    )
    return figures


def _line(f: dict[str, Any]) -> str:
    if "within" not in f:
        pins = [
            f"{f['name']} ({f['sample']})",
            f"pins: with {f['pins']['with']:.3f}, without {f['pins']['without']:.3f}",
        ]
        if "pins_removed" in f:
            removed = f["pins_removed"]
            pins.append(f"pins removed: with {removed['with']:.3f}, without {removed['without']:.3f}")
        return " | ".join(pins)
    w = f["within"]
    cells = [
        f["name"],
        f"linear {w['linear']:.3f}",
        f"{f['strongest_nonlinear']} {w[f['strongest_nonlinear']]:.3f}",
        f"floor {f['floor']:.3f}",
        f"10-NN {f['nn_within']:.3f} (base {f['nn_within_base']:.3f})",
        f"pins {f['pins']['added']:+.3f}",
    ]
    if "task" in f:
        cells += [
            f"population {f['population_linear']:.3f} (majority {f['majority']:.3f})",
            f"task {f['task']:.3f}",
            f"distortion {f['distortion']:.3f}",
            f"no pins {f['pins_removed']['added']:+.3f}",
            f"{f['fit_seconds']:.0f} s",
        ]
    return " | ".join(cells)


def main(argv: list[str]) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("names", nargs="*", metavar="NAME", help=f"any of {', '.join(CONFIGS)} (default: all)")
    parser.add_argument("--json", type=Path, help="append each method's figures to this file, one JSON line each")
    parser.add_argument("--registry", type=Path, help="store the versions here (default: a temporary registry)")
    parser.add_argument("--sample", choices=("large", "small"), default="large", help="the committed sample")
    parser.add_argument("--holdout", type=float, default=HOLDOUT, help=f"held-out share (default {HOLDOUT})")
    parser.add_argument("--pins-only", action="store_true", help="measure the pins alone")
    args = parser.parse_args(argv)
    unknown = [name for name in args.names if name not in CONFIGS]
    if unknown:
        parser.error(f"unknown method {unknown[0]!r}; choose from {', '.join(CONFIGS)}")
    rows = _rows(args.sample, args.holdout)
    run = measure_pins if args.pins_only else measure
    with tempfile.TemporaryDirectory() as scratch, threadpool_limits(limits=1):
        registry = Registry(args.registry or Path(scratch) / "registry")
        for name in args.names or list(CONFIGS):
            figures = run(name, rows, registry)
            print(_line(figures), flush=True)
            if args.json is not None:
                with args.json.open("a") as out:
                    out.write(json.dumps(figures) + "\n")


if __name__ == "__main__":
    main(sys.argv[1:])
