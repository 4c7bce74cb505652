"""The rows-needed figures of docs/methods.md: the audit's projection from small fits against the measured curve.

Usage: ``.venv/bin/python scripts/measure_rows_needed.py [--json FILE] [NAME ...]`` (``leace`` and
``leace-given``, LEACE guarding within ``field``, when no NAME is given).

Protocol.  The large committed sample (24,000 rows of 384-d embeddings;
attribute ``pronoun``, context ``field``), split as the fitting job splits it
(the row-index hash, held-out share 0.3, seed 0: 16,733 fitting rows and
7,267 held-out).  The method is fitted on nested, stratified, seeded draws
of the fitting rows (:func:`veil.audit.rows_measure.nested_shares`, seed 0),
each half the one before: 16,733, 8,366, 4,183, 2,092, 1,046, 523 and 262
rows.  Each fit is read on all 7,267 held-out rows by the audit's own linear
reader (standardised logistic regression, 5 stratified folds, seed 0): the
accuracy above majority, and for ``leace-given`` also within each field,
pooled by rows, above the floor.  That is the measured curve.

The projection is what ``veil fit``'s audit would say of a small fit: the
curve fitted to the points at 1/8, 1/4, 1/2 and all of that fit's rows
(:class:`veil.audit.rows_curve.LearningCurve`), for fits of 2,092 and of
4,183 rows, each projecting the excess at every larger row count and the
rows that bring it under 0.02 (the linear threat's default warn level).
Both with the exponent fitted within its bounds, as the audit does, and
with it fixed at 1/2, to choose between them.  One core.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np
from threadpoolctl import threadpool_limits

from veil.audit import probes
from veil.audit.rows_curve import EXPONENT_BOUNDS, LearningCurve
from veil.audit.rows_measure import nested_shares, within_excess
from veil.fitting.methods import make_eraser
from veil.fitting.request import MethodSpec
from veil.samples.harbourline import load_harbourline_profiles
from veil.samples.splitting import give_every_class_both_parts, holdout_mask

HOLDOUT = 0.3
SEED = 0
FOLDS = 5
#: Each share of the fitting rows is half the one before; the smallest is 1/64.
HALVINGS = 6
THRESHOLD = 0.02
#: The small fits whose audit's projection is checked, as halvings below the full fit (2,092 and 4,183 rows).
SMALL_FITS = (3, 2)

CONFIGS = {"leace": MethodSpec("leace"), "leace-given": MethodSpec("leace", given="field")}


def _measured(spec: MethodSpec) -> dict[str, Any]:
    profiles = load_harbourline_profiles(size="large")
    z = profiles.pronoun
    codes = np.unique(z, return_inverse=True)[1].astype(np.intp)
    held = give_every_class_both_parts(holdout_mask(codes.size, fraction=HOLDOUT, seed=SEED), codes)
    x_fit, z_fit, field_fit = profiles.embedding[~held], z[~held], profiles.field[~held]
    x_held, codes_held = profiles.embedding[held], codes[held]
    groups = np.unique(profiles.field[held], return_inverse=True)[1].astype(np.intp)
    fit_codes = codes[~held]
    shares = tuple(0.5**k for k in range(1, HALVINGS + 1))
    draws = [*nested_shares(fit_codes, shares, SEED), np.arange(fit_codes.size)]
    points: list[dict[str, Any]] = []
    for drawn in draws:
        start = time.perf_counter()
        eraser = make_eraser(spec)
        given = {} if spec.given is None else {"given": field_fit[drawn]}
        eraser.fit(x_fit[drawn], z_fit[drawn], **given)
        erased = eraser.transform(x_held)
        fitted = time.perf_counter() - start
        score = probes.classification_score(
            probes.linear_probe(SEED), erased, codes_held, folds=FOLDS, random_state=SEED
        )
        point = {"rows": int(drawn.size), "excess": score.accuracy - score.majority, "majority": score.majority}
        if spec.given is not None:
            point["within_excess"] = within_excess(erased, codes_held, groups, folds=FOLDS, seed=SEED)
        point["fit_seconds"] = fitted
        point["seconds"] = time.perf_counter() - start
        print(json.dumps(point), flush=True)
        points.append(point)
    return {"heldout": int(codes_held.size), "points": points}


def _projections(points: list[dict[str, Any]], key: str) -> list[dict[str, Any]]:
    """What the audit of each small fit projects, with the exponent fitted and fixed at 1/2, against the measured."""
    rows = [point["rows"] for point in points]
    excess = [point[key] for point in points]
    baseline = "floor" if key == "within_excess" else "majority"
    found = []
    for halvings in SMALL_FITS:
        last = len(points) - halvings  # the small fit's own point, after its 1/8, 1/4 and 1/2
        chosen = slice(last - 3, last)
        for name, bounds in (("fitted", EXPONENT_BOUNDS), ("fixed 1/2", (0.5, 0.5))):
            curve = LearningCurve.fitted(
                tuple(rows[chosen]), tuple(excess[chosen]), baseline=baseline, threshold=THRESHOLD, bounds=bounds
            )
            found.append(
                {
                    "fit_rows": rows[last - 1],
                    "exponent": name,
                    "scale": curve.scale,
                    "b": curve.exponent,
                    "projected_rows": curve.projected_rows,
                    "sentence": curve.sentence(384),
                    "larger": [
                        {"rows": n, "projected": curve.law(n), "measured": e}
                        for n, e in zip(rows[last:], excess[last:], strict=True)
                    ],
                }
            )
    return found


def main(argv: list[str]) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("names", nargs="*", metavar="NAME", help=f"any of {', '.join(CONFIGS)} (default: all)")
    parser.add_argument("--json", type=Path, help="write the figures to this file")
    args = parser.parse_args(argv)
    unknown = [name for name in args.names if name not in CONFIGS]
    if unknown:
        parser.error(f"unknown NAME {unknown[0]!r}; choose from {', '.join(CONFIGS)}")
    results = {}
    with threadpool_limits(limits=1):
        for name in args.names or list(CONFIGS):
            measured = _measured(CONFIGS[name])
            keys = ["excess"] + (["within_excess"] if CONFIGS[name].given is not None else [])
            measured["projections"] = {key: _projections(measured["points"], key) for key in keys}
            results[name] = measured
            for key, projections in measured["projections"].items():
                for p in projections:
                    larger = ", ".join(f"{q['rows']}: {q['projected']:.3f} vs {q['measured']:.3f}" for q in p["larger"])
                    print(
                        f"{name} {key} from {p['fit_rows']} rows, b {p['exponent']} = {p['b']:.2f}: "
                        f"under {THRESHOLD} at {p['projected_rows']} rows; {larger}",
                        flush=True,
                    )
    if args.json is not None:
        args.json.write_text(json.dumps(results, indent=2))


if __name__ == "__main__":
    main(sys.argv[1:])
