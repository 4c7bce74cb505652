"""One description of a fit: a request that cannot be run is refused when it is made, by name."""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

import pytest

from veil.checks.thresholds import AuditThresholds, Band
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, ReadingSpec, StoreSpec


@pytest.mark.parametrize(
    ("make", "message"),
    [
        (lambda: MethodSpec("leace", holdout=0.0), "held-out share must be between 0 and 1, got 0.0"),
        (lambda: MethodSpec("leace", holdout=1.5), "held-out share must be between 0 and 1, got 1.5"),
        (lambda: AuditSpec(rows=1), "audit sample needs at least 2 rows, got 1"),
        (lambda: ReadingSpec(chunk_rows=0), "chunk_rows must be at least 1, got 0"),
        (lambda: ReadingSpec(fit_sample_rows=1), "fitting sample needs at least 2 rows, got 1"),
        (lambda: ReadingSpec(engine="spark"), "unknown engine 'spark'; choose one of local, dask"),
        (lambda: ReadingSpec(workers=0), "workers must be at least 1, got 0"),
        (lambda: StoreSpec("../elsewhere"), "invalid eraser name"),
        (lambda: StoreSpec("profiles", alias="a b"), "invalid alias"),
        (lambda: AuditSpec(claims=("quadratic",)), "unknown threat 'quadratic'"),
        (lambda: AuditSpec(claims=("linear", "linear")), "'linear' is claimed twice"),
        (lambda: AuditSpec(claims=()), "claim each threat once, and at least one"),
        (
            lambda: FitRequest(MethodSpec("leace"), StoreSpec("p"), audit=AuditSpec(claims=("context-linear",))),
            "'context-linear' is within a context: claim it for a fit with --given",
        ),
        (lambda: StoreSpec("profiles", alias="live", force=True), "give --alias and --reason"),
        (lambda: StoreSpec("profiles", force=True, reason="why"), "give --alias and --reason"),
    ],
)
def test_a_request_that_cannot_run_is_refused_when_made(make: Callable[[], Any], message: str) -> None:
    # Bad names are the registry's refusal (InvalidReferenceError); both kinds are ValueErrors the CLI reports.
    with pytest.raises(ValueError, match=message):
        make()


def test_a_request_is_a_record_its_card_entry_reads_back_as_json() -> None:
    options = {"max_iter": 30}
    request = FitRequest(
        MethodSpec("inlp", params=options, seed=3, targets=("linear <= majority + 0.02",)),
        StoreSpec("profiles", alias="canary", reason="trial"),
        audit=AuditSpec(nonlinear=False, thresholds=AuditThresholds(linear_gap=Band(0.01, 0.02))),
        reading=ReadingSpec(chunk_rows=500, engine="dask", workers=3),
    )
    options["max_iter"] = 1  # the caller's dict changing later does not change the request
    recorded = json.loads(json.dumps(request.to_dict()))
    assert recorded["fit"]["params"] == {"max_iter": 30}
    assert recorded["fit"]["sweep"] is True  # targets imply a sweep
    assert recorded["fit"]["targets"] == ["linear <= majority + 0.02"]
    assert recorded["audit"]["probes"] == "linear"
    assert recorded["audit"]["thresholds"]["linear_gap"] == {"warn": 0.01, "alert": 0.02}
    assert recorded["store"] == {
        "name": "profiles",
        "alias": "canary",
        "reason": "trial",
        "embedding_model": None,
        "force": False,
    }
    assert recorded["reading"]["engine"] == "dask"
    with pytest.raises(TypeError):
        request.fit.params["max_iter"] = 2  # type: ignore[index]


@pytest.mark.parametrize(
    ("spec", "claims"),
    [
        (MethodSpec("leace"), ("linear",)),
        (MethodSpec("rlace"), ("linear",)),
        (MethodSpec("transport"), ("linear",)),
        (MethodSpec("meanproj", given="field"), ("linear", "context-linear")),
        (MethodSpec("leace", given="field", guard_population=False), ("context-linear",)),
        (MethodSpec("transport", given="field"), ("context-linear",)),
        (MethodSpec("transport", given="field", params={"then_leace": True}), ("linear", "context-linear")),
    ],
)
def test_a_version_claims_what_its_method_is_built_to_remove(spec: MethodSpec, claims: tuple[str, ...]) -> None:
    # Linear guardedness: equal class means leave no linear reader (LEACE's theorem); every method here aims at
    # it, within each context value with --given, and the population only where it is guarded.
    assert FitRequest(spec, StoreSpec("p")).claims == claims
    # Asked for, the claim replaces the method's, in the order of the threats.
    asked = FitRequest(spec, StoreSpec("p"), audit=AuditSpec(claims=("neighbours", "linear")))
    assert asked.claims == ("linear", "neighbours")
    assert asked.to_dict()["audit"]["claims"] == ["linear", "neighbours"]
