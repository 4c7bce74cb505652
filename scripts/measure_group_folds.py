"""Measure ordinary folds, group folds and the transfer probe on the committed samples, first names as groups.

Every Harbourline profile names one person by a first name drawn from the
sample's own vocabulary (``scripts/make_profile_sample.py``: 20 names per
pronoun in the small sample, 60 in the large one); that name is the group
here.  The fit holds out whole names (``fit_and_audit(..., group=)``), so
the judged rows' names are names the eraser never saw, and the audit reads
the linear probe three ways (docs/methods.md, "Across groups").

    .venv/bin/python scripts/measure_group_folds.py [--large] [--holdout 0.5] [--probes all] [--independence]

With ``--independence`` it also runs the kernel and neighbour independence
tests on the judged rows, raw and after the map, with labels permuted row by
row and by whole names (docs/independence.md, "With a group column"), and
prints the audit's own family (with the readers' test) with the names as
groups.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import re
import sys
from pathlib import Path
from typing import Any

import numpy as np
from numpy.typing import NDArray
from sklearn.model_selection import StratifiedGroupKFold

from veil.audit import fit_and_audit
from veil.audit.geometry import nearest_neighbours
from veil.audit.groups import group_codes
from veil.audit.independence_run import FAST, independence_audit
from veil.erasers import INLP, LEACE, MeanProjection
from veil.samples.harbourline import load_harbourline_profiles

ROOT = Path(__file__).resolve().parents[1]


def vocabulary_names() -> set[str]:
    """Every first name the sample generator draws from (its narrow and wide lists)."""
    spec = importlib.util.spec_from_file_location("make_profile_sample", ROOT / "scripts" / "make_profile_sample.py")
    assert spec is not None
    assert spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module
    spec.loader.exec_module(module)
    return {name for lists in (module.NAMES, module.EXTRA_NAMES) for names in lists.values() for name in names}


def first_names(texts: NDArray[Any], names: set[str]) -> NDArray[np.str_]:
    """The one vocabulary first name in each text (refuses a text with none or with two)."""
    found = [[word for word in re.findall(r"[A-Z][a-z]+", str(text)) if word in names] for text in texts]
    bad = [i for i, words in enumerate(found) if len(words) != 1]
    if bad:
        raise ValueError(f"row {bad[0]} names {len(found[bad[0]])} vocabulary first names, not one")
    return np.array([words[0] for words in found])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--large", action="store_true", help="the large committed sample (24,000 rows)")
    parser.add_argument("--holdout", type=float, default=0.5, help="share of names held out (default 0.5)")
    parser.add_argument("--probes", choices=("linear", "all"), default="linear")
    parser.add_argument("--method", choices=("leace", "meanproj", "inlp"), default="leace")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--independence", action="store_true", help="also the independence tests, rows and names")
    args = parser.parse_args()
    size = "large" if args.large else "small"
    sample = load_harbourline_profiles(size)
    x, z = sample.embedding, sample.pronoun
    groups = first_names(sample.text, vocabulary_names())
    eraser = {"leace": LEACE, "meanproj": MeanProjection, "inlp": INLP}[args.method]()
    _, report = fit_and_audit(
        eraser, x, z, group=groups, group_name="first name", holdout=args.holdout, random_state=args.seed,
        nonlinear=args.probes == "all",
    )  # fmt: skip
    assert report.groups is not None
    across = report.groups
    out = {
        "sample": size,
        "rows": int(x.shape[0]),
        "names": int(np.unique(groups).size),
        "method": args.method,
        "holdout": args.holdout,
        "seed": args.seed,
        "fitted_rows": report.protocol.eraser_rows if report.protocol else None,
        "judged_rows": report.n_heldout,
        "fit_names": across.fit_groups,
        "judged_names": across.groups,
        "shared_names": across.shared_groups,
        "majority": across.grouped_after.majority,
        "readings": {
            name: {"before": None if before is None else round(before.accuracy, 3), "after": round(after.accuracy, 3)}
            for name, after, before in across.linear_readings()
        },
    }
    if across.transfer_reader is not None and across.transfer_reader_after is not None:
        out["nonlinear_transfer"] = {across.transfer_reader: round(across.transfer_reader_after.accuracy, 3)}
    out["strongest_group_folds"] = report.strongest_after()
    print(json.dumps(out, indent=2))
    print("\n".join(across.lines()))
    if args.independence:
        assert report.independence is not None
        print("\n".join(report.independence.lines()))
        print(json.dumps(independence_by_permutation(x, z, groups, eraser, args.holdout, args.seed), indent=2))


def independence_by_permutation(
    x: NDArray[np.floating], z: NDArray[Any], groups: NDArray[np.str_], eraser: Any, holdout: float, seed: int
) -> dict[str, Any]:
    """The kernel and neighbour tests on the judged rows, raw and erased, labels permuted by rows and by names.

    The split is ``fit_and_audit``'s: the first fold of ``round(1 / holdout)`` stratified group folds, seeded.
    """
    classes, codes = np.unique(z, return_inverse=True)
    codes = codes.reshape(-1).astype(np.intp)
    names = group_codes(groups, codes.size)[1]
    splitter = StratifiedGroupKFold(n_splits=max(2, round(1 / holdout)), shuffle=True, random_state=seed)
    fit_rows, held = next(iter(splitter.split(x, codes, names)))
    fitted = eraser.fit(x[fit_rows], classes[codes[fit_rows]])
    raw = np.asarray(x[held], dtype=np.float64)
    views = {"raw": raw, "after": np.asarray(fitted.transform(x[held]), dtype=np.float64)}
    out: dict[str, Any] = {"judged_rows": int(held.size), "judged_names": int(np.unique(names[held]).size)}
    for view, rows in views.items():
        for permuted, grouped in (("rows", None), ("names", names[held])):
            family = independence_audit(
                raw, rows, codes[held], neighbours=nearest_neighbours(rows, 10),
                find_neighbours=lambda v, apart: nearest_neighbours(v, 10, apart), reader=None, settings=FAST,
                seed=seed, grouped=grouped,
            )  # fmt: skip
            out[f"{view}, permuted by {permuted}"] = {
                test.name: {
                    "statistic": round(test.statistic, 3),
                    "p": round(test.p_value, 4),
                    "effect": round(test.effect, 4),
                    "smallest_t": test.smallest_strength if test.power_measured else "not measured",
                    "permutation": test.permutation,
                }
                for test in family.tests
            }
    return out


if __name__ == "__main__":
    main()
