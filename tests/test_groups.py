"""Group folds and the transfer probe (``--group COLUMN``): readers that never saw a row's group.

The data: each group (an author, a first name) has its own random offset
vector, and the attribute is a function of the group only, so nothing about
the attribute carries over from one group to another.  A reader on ordinary
folds meets every audited group in training and reads the attribute off the
group's offset; a reader on group folds meets only new groups and reads
nothing.  The references are scikit-learn's ``StratifiedGroupKFold``,
``GroupKFold`` and ``cross_val_score`` and, for what chance allows, scipy's
binomial distribution.
"""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from numpy.typing import NDArray
from scipy import stats
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import StratifiedGroupKFold, cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from veil.audit import audit, fit_and_audit
from veil.audit.group_report import NO_GROUP_FOLDS
from veil.audit.groups import FittingRows
from veil.audit.probes import classification_score, fold_splitter, group_folds, linear_probe
from veil.audit.report import AuditReport
from veil.audit.within import context_audit
from veil.checks.thresholds import AuditThresholds
from veil.checks.verdict import judge_audit
from veil.erasers import INLP, LEACE
from veil.errors import DataError
from veil.fitting.job import fit_version
from veil.fitting.request import AuditSpec, FitRequest, MethodSpec, ReadingSpec, StoreSpec
from veil.registry import Registry
from veil.registry.card import card_audit, format_card
from veil.samples.groups import columns_to_read, group_key, with_group
from veil.samples.sources import load_labelled_sample
from veil.samples.splitting import held_out_groups
from veil.samples.streaming import open_stream

from .test_cli import run
from .test_evidence_schema import _evidence, _validate
from .test_stored_versions import FIXTURE

GROUPS, PER_GROUP, DIM = 80, 30, 24


def named(
    groups: int = GROUPS, per_group: int = PER_GROUP, dim: int = DIM, seed: int = 0, prefix: str = "name"
) -> tuple[NDArray[np.float64], NDArray[np.str_], NDArray[np.str_]]:
    """Rows whose attribute is carried only by their group: each group an offset of its own, its class drawn once.

    Half the groups are of each class, so the class a new group has is a coin toss for any reader; the offsets
    are twice the rows' own spread, so a reader that has met a group tells its rows apart from others'.
    """
    rng = np.random.default_rng(seed)
    offsets = 2.0 * rng.normal(size=(groups, dim))
    classes = rng.permutation(np.arange(groups) % 2)
    group = np.repeat(np.arange(groups), per_group)
    x = offsets[group] + rng.normal(size=(group.size, dim))
    return x, np.where(classes[group] == 1, "she", "he"), np.array([f"{prefix}{i:03d}" for i in range(groups)])[group]


def _codes(values: NDArray[np.str_]) -> NDArray[np.intp]:
    return np.unique(values, return_inverse=True)[1].astype(np.intp)


def _chance_band(majority: float, groups: int) -> tuple[float, float]:
    """Where an accuracy that reads nothing lies (99.9%), counted in groups.

    Rows of one group share one offset, so a reader's errors come a group at a time: the count that decides
    the spread is the groups' (common practice for clustered rows), from scipy's binomial distribution.
    """
    low, high = stats.binom.interval(0.999, groups, majority)
    return low / groups, high / groups


def test_group_folds_agree_with_scikit_learns_cross_val_score_with_stratified_group_kfold() -> None:
    x, z, names = named()
    codes, groups = _codes(z), _codes(names)
    ours = classification_score(linear_probe(0), x, codes, folds=5, random_state=0, groups=groups)
    # Reference: scikit-learn's cross_val_score with StratifiedGroupKFold, fold accuracies weighted by fold rows.
    cv = StratifiedGroupKFold(n_splits=5, shuffle=True, random_state=0)
    scores = cross_val_score(linear_probe(0), x, codes, groups=groups, cv=cv)
    sizes = [test.size for _, test in cv.split(x, codes, groups)]
    # Counts, not shares, are compared: each fold's accuracy is hits / rows exactly, so rounding recovers hits.
    assert ours.hits == sum(round(score * size) for score, size in zip(scores, sizes, strict=True))
    for train, test in fold_splitter(codes, 5, random_state=0, groups=groups).split(x, codes, groups):
        assert not set(groups[train]) & set(groups[test])  # every group in one fold


