"""The audit within a context: every probe trained and tested within each value of a column, against the floor.

On the committed sample (attribute ``pronoun``, context ``field``): fitted by the Python API, by ``veil fit
--given field``, audited afresh by ``veil audit`` and checked live through the client and the service.
"""

from __future__ import annotations

import collections
import json
from dataclasses import asdict, dataclass
from pathlib import Path

import httpx
import jsonschema
import numpy as np
import pytest
from scipy import stats
from sklearn.model_selection import train_test_split

from veil.audit import audit, fit_and_audit
from veil.audit.context_report import FLOOR_MEANING, ContextAudit
from veil.audit.report import ProbeScore
from veil.checks.thresholds import AuditThresholds
from veil.checks.verdict import context_figures, judge_audit
from veil.erasers import INLP, LEACE
from veil.registry import Registry
from veil.registry.card import card_audit
from veil.reporting import version_report
from veil.samples.harbourline import load_harbourline_profiles
from veil_client import AsyncVeilClient, VeilClientError

from .service_fixtures import app_for
from .test_cli import SAMPLE, run
from .test_evidence_schema import _evidence, _validate

EPS = float(np.finfo(np.float64).eps)
NAME = "profiles"


def _independent_floor(field: np.ndarray, pronoun: np.ndarray) -> float:
    """Each field's commonest pronoun, counted by collections.Counter, over every row."""
    counts = collections.Counter(zip(field.tolist(), pronoun.tolist(), strict=True))
    majority: dict[str, int] = collections.defaultdict(int)
    for (value, _), count in counts.items():
        majority[value] = max(majority[value], count)
    return sum(majority.values()) / field.size


def _wilson_excess(score: ProbeScore, floor: float) -> float:
    """The excess over the floor from scipy's Wilson interval (``binomtest(...).proportion_ci``), one-sided."""
    hits = round(score.accuracy * score.n)
    low = stats.binomtest(hits, score.n).proportion_ci(confidence_level=0.95, method="wilson").low
    return max(0.0, low - floor)


def test_a_given_leace_reads_less_within_the_field_than_plain_leace_and_the_figures_are_what_they_say() -> None:
    sample = load_harbourline_profiles()
    rows = np.arange(sample.pronoun.size)
    fit, held = train_test_split(rows, test_size=0.2, random_state=0, stratify=sample.pronoun)
    x, z, field = sample.embedding, sample.pronoun, sample.field
    reports = {}
    for guarded in (False, True):
        eraser = LEACE().fit(x[fit], z[fit], given=field[fit] if guarded else None)
        report = audit(eraser, x[held], z[held], given=field[held], given_name="field", nonlinear=False)
        assert report.context is not None
        reports[guarded] = report.context
    plain, given = reports[False], reports[True]
    # Guarded within the field, the linear reading there falls below plain LEACE's, their 95% intervals apart.
    assert given.after["linear"].interval_high < plain.after["linear"].interval_low
    floor = _independent_floor(field[held], z[held])
    for context in (plain, given):
        assert context.skipped == ()  # every field has rows of both pronouns (a hundred or more)
        assert context.rows == held.size
        assert abs(context.floor - floor) <= 4 * EPS
        # The raw rows read the pronoun far beyond what the field alone tells.
        assert context.before["linear"].excess > 0.2
        assert abs(_wilson_excess(context.after["linear"], context.floor) - context.after["linear"].excess) < 1e-9
    # The worst field is the one whose reading lies farthest beyond its own floor (scipy's Wilson interval).
    excess = {
        value.value: _wilson_excess(value.after["linear"], _independent_floor(field[held][field[held] == value.value],
                                                                               z[held][field[held] == value.value]))
        for value in plain.values
    }  # fmt: skip
    ranked = sorted(excess.values(), reverse=True)
    assert ranked[0] - ranked[1] > 1e-6  # a clear worst: round-off cannot decide it
    assert plain.worst == max(excess, key=lambda value: excess[value])
    assert ContextAudit.from_dict(json.loads(json.dumps(asdict(plain)))) == plain


