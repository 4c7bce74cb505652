"""``make demo``: the whole path on the committed Harbourline sample, from a labelled sample to a rollback.

Harbourline is an invented community job board whose profile search ranks
member profiles by embedding similarity in a faiss inner-product index; the
embeddings carry the member's pronoun, which the search must not use.  The
demo fits two erasers into a fresh registry on the profiles that signed up
before March, audits the first on the March sign-ups and records that audit,
promotes one, fits a third that guards the pronoun and the age bracket
together (and their intersection), starts the service on a free loopback
port, cleans the corpus
through the client, searches the raw index before and after (with search
vectors, no re-index), re-indexes with ``veil apply`` and gets the same
results, checks a normal and a shifted traffic sample for drift (and the
third eraser's attributes one by one), moves profiles to a target per
attribute, rolls back
and keeps searching the raw index with the rolled-back version's search
vectors while the new index is built, records the service's live check of
the rolled-back version as a scheduled ``veil patrol`` would, stops the
service, and writes that version's report with its fresh audit and live
check.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import signal
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import numpy as np
from numpy.typing import NDArray

from veil.audit import geometry
from veil.cleaning.corpus import apply_to_file
from veil.cleaning.index import read_index
from veil.fitting.fresh_audit import audit_stored_version
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, StoreSpec
from veil.patrol.loop import run_patrol
from veil.registry import Registry
from veil.registry.card import attributes_text, card_verdict
from veil.reporting import REPORT_FILE, version_report
from veil.samples.harbourline import ProfileSample, load_harbourline_profiles
from veil.samples.sources import load_labelled_sample
from veil_client import VeilClient

DEMO_REGISTRY = Path("demo-registry")
DEMO_DATA = Path("demo-data")
DEMO_REPORT = Path("demo-report.html")
DEMO_INDEXES = Path("demo-indexes")
NAME = "profiles-minilm"
# A second eraser that guards the pronoun and the age bracket together, and their intersection.
JOINT_NAME = "profiles-minilm-pronoun-age"
ADMIN_TOKEN = "demo-admin-token"
#: No-drift draws per size for each probe figure of the live-check calibration (a fit's default is
#: veil.defaults.LIVE_PROBE_DRAWS): fewer here, so that the demo's three fits stay quick.
LIVE_DRAWS = 20
NEIGHBOURS = 10


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


@contextlib.contextmanager
def _service(port: int) -> Iterator[str]:
    """``veil serve`` on loopback, polling aliases every second; stopped cleanly on exit."""
    environment = {**os.environ, "VEIL_POLL_SECONDS": "1", "VEIL_ADMIN_TOKEN": ADMIN_TOKEN, "VEIL_LOG_LEVEL": "warning"}
    command = [sys.executable, "-m", "veil.cli", "serve", "--registry", str(DEMO_REGISTRY), "--port", str(port)]
    process = subprocess.Popen(command, env=environment, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            with contextlib.suppress(httpx.TransportError):
                if httpx.get(f"{base}/readyz", timeout=1.0).status_code == 200:
                    break
            if process.poll() is not None:
                raise RuntimeError("the service exited during start-up")
            time.sleep(0.2)
        else:
            raise RuntimeError("the service did not become ready within 60 s")
        yield base
    finally:
        process.send_signal(signal.SIGTERM)
        process.wait(timeout=30)
        # uvicorn shuts down gracefully on SIGTERM, then re-raises it: -SIGTERM is the clean ending.
        clean = process.returncode in (0, -signal.SIGTERM)
        print("service stopped cleanly" if clean else f"service ended with exit code {process.returncode}")


def _raw_index(corpus: NDArray[np.floating]) -> Any:
    """The index production already has: the raw profile vectors, exact inner-product search."""
    import faiss

    index = faiss.IndexFlatIP(corpus.shape[1])
    index.add(np.ascontiguousarray(corpus, dtype=np.float32))
    return index


def _search(index: Any, queries: NDArray[np.floating], query_rows: NDArray[np.intp]) -> NDArray[np.int64]:
    """Each query's top 10 in ``index`` (inner product, best first), the query's own profile left out."""
    _, found = index.search(np.ascontiguousarray(queries, dtype=np.float32), NEIGHBOURS + 1)
    return np.array([[j for j in row if j != own][:NEIGHBOURS] for row, own in zip(found, query_rows, strict=True)])


def _same(a: NDArray[np.int64], b: NDArray[np.int64]) -> int:
    """Queries whose top 10 hold the same profiles (the order of results tied within round-off may differ)."""
    return sum(set(x.tolist()) == set(y.tolist()) for x, y in zip(a, b, strict=True))


def _shares(top: NDArray[np.int64], query_rows: NDArray[np.intp], profiles: Any) -> str:
    """Among each query's results: share with its pronoun, and with its field."""
    pronoun = float(np.mean(profiles.pronoun[top] == profiles.pronoun[query_rows][:, None]))
    field = float(np.mean(profiles.field[top] == profiles.field[query_rows][:, None]))
    return f"same pronoun {pronoun:.3f}, same field {field:.3f}"