def test_ordinary_folds_over_read_a_group_identity_and_group_folds_do_not() -> None:
    x, z, names = named()
    _, report = fit_and_audit(LEACE(), x, z, group=names, group_name="first_name", nonlinear=False)
    across = report.groups
    assert across is not None
    assert across.column == "first_name"
    # The split kept names apart: the judged names are names the fit never saw.
    assert across.shared_groups == 0
    assert across.fit_groups is not None
    assert across.fit_groups + across.groups == GROUPS
    # Ordinary folds read the attribute off the recurring names, far beyond anything group folds read.
    assert across.ordinary_after.interval_low > across.grouped_after.interval_high
    assert across.ordinary_after.accuracy > _chance_band(across.ordinary_after.majority, across.groups)[1]
    # Group folds read what chance allows over the judged names, before erasure too: nothing carries over.
    for score in (across.grouped_before, across.grouped_after):
        low, high = _chance_band(score.majority, across.groups)
        assert low <= score.accuracy <= high
    # The report's linear figures are the group folds'.
    assert report.leakage.linear_after == across.grouped_after
    # The verdict judges the worst reading: here the ordinary folds', and says so.
    verdict = judge_audit(report, AuditThresholds())
    assert verdict.figures["linear_gap"] == across.ordinary_after.excess
    assert any("(ordinary folds)" in reason for reason in verdict.reasons)
    assert "ordinary folds" in report.format_table()


def test_the_held_out_part_is_a_stratified_group_fold_and_the_figures_are_scikit_learns() -> None:
    x, z, names = named(seed=1)
    _, report = fit_and_audit(LEACE(), x, z, group=names, holdout=0.25, nonlinear=False, random_state=3)
    assert report.groups is not None
    # Reference: the first fold of scikit-learn's StratifiedGroupKFold (round(1 / holdout) folds) is held out.
    rows = np.arange(z.size)
    fit, held = next(StratifiedGroupKFold(n_splits=4, shuffle=True, random_state=3).split(rows, z, names))
    eraser = LEACE().fit(x[fit], z[fit])
    erased, codes, groups = eraser.transform(x[held]), _codes(z[held]), _codes(names[held])
    folds = group_folds(codes, groups, 5)
    cv = StratifiedGroupKFold(n_splits=folds, shuffle=True, random_state=3)
    scores = cross_val_score(linear_probe(3), erased, codes, groups=groups, cv=cv)
    sizes = [test.size for _, test in cv.split(erased, codes, groups)]
    assert report.leakage.linear_after.n == held.size
    assert report.groups.grouped_after.hits == sum(round(s * n) for s, n in zip(scores, sizes, strict=True))
    # The transfer probe: scikit-learn's standardised logistic regression fitted on the cleaned fitting rows and
    # scored on the cleaned held-out rows.
    reader = make_pipeline(StandardScaler(), LogisticRegression(max_iter=3000, random_state=3))
    reader.fit(eraser.transform(x[fit]), _codes(z[fit]))
    assert report.groups.transfer_after is not None
    assert report.groups.transfer_after.hits == round(reader.score(erased, codes) * held.size)


def test_a_transfer_probe_reads_what_the_fit_left_in_new_groups() -> None:
    # INLP removes a few directions learnt from its fitting rows; the transfer probe learns from those rows
    # cleaned.  Trained and judged on rows whose groups it never saw, it reads within chance of majority here.
    x, z, names = named(seed=2)
    _, report = fit_and_audit(INLP(), x, z, group=names, nonlinear=True, holdout=0.3)
    across = report.groups
    assert across is not None
    assert across.transfer_after is not None
    assert across.transfer_reader in {"quadratic", "kernel", "trees", "mlp"}
    assert across.transfer_reader_after is not None
    for score in (across.transfer_after, across.transfer_reader_after):
        low, high = _chance_band(score.majority, across.groups)
        assert low <= score.accuracy <= high
    assert across.ordinary_after.interval_low > across.transfer_after.interval_high
    text = "\n".join(across.lines())
    assert "transfer" in text
    assert "never saw its group" in text