def test_a_value_too_small_to_cross_validate_is_skipped_by_name() -> None:
    sample = load_harbourline_profiles()
    x, z, field = sample.embedding[:600], sample.pronoun[:600], sample.field[:600].astype(object)
    # One row gets a field of its own, and one field keeps a single row of one pronoun.
    field[0] = "harbour pilot"
    lone = np.flatnonzero(field == "trades")
    she = lone[z[lone] == "she"]
    field[she[1:]] = "education"
    eraser = LEACE().fit(sample.embedding[600:], sample.pronoun[600:])
    context = audit(eraser, x, z, given=field, given_name="field", nonlinear=False).context
    assert context is not None
    skipped = {s.value: s for s in context.skipped}
    assert set(skipped) == {"harbour pilot", "trades"}
    assert "the context alone tells" in skipped["harbour pilot"].reason
    assert "class 'she' has 1 row(s)" in skipped["trades"].reason
    assert context.rows == 600 - skipped["harbour pilot"].rows - skipped["trades"].rows
    assert "skipped 'trades'" in "\n".join(context.lines())


@dataclass(frozen=True)
class Fitted:
    registry: Path
    fresh: Path
    without_field: Path


@pytest.fixture(scope="module")
def fitted(tmp_path_factory: pytest.TempPathFactory) -> Fitted:
    """A ``--given field`` version fitted on two thirds of the committed sample; the rest kept as fresh samples."""
    root = tmp_path_factory.mktemp("context")
    with np.load(SAMPLE) as stored:
        arrays = {key: stored[key] for key in stored.files}
    order = np.random.default_rng(0).permutation(arrays["pronoun"].size)
    parts = {"fit": order[:2000], "fresh": order[2000:]}
    for part, rows in parts.items():
        np.savez(root / f"{part}.npz", **{key: value[rows] for key, value in arrays.items()})
    np.savez(
        root / "without_field.npz", **{key: value[parts["fresh"]] for key, value in arrays.items() if key != "field"}
    )
    registry = root / "registry"
    result = run(
        "fit", "--data", root / "fit.npz", "--attribute", "pronoun", "--given", "field", "--method", "leace",
        "--name", NAME, "--registry", registry, "--probes", "linear", "--alias", "live",
        "--audit-threshold", "context_neighbour_excess=0,0",
    )  # fmt: skip
    assert result.code == 0, result.err
    return Fitted(registry, root / "fresh.npz", root / "without_field.npz")


def test_a_given_version_shows_its_reading_within_the_field_everywhere(fitted: Fitted) -> None:
    stored = Registry(fitted.registry).read_version(NAME, "1")
    card = stored.card
    context = card_audit(card).context
    assert context is not None
    assert context.column == "field"
    assert context.rows == card["data"]["heldout_rows"]
    shown = run("show", NAME, "1", "--registry", fitted.registry)
    assert shown.code == 0, shown.err
    for text in ("within each value of 'field'", FLOOR_MEANING, "within the context", f"worst value {context.worst!r}"):
        assert text in shown.out
    page = version_report(Registry(fitted.registry), NAME, "1")
    assert "<h2>Within the context</h2>" in page
    assert FLOOR_MEANING in page
    document = _evidence(fitted.registry, NAME, "1")
    _validate(document)
    assert document["audit"]["context"]["worst"] == context.worst
    # The schema reads the context: a floor above 1 is refused.
    broken = {**document, "audit": {**document["audit"], "context": {**document["audit"]["context"], "floor": 2}}}
    with pytest.raises(jsonschema.ValidationError, match="is not valid under any of the given schemas"):
        _validate(broken)


def test_the_verdict_judges_the_figures_beyond_the_context_by_the_cards_thresholds(fitted: Fitted) -> None:
    card = Registry(fitted.registry).read_version(NAME, "1").card
    report = card_audit(card)
    assert report.context is not None
    figures = context_figures(report.context)
    assert figures["context_linear_gap"] == report.context.after["linear"].excess
    verdict = card["verdict"]
    assert verdict["thresholds"]["context_neighbour_excess"] == {"warn": 0.0, "alert": 0.0}
    assert {key: verdict["figures"][key] for key in figures} == figures
    # At the card's band (0, 0) the neighbour share within the field alerts; the default band would say otherwise.
    # The version does not claim that threat (a linear eraser claims the linear readers), so the headline stays
    # as its claimed threats say, and the threat is shown with its own status.
    within_neighbours = verdict["threats"]["context-neighbours"]
    assert "context-neighbours" not in verdict["claimed"]
    assert within_neighbours["status"] == "alert"
    assert any(r.startswith("within the context, the 10-NN attribute share") and r.endswith("(alert at 0)")
               for r in within_neighbours["reasons"])  # fmt: skip
    default = judge_audit(report, AuditThresholds())
    assert not any(r.endswith("(alert at 0)") for r in default.reasons)