def _reindex(registry: Registry, version: str, corpus: Path) -> tuple[Any, dict[str, Any]]:
    """``veil apply`` the version into a new faiss index; the index and its manifest."""
    target = DEMO_INDEXES / f"profiles-{version}.faiss"
    manifest = apply_to_file(registry.read_version(NAME, version), corpus, target, requested=version)
    return read_index(target), manifest


def _rule(answer: dict[str, Any]) -> str:
    """Which rule judged a drift answer, in words: calibrated levels with their figures' p-values, or fixed ones."""
    if answer.get("rule") != "calibrated":
        return "fixed levels (the version stores no calibration: the card's warn and alert bands)"
    levels = answer["levels"]
    smallest = min(answer["p_values"].items(), key=lambda item: item[1])
    return (
        f"calibrated levels: p-values against the version's own no-drift draws at {answer['rows']} rows, "
        f"{levels['correction'].title()}-adjusted over {len(answer['p_values'])} figures, warn at "
        f"{levels['warn']:g}, alert at {levels['alert']:g} (smallest p: {smallest[0]} {smallest[1]:.2g})"
    )


def _signups(profiles: ProfileSample) -> tuple[Path, Path]:
    """The committed sample as two files: the profiles that signed up before March (the first 80%), and in March."""
    DEMO_DATA.mkdir(exist_ok=True)
    cut = profiles.embedding.shape[0] * 4 // 5
    paths = (DEMO_DATA / "signups-before-march.npz", DEMO_DATA / "signups-march.npz")
    for path, rows in zip(paths, (slice(0, cut), slice(cut, None)), strict=True):
        np.savez(
            path,
            embedding=profiles.embedding[rows],
            pronoun=profiles.pronoun[rows],
            age_bracket=profiles.age_bracket[rows],
            field=profiles.field[rows],
        )
    return paths