def test_a_class_carried_by_one_group_cannot_be_read_on_group_folds() -> None:
    codes = np.array([0, 0, 0, 1, 1, 1, 1, 1], dtype=np.intp)
    groups = np.array([0, 0, 0, 1, 1, 2, 2, 3], dtype=np.intp)
    with pytest.raises(ValueError, match="carried by 1 group"):
        group_folds(codes, groups, 5)
    assert group_folds(codes, np.array([0, 0, 4, 1, 1, 2, 2, 3], dtype=np.intp), 5) == 2


def test_within_a_context_the_readers_keep_each_group_in_one_fold() -> None:
    x, z, names = named(seed=4)
    # Two context values, each holding half the groups.
    field = np.where(_codes(names) % 2 == 0, "trades", "software")
    codes = _codes(z)
    common = {"classes": ("he", "she"), "column": "field", "folds": 5, "nonlinear": False, "random_state": 0}
    mixed = context_audit(x, x, codes, field, **common)
    kept = context_audit(x, x, codes, field, groups=_codes(names), **common)
    assert kept.after["linear"].interval_high < mixed.after["linear"].interval_low
    low, high = _chance_band(kept.floor, GROUPS)
    assert low <= kept.after["linear"].accuracy <= high


def test_held_out_groups_keep_every_group_on_one_side_however_the_rows_are_chunked() -> None:
    names = named(groups=400, per_group=5)[2]
    whole = held_out_groups(names, fraction=0.3, seed=7)
    order = np.random.default_rng(0).permutation(names.size)
    parts = np.array_split(order, 7)
    chunked = np.empty_like(whole)
    for part in parts:
        chunked[part] = held_out_groups(names[part], fraction=0.3, seed=7)
    np.testing.assert_array_equal(chunked, whole)
    for name in np.unique(names):
        assert np.unique(whole[names == name]).size == 1
    # Reference: the held-out groups are a binomial draw of 400 at 0.3 (scipy.stats.binom, 99.9% interval).
    held = np.unique(names[whole]).size
    low, high = stats.binom.interval(0.999, 400, 0.3)
    assert low <= held <= high


def _files(root: Path) -> dict[str, tuple[str, ...]]:
    """The same rows with a first-name column as .npz, as .npy + .csv and as Parquet; each with its read options."""
    x, z, names = named(groups=30, per_group=20)
    x = x.astype(np.float32)
    np.savez(root / "s.npz", embedding=x, gender=z, first_name=names)
    np.save(root / "s.npy", x)
    lines = ["gender,first_name", *(f"{a},{b}" for a, b in zip(z, names, strict=True))]
    (root / "s.csv").write_text("\n".join(lines) + "\n")
    table = pa.table({"embedding": list(x), "gender": z, "first_name": names})
    pq.write_table(table, root / "s.parquet", row_group_size=150)
    return {"npz": (str(root / "s.npz"),), "csv": (str(root / "s.npy"), str(root / "s.csv")),
            "parquet": (str(root / "s.parquet"),)}  # fmt: skip


@pytest.mark.parametrize("kind", ["npz", "csv", "parquet", "parquet-streamed", "csv-streamed"])
def test_a_group_column_is_read_as_a_context_column_is_from_every_format(tmp_path: Path, kind: str) -> None:
    files = _files(tmp_path)
    fmt, streamed = kind.split("-")[0], kind.endswith("streamed")
    path, *labels = files[fmt]
    options = {"attribute": "gender", "given": columns_to_read(None, "first_name")}
    if labels:
        options["labels"] = labels[0]
    read = open_stream(path, **options) if streamed else load_labelled_sample(path, **options)
    sample = with_group(read, "first_name")
    assert group_key(sample) == "first_name"
    assert sample.context_keys == ()
    chunks = [part.load() for part in sample.partitions(150)]
    assert all(not chunk.contexts for chunk in chunks)
    groups = np.concatenate([chunk.group for chunk in chunks if chunk.group is not None])
    np.testing.assert_array_equal(groups, named(groups=30, per_group=20)[2])
    with pytest.raises(DataError, match="both as a context"):
        columns_to_read("first_name", "first_name")