def test_a_fresh_audit_reads_the_versions_context_column_when_the_sample_has_it(fitted: Fitted) -> None:
    common = ("--attribute", "pronoun", "--registry", fitted.registry, "--probes", "linear", "--json")
    audited = run("audit", NAME, "1", "--data", fitted.fresh, *common)
    assert audited.code == 0, audited.err
    body = json.loads(audited.out)
    assert body["data"]["context"] == "field"
    context = ContextAudit.from_dict(body["audit"]["context"])
    assert context.rows == 1000
    assert context.column == "field"
    with np.load(fitted.fresh) as fresh:
        assert abs(context.floor - _independent_floor(fresh["field"], fresh["pronoun"])) <= 4 * EPS
    assert body["verdict"]["figures"]["context_linear_gap"] == context.after["linear"].excess
    # A sample without the column is audited as a whole, and the record says why.
    whole = run("audit", NAME, "1", "--data", fitted.without_field, *common)
    assert whole.code == 0, whole.err
    body = json.loads(whole.out)
    assert body["audit"]["context"] is None
    assert body["data"]["context"] is None
    assert any("not audited within the version's context 'field'" in note for note in body["notes"])


@pytest.mark.anyio
async def test_a_live_check_with_the_context_column_reads_within_each_value(fitted: Fitted) -> None:
    with np.load(fitted.fresh) as fresh:
        x, z, field = fresh["embedding"], fresh["pronoun"].tolist(), fresh["field"].tolist()
    app = app_for(fitted.registry)
    async with app.router.lifespan_context(app):
        transport = httpx.ASGITransport(app=app)
        async with AsyncVeilClient("http://veil.test", transport=transport) as client:
            within = await client.drift(NAME, x, z, context=field)
            whole = await client.drift(NAME, x, z)
            # Without labels the figure would judge the stored probe's own guesses: refused, naming what is missing.
            with pytest.raises(VeilClientError, match="a context needs the attribute's labels"):
                await client.drift(NAME, x, context=field)
    context = ContextAudit.from_dict(within["context"])
    assert context.rows == len(field)
    assert sorted(v.value for v in context.values) == sorted(set(field))
    assert abs(context.floor - _independent_floor(np.array(field), np.array(z))) <= 4 * EPS
    assert within["context_leakage_gap"] == context.after["linear"].excess
    # Without the column, the population's figures as before, and the same ones.
    assert whole["context"] is None
    assert whole["context_leakage_gap"] is None
    assert whole["leakage"] == within["leakage"]


def test_fit_and_audit_fits_and_reads_within_the_context() -> None:
    sample = load_harbourline_profiles()
    x, z, field = sample.embedding, sample.pronoun, sample.field
    _, within = fit_and_audit(LEACE(), x, z, given=field, given_name="field", nonlinear=False)
    eraser, plain = fit_and_audit(LEACE(), x, z, nonlinear=False)
    assert plain.context is None
    assert within.context is not None
    assert within.context.column == "field"
    # The same split (seeded), so the plain fit audited within the field is the comparison: guarding within
    # the field reads less there.
    held = train_test_split(np.arange(z.size), test_size=0.3, random_state=0, stratify=z)[1]
    plain_within = audit(eraser, x[held], z[held], given=field[held], nonlinear=False).context
    assert plain_within is not None
    assert within.context.after["linear"].accuracy < plain_within.after["linear"].accuracy
    with pytest.raises(ValueError, match="cannot be fitted within a context"):
        fit_and_audit(INLP(classifier="moments", max_iter=2), x, z, given=field, nonlinear=False)


def test_fit_and_audit_refuses_a_context_it_cannot_split() -> None:
    sample = load_harbourline_profiles()
    x, z, field = sample.embedding[:300], sample.pronoun[:300], sample.field[:300]
    with pytest.raises(ValueError, match="one value per row"):
        fit_and_audit(LEACE(), x, z, given=sample.field[:350], nonlinear=False)
    with pytest.raises(ValueError, match="takes one context column"):
        fit_and_audit(LEACE(), x, z, given={"field": field}, nonlinear=False)
