"""``make demo``: run the fitting job on the committed Harbourline sample into a demo registry.

Fits every method, audits each on held-out rows, stores each as a version
with its card and report, points ``live`` at the LEACE version, then lists
the registry as ``veil versions`` would.  The sample is invented (a
fictional job board's member profiles, embedded with a real sentence model);
see :mod:`veil.datasets`.
"""

from __future__ import annotations

import shutil
import time
from importlib import resources
from pathlib import Path
from typing import Any

from veil.datasets import SAMPLE_FILE
from veil.datasource import load_labelled_sample
from veil.fitting import fit_version
from veil.registry import Registry
from veil.reporting import REPORT_FILE

DEMO_REGISTRY = Path("demo-registry")
NAME = "profiles-minilm"
RUNS: list[tuple[str, dict[str, Any]]] = [
    ("leace", {}),
    ("meanproj", {}),
    ("inlp", {"classifier": "moments", "max_iter": 40}),
    ("rlace", {"rank": 1}),
]


def main() -> None:
    # The demo owns this folder: start from an empty registry each run.
    shutil.rmtree(DEMO_REGISTRY, ignore_errors=True)
    registry = Registry(DEMO_REGISTRY)
    with resources.as_file(resources.files("veil").joinpath("data", SAMPLE_FILE)) as path:
        sample = load_labelled_sample(path, attribute="pronoun", task="field")
    print(
        f"Harbourline profiles: {sample.rows} rows × {sample.embeddings.shape[1]} dims; "
        f"attribute = pronoun, task = field of work; 20% held out for the audit; registry: {DEMO_REGISTRY}/\n"
    )
    for method, params in RUNS:
        started = time.perf_counter()
        outcome = fit_version(
            sample,
            registry=registry,
            name=NAME,
            method=method,
            params=params,
            alias="live" if method == "leace" else None,
            reason="demo: LEACE has the smallest held-out linear leakage here",
        )
        print(outcome.audit.format_table())
        print(f"stored as {NAME} {outcome.version_id} ({time.perf_counter() - started:.1f} s)\n")
    print(f"{'VERSION':20}{'METHOD':10}{'RANK':6}ALIASES")
    aliases = {state.version: state.alias for state in registry.aliases(NAME).values()}
    for version in registry.versions(NAME):
        print(f"{version.id:20}{version.method:10}{version.rank:<6}{aliases.get(version.id, '')}")
    live = registry.read_version(NAME, "live")
    print(f"\nreport of the live version: {DEMO_REGISTRY / NAME / 'versions' / live.id / REPORT_FILE}")
    print(f"try: .venv/bin/veil show {NAME} live --registry {DEMO_REGISTRY}")
    print(
        "\nLinear erasure leaves nonlinear traces (see the MLP rows); these figures hold for this sample's "
        "distribution only, and are no legal or compliance guarantee."
    )


if __name__ == "__main__":
    main()