def test_veil_fit_and_audit_with_group_folds_end_to_end(tmp_path: Path) -> None:
    x, z, names = named()
    np.savez(tmp_path / "fit.npz", embedding=x.astype(np.float32), gender=z, first_name=names)
    fresh_x, fresh_z, fresh_names = named(seed=9, prefix="new")
    np.savez(tmp_path / "fresh.npz", embedding=fresh_x.astype(np.float32), gender=fresh_z, first_name=fresh_names)
    registry = tmp_path / "registry"
    common = ("--attribute", "gender", "--registry", registry, "--probes", "linear")
    fitted = run("fit", "--data", tmp_path / "fit.npz", "--method", "leace", "--name", "g", "--group", "first_name",
                 *common)  # fmt: skip
    assert fitted.code == 0, fitted.err
    assert "linear, group folds" in fitted.out
    card = Registry(registry).read_version("g", "1").card
    assert card["request"]["audit"]["group"] == "first_name"
    stored = card_audit(card)
    assert stored.groups is not None
    assert stored.groups.shared_groups == 0
    assert "across groups" in format_card("v1", dict(card))
    audited = run("audit", "g", "1", "--data", tmp_path / "fresh.npz", "--group", "first_name", *common)
    assert audited.code == 0, audited.err
    document = _evidence(registry, "g", "1")
    _validate(document)
    (record,) = document["fresh_audits"]
    assert record["data"]["group"] == "first_name"
    fresh = AuditReport.from_dict(record["audit"])
    assert fresh.groups is not None
    assert fresh.groups.transfer_after is None  # a fresh sample has no fitting rows
    assert fresh.groups.note is not None
    # Group folds judge new names, which this attribute's offsets do not carry over to.
    low, high = _chance_band(fresh.groups.grouped_after.majority, GROUPS)
    assert low <= fresh.groups.grouped_after.accuracy <= high
    plain = run("fit", "--data", tmp_path / "fit.npz", "--method", "leace", "--name", "p", *common)
    assert plain.code == 0, plain.err
    shown = run("show", "p", "1", "--registry", registry)
    assert NO_GROUP_FOLDS in shown.out
    assert json.loads(run("show", "p", "1", "--registry", registry, "--json").out)["audit"]["groups"] is None
    report = run("report", "g", "1", "--registry", registry, "--out", tmp_path / "r.html")
    assert report.code == 0, report.err
    assert "Across groups" in (tmp_path / "r.html").read_text()


def test_versions_stored_before_group_folds_read_say_so_and_are_judged_as_before(tmp_path: Path) -> None:
    registry = Registry(FIXTURE / "registry")
    for number in ("1", "2"):
        card = dict(registry.read_version("legacy", number).card)
        report = card_audit(card)
        assert "groups" not in card["audit"]
        assert report.groups is None
        assert NO_GROUP_FOLDS in format_card("v", card)
        # The linear threat's figure is the linear probe's, as the rule was when the card was written.
        assert judge_audit(report, AuditThresholds()).figures["linear_gap"] == report.leakage.linear_after.excess


def test_the_linear_threat_is_judged_on_the_worst_of_the_three_readings() -> None:
    x, z, names = named(seed=5)
    _, report = fit_and_audit(LEACE(), x, z, group=names, nonlinear=False)
    assert report.groups is not None
    # A transfer reading made worse than the others by hand: the verdict follows it and names it.
    worse = dataclasses.replace(report.groups.ordinary_after, interval_low=0.99, accuracy=0.995, interval_high=1.0)
    changed = dataclasses.replace(report, groups=dataclasses.replace(report.groups, transfer_after=worse))
    verdict = judge_audit(changed, AuditThresholds())
    assert verdict.figures["linear_gap"] == worse.excess
    assert any("(transfer)" in reason for reason in verdict.reasons)
    # It survives the card's JSON.
    assert AuditReport.from_json(changed.to_json()) == changed