def main() -> None:
    started = time.perf_counter()
    for folder in (DEMO_REGISTRY, DEMO_INDEXES, DEMO_DATA):
        shutil.rmtree(folder, ignore_errors=True)  # the demo owns these folders
    DEMO_INDEXES.mkdir()
    registry = Registry(DEMO_REGISTRY)
    profiles = load_harbourline_profiles()
    before_march, march = _signups(profiles)
    sample = load_labelled_sample(before_march, attribute="pronoun", task="field")
    print(
        f"Harbourline profile search: {profiles.embedding.shape[0]} member profiles × {sample.dim} dims "
        f"(all-MiniLM-L6-v2); protected attribute: pronoun; task: field of work. Registry: {DEMO_REGISTRY}/\n"
    )

    print(
        f"1. Fit two erasers on the {sample.rows} profiles that signed up before March, each audited on 20% "
        "held-out rows"
    )
    leace = fit_version(
        sample,
        FitRequest(
            MethodSpec("leace"),
            StoreSpec(NAME, alias="live", reason="first eraser"),
            audit=AuditSpec(live_draws=LIVE_DRAWS),
        ),
        registry=registry,
    )
    print(leace.audit.format_table())
    print(f"verdict at fitting time: {card_verdict(leace.card).sentence()}")
    fresh = audit_stored_version(
        registry, NAME, leace.version_id, load_labelled_sample(march, attribute="pronoun", task="field")
    )
    print(
        f"fresh audit {fresh.record.number} of {NAME} {leace.version_id}, on the {fresh.audit.n_heldout} profiles "
        f"that signed up in March: {fresh.verdict.sentence()}"
    )
    inlp = fit_version(
        sample,
        FitRequest(
            MethodSpec("inlp", params={"classifier": "moments", "max_iter": 30}),
            StoreSpec(NAME),
            audit=AuditSpec(nonlinear=False, live_draws=LIVE_DRAWS),
        ),
        registry=registry,
    )
    print(f"\nstored {leace.version_id} (LEACE, live) and {inlp.version_id} (INLP, {inlp.card['rank']} directions)")
    registry.promote(NAME, inlp.version_id, reason="demo: try INLP in production")
    print(f"promoted {inlp.version_id} to live\n")

    print(f"1b. Guard the pronoun and the age bracket together, and their intersection, in one eraser ({JOINT_NAME})")
    both = load_labelled_sample(before_march, attribute=["pronoun", "age_bracket"], joint=True, task="field")
    joint = fit_version(
        both,
        FitRequest(
            MethodSpec("leace"),
            StoreSpec(JOINT_NAME, alias="live"),
            audit=AuditSpec(nonlinear=False, live_draws=LIVE_DRAWS),
        ),
        registry=registry,
    )
    print(f"stored {joint.version_id} (LEACE, rank {joint.card['rank']}, linear probes only)")
    print("\n".join(attributes_text(joint.card)))
    print(f"verdict at fitting time: {card_verdict(joint.card).sentence()}\n")

    port = _free_port()
    print(f"2. Start the service on 127.0.0.1:{port}")
    with _service(port) as base, VeilClient(base, token=ADMIN_TOKEN, batch_size=512) as veil:
        print(f"serving: {veil.ready()['erasers']}")
        cleaned = veil.apply(NAME, profiles.embedding)
        print(
            f"cleaned {cleaned.vectors.shape[0]} profiles through the client in batches of 512 with {cleaned.version}\n"
        )

        print("3. Profile search through faiss (inner product), before and after, with and without re-indexing")
        query_rows = np.arange(0, profiles.embedding.shape[0], 10)
        queries = profiles.embedding[query_rows]
        raw_index = _raw_index(profiles.embedding)
        before = _search(raw_index, queries, query_rows)
        print(f"   raw index, raw queries:                     {_shares(before, query_rows, profiles)}")
        searched = veil.search_vectors(NAME, queries, exact=True)
        through = _search(raw_index, searched.vectors, query_rows)
        print(f"   raw index, search vectors (no re-index):    {_shares(through, query_rows, profiles)}")
        np.save(corpus := DEMO_INDEXES / "profiles-raw.npy", profiles.embedding)
        cleaned_index, manifest = _reindex(registry, searched.version, corpus)
        pinned = veil.apply(NAME, queries, version=manifest["version"])  # queries on the index's own version
        reindexed = _search(cleaned_index, pinned.vectors, query_rows)
        print(f"   re-indexed with veil apply, cleaned queries: {_shares(reindexed, query_rows, profiles)}")
        print(
            f"   both with {searched.version}; the same 10 profiles for {_same(reindexed, through)} of "
            f"{query_rows.size} queries"
        )
        base_rate = geometry.label_base_rate(np.unique(profiles.pronoun, return_inverse=True)[1])
        print(
            f"   (pronoun base rate {base_rate:.3f}: who the neighbours are depends on more than the linear\n"
            "   directions erased; see the nonlinear probes' and 10-NN rows, and the ranking-fairness rows)\n"
        )

        print("4. Drift checks on live traffic samples")
        # Normal traffic: profiles the fit never saw (the March sign-ups), as live traffic is.
        signed_up_in_march = profiles.embedding[profiles.embedding.shape[0] * 4 // 5 :]
        normal = signed_up_in_march[np.random.default_rng(1).choice(signed_up_in_march.shape[0], 400, replace=False)]
        quiet = veil.drift(NAME, normal, labels=None)
        print(f"   a normal sample (400, unlabelled):  {quiet['status']}  {quiet['reasons'] or ''}")
        print(f"      judged by {_rule(quiet)}")
        spread = float(np.sqrt(np.var(normal, axis=0).sum()))
        shift = np.random.default_rng(2).normal(size=normal.shape[1])
        shifted = (normal + 0.5 * spread * shift / np.linalg.norm(shift)).astype(np.float32)
        loud = veil.drift(NAME, shifted, labels=None)
        print(f"   the same sample, shifted:           {loud['status']}  {'; '.join(loud['reasons'])}")
        print(f"      judged by {_rule(loud)}")
        several = veil.drift(JOINT_NAME, normal)
        print(
            f"   the normal sample against {JOINT_NAME}: {several['status']} ({_rule(several)}), by attribute "
            "(pseudo-labels):"
        )
        for attribute, figures in several["attributes"].items():
            gap = figures["leakage_gap"]
            # The first attribute's figures are the answer's headline ones, named without a prefix.
            name = "" if attribute == next(iter(several["attributes"])) else f"{attribute}: "
            p_values = several.get("p_values") or {}
            p_text = f", p = {p_values[name + 'leakage_gap']:.2g}" if name + "leakage_gap" in p_values else ""
            print(
                f"     {attribute}: prior shift {figures['prior_shift']:.3f}, leakage gap "
                f"{'-' if gap is None else f'{gap:.3f}'}{p_text}"
            )
        moved = veil.counterfactual(JOINT_NAME, normal[:5], {"pronoun": "she", "age_bracket": "over 50"})
        distance = np.linalg.norm(moved.vectors - veil.apply(JOINT_NAME, normal[:5]).vectors, axis=1).mean()
        print(
            f"   counterfactuals name a target per attribute: 5 profiles as 'she, over 50' with {moved.version}, "
            f"{float(distance):.3f} from their cleaned vectors\n"
        )

        print("5. Roll back, and keep searching while the new index is built")
        event = registry.rollback(NAME, reason="demo: back to LEACE")
        print(f"   registry: live {event.from_version} -> {event.to_version}")
        deadline = time.monotonic() + 15
        while veil.apply(NAME, profiles.embedding[:1]).version != event.to_version and time.monotonic() < deadline:
            time.sleep(0.25)
        print(f"   the service now answers with {veil.apply(NAME, profiles.embedding[:1]).version}")
        print(f"   the index holds {manifest['version']} vectors (its manifest says so): live queries must not use it")
        during = veil.search_vectors(NAME, queries, exact=True)
        interim = _search(raw_index, during.vectors, query_rows)
        print(f"   meanwhile, raw index + search vectors ({during.version}): {_shares(interim, query_rows, profiles)}")
        rebuilt, rebuilt_manifest = _reindex(registry, during.version, corpus)
        switched = _search(rebuilt, veil.apply(NAME, queries, version=rebuilt_manifest["version"]).vectors, query_rows)
        print(
            f"   new index built with veil apply ({rebuilt_manifest['version']}): the same 10 profiles for "
            f"{_same(switched, interim)} of {query_rows.size} queries; reads switch to it"
        )

        print("\n6. Record the service's live check for the auditors (what a scheduled veil patrol does)")
        run_patrol(
            registry, NAME, service=base, token=None, sample=None, every=60.0, rounds=1,
            say=lambda line: print(f"   {line}"),
        )  # fmt: skip

    print("\nHistory of the live alias:")
    for entry in registry.history(NAME):
        print(
            f"   {entry.event}. {entry.action:8} {entry.from_version or '-':20} -> {entry.to_version}  ({entry.reason})"
        )
    print("\nReports:")
    for version in registry.versions(NAME):
        print(f"   {DEMO_REGISTRY / NAME / 'versions' / version.id / REPORT_FILE}  ({version.method}, at fitting time)")
    DEMO_REPORT.write_text(version_report(registry, NAME, leace.version_id), encoding="utf-8")
    print(
        f"   {DEMO_REPORT}  (LEACE with its fresh audit and live check: what an auditor reads; veil report writes it)"
    )
    print(f"Live checks: .venv/bin/veil checks {NAME} --registry {DEMO_REGISTRY}")
    print(f"\nDone in {time.perf_counter() - started:.0f} s.")
    print(f"Try: .venv/bin/veil versions {NAME} --registry {DEMO_REGISTRY}")
    print(
        "Linear erasure leaves nonlinear traces (see the nonlinear probes' rows); these figures hold for this sample's "
        "distribution only, and are no legal or compliance guarantee."
    )


if __name__ == "__main__":
    main()
