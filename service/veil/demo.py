"""``make demo``: fit every eraser on the committed Harbourline sample and print its audit.

The sample is invented (a fictional job board's member profiles, embedded
with a real sentence model); see :mod:`veil.datasets`.
"""

from __future__ import annotations

import time
import warnings

from sklearn.exceptions import ConvergenceWarning

from veil import INLPEraser, LeaceEraser, MeanProjectionEraser, RLACEEraser
from veil.audit import fit_and_audit
from veil.datasets import load_harbourline_profiles
from veil.erasers import BaseEraser


def main() -> None:
    sample = load_harbourline_profiles()
    print(
        f"Harbourline profiles: {sample.embedding.shape[0]} rows × {sample.embedding.shape[1]} dims; "
        "attribute = pronoun, task = field of work; 30% held out for the audit\n"
    )
    erasers: list[BaseEraser] = [
        LeaceEraser(),
        MeanProjectionEraser(),
        INLPEraser(classifier="moments", max_iter=40, random_state=0),
        RLACEEraser(rank=1, random_state=0),
    ]
    for eraser in erasers:
        started = time.perf_counter()
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)
            _, report = fit_and_audit(eraser, sample.embedding, sample.pronoun, task=sample.field, holdout=0.3)
        print(report.format_table())
        print(f"(fit and audit took {time.perf_counter() - started:.1f} s)\n")
    print(
        "Linear erasure leaves nonlinear traces (see the MLP rows); these figures hold for this sample's "
        "distribution only, and are no legal or compliance guarantee."
    )


if __name__ == "__main__":
    main()