def test_audit_takes_groups_and_fitting_rows_from_the_python_api() -> None:
    x, z, names = named(seed=6)
    fit = np.isin(names, np.unique(names)[::2])
    eraser = LEACE().fit(x[fit], z[fit])
    report = audit(eraser, x[~fit], z[~fit], group=names[~fit], nonlinear=False,
                   fitting=FittingRows(x[fit], z[fit], names[fit]))  # fmt: skip
    assert report.groups is not None
    assert report.groups.shared_groups == 0
    assert report.groups.fit_groups == GROUPS // 2
    assert report.groups.transfer_after is not None
    with pytest.raises(ValueError, match="categorical attribute"):
        audit(eraser, x[~fit], x[~fit, :1], group=names[~fit], nonlinear=False)
    # A class whose held-out rows all come from one name cannot be read by a probe that never saw that name.
    lone = (names[~fit] == names[~fit][0]) | (z[~fit] != z[~fit][0])
    with pytest.raises(ValueError, match=f"class {str(z[~fit][0])!r} is carried by 1 group"):
        audit(eraser, x[~fit][lone], z[~fit][lone], group=names[~fit][lone], nonlinear=False)


def test_a_streamed_fit_with_groups_holds_out_and_reads_what_the_fit_in_memory_does(tmp_path: Path) -> None:
    files = _files(tmp_path)
    path = files["parquet"][0]
    options = {"attribute": "gender", "given": columns_to_read(None, "first_name")}
    request = FitRequest(MethodSpec("leace", holdout=0.3), StoreSpec("g"), audit=AuditSpec(nonlinear=False,
                         group="first_name"))  # fmt: skip
    whole = fit_version(with_group(load_labelled_sample(path, **options), "first_name"), request,
                        registry=Registry(tmp_path / "whole"))  # fmt: skip
    streamed_request = dataclasses.replace(request, reading=ReadingSpec(chunk_rows=150))
    streamed = fit_version(with_group(open_stream(path, **options), "first_name"), streamed_request,
                           registry=Registry(tmp_path / "streamed"))  # fmt: skip
    assert whole.audit.groups is not None
    assert whole.audit.groups.shared_groups == 0
    # The same names held out and the same rows judged, in the same order: the raw rows read alike by every
    # reading.  (After erasure the maps agree to rounding only, the streamed moments merged chunk by chunk.)
    one, other = whole.audit.groups, streamed.audit.groups
    assert other is not None
    assert (other.groups, other.fit_groups, other.shared_groups) == (one.groups, one.fit_groups, one.shared_groups)
    assert streamed.audit.n_heldout == whole.audit.n_heldout
    assert (other.ordinary_before, other.grouped_before, other.transfer_before) == (
        one.ordinary_before,
        one.grouped_before,
        one.transfer_before,
    )
    # A request whose group the sample was not read with is refused before any row is read.
    with pytest.raises(DataError, match="group column"):
        fit_version(load_labelled_sample(path, attribute="gender"), request, registry=Registry(tmp_path / "r"))


def test_veil_fit_refuses_group_folds_the_held_out_names_cannot_make_naming_the_class(tmp_path: Path) -> None:
    rng = np.random.default_rng(0)
    # Six names, each class on three: holding out a fifth of them leaves a class on one name or none.
    names = np.array([f"n{i % 6}" for i in range(300)])
    z = np.where(np.array([i % 6 for i in range(300)]) % 2 == 0, "a", "b")
    np.savez(tmp_path / "few.npz", embedding=rng.normal(size=(300, 8)), gender=z, first_name=names)
    refused = run("fit", "--data", tmp_path / "few.npz", "--method", "leace", "--attribute", "gender", "--group",
                  "first_name", "--name", "f", "--registry", tmp_path / "registry", "--probes", "linear")  # fmt: skip
    assert refused.code != 0
    assert "--group first_name: class 'a' is carried by 1 group of the audited rows" in refused.err
    assert "unexpected failure" not in refused.err
    assert not (tmp_path / "registry" / "f").exists()
