"""Run the audit of a fitted eraser on held-out data, or of a stored map on a fresh sample."""

from __future__ import annotations

import inspect
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, TypeVar

import numpy as np
from numpy.typing import ArrayLike, NDArray
from sklearn.model_selection import GroupKFold, StratifiedGroupKFold, train_test_split
from sklearn.utils.validation import check_array, check_is_fitted

from veil.audit import geometry, probes, ranking, readers
from veil.audit.groups import FittingRows, group_audit, group_codes, group_fold_problem
from veil.audit.independence_report import IndependenceAudit
from veil.audit.independence_run import FAST, IndependenceSettings, ReaderEvidence, independence_audit
from veil.audit.report import (
    FRESH_KFOLD,
    HELD_OUT_KFOLD,
    PROBE_LABELS,
    PROBES,
    AuditReport,
    Leakage,
    ProbeProtocol,
    ProbeScore,
    RegressionScore,
    Retrieval,
    Utility,
)
from veil.audit.within import context_audit, context_groups
from veil.erasers._base import Erasure
from veil.maps.artifact import MapArtifact
from veil.maps.attribute import encode_attribute
from veil.maps.context import checked_context
from veil.maps.kinds import EmbeddingMap
from veil.maps.linalg import whiten, whitening_factors
from veil.maps.moments import MomentState
from veil.progress import phase

E = TypeVar("E", bound=Erasure)
NEIGHBOURS = 10


def _class_mean_gap(white: NDArray[np.float64], codes: NDArray[np.intp]) -> float:
    """Largest distance between a class mean and the overall mean of whitened rows; 0 if they coincide."""
    overall = white.mean(axis=0)
    return max(float(np.linalg.norm(white[codes == c].mean(axis=0) - overall)) for c in np.unique(codes))


def _class_mean_noise_floor(codes: NDArray[np.intp], rank: int) -> float:
    """The gap sampling alone produces for the smallest class, with no attribute signal at all.

    With ``rank`` whitened unit-variance coordinates, a class mean of ``n_c``
    rows sits ``sqrt(rank (1/n_c - 1/n))`` from the overall mean in expectation.
    """
    smallest = int(np.bincount(codes).min())
    return float(np.sqrt(rank * (1 / smallest - 1 / codes.size)))


def _dead_coordinate_notes(raw: NDArray[np.floating], erased: NDArray[np.floating]) -> list[str]:
    """What the audit says of coordinates without spread: pinned by the map, or passed through and readable."""
    dead = probes.dead_features(raw)
    if not dead.size:
        return []
    listed = ", ".join(map(str, dead.tolist()))
    passed = [int(j) for j in dead if np.ptp(erased[:, j]) > 0]
    if not passed:
        return [f"coordinate(s) {listed} have almost no spread; the map writes one value there, so they carry nothing"]
    return [
        f"coordinate(s) {', '.join(map(str, passed))} have almost no spread and the map does not pin them (versions "
        "stored before pinning pass them through): a model that rescales them to unit variance reads what they "
        "carry at rounding level, and so do these probes"
    ]


def audit(
    eraser: Erasure,
    X: ArrayLike,
    z: object,
    *,
    task: object = None,
    given: object = None,
    given_name: str | None = None,
    folds: int = 5,
    nonlinear: bool = True,
    random_state: int = 0,
    group: object = None,
    group_name: str | None = None,
    fitting: FittingRows | None = None,
    independence: IndependenceSettings | None = FAST,
) -> AuditReport:
    """Measure leakage and utility of a fitted eraser on data it never saw.

    Probes are trained and tested only on ``X``, by stratified k-fold
    cross-validation: every figure comes from a probe that never saw the row
    it predicts, and ``X`` must be rows the eraser never saw (the report's
    ``protocol`` records this).  Each probe reports its accuracy with a
    Wilson interval, the majority baseline, per-class recall and balanced
    accuracy; the strongest is the one with the most rows right after erasure.

    Parameters
    ----------
    eraser : Erasure
        A fitted eraser.  What is audited is ``eraser.transform``: exactly
        what would be served, re-normalisation included.
    X : array-like of shape (n_heldout, d)
        Held-out embeddings.
    z : array-like of shape (n_heldout,) or (n_heldout, m)
        Held-out attribute: labels (classification probes) or a numeric
        matrix (ridge R² probes).
    task : array-like of shape (n_heldout,), optional
        Task labels for utility figures (task probe accuracy, TPR gap,
        neighbour task share).
    given : array-like of shape (n_heldout,), optional
        Each row's value of a context (categorical attribute only): every
        probe and the neighbour shares are then also measured within each
        value, against what the context alone tells (the report's ``context``;
        see :mod:`veil.audit.context_report`).
    given_name : str, optional
        The context column's name, for the report.
    folds : int, default=5
        Cross-validation folds of the probes.
    nonlinear : bool, default=True
        Also run the nonlinear probes (quadratic, RBF kernel, boosted trees,
        MLP); otherwise the linear probe only.
    random_state : int, default=0
        Seeds the folds and the probes.
    group : array-like of shape (n_heldout,), optional
        Each row's group (an author, an account, a first name, a site): every
        probe's folds then keep each group in one fold (stratified group folds),
        and the report's ``groups`` section sets the linear probe on ordinary
        folds and the transfer probe beside them (see :mod:`veil.audit.group_report`).
    group_name : str, optional
        The group column's name, for the report.
    fitting : FittingRows, optional
        The rows the eraser was fitted on (or a sample of them), with their
        labels and groups: with ``group``, the transfer probe is trained on
        them, cleaned, and tested on the cleaned held-out rows.
    independence : IndependenceSettings, optional
        The independence tests of the erased rows against a categorical attribute, with their power
        (:mod:`veil.audit.independence`): the fast setting by default, ``THOROUGH`` for finer figures, None to
        leave them out.

    Returns
    -------
    AuditReport
    """
    check_is_fitted(eraser, "map_")
    return _audit_map(
        _Audited(eraser.method, eraser.map_, eraser.transform, eraser.moments_, HELD_OUT_KFOLD),
        X,
        z,
        task=task,
        context=_Context(given, given_name),
        folds=folds,
        nonlinear=nonlinear,
        random_state=random_state,
        grouping=_Grouping(group, group_name, fitting),
        independence=independence,
    )


def audit_artifact(
    artifact: MapArtifact,
    X: ArrayLike,
    z: object,
    *,
    task: object = None,
    given: object = None,
    given_name: str | None = None,
    folds: int = 5,
    nonlinear: bool = True,
    random_state: int = 0,
    group: object = None,
    group_name: str | None = None,
    independence: IndependenceSettings | None = FAST,
) -> AuditReport:
    """Measure leakage and utility of a stored map on a fresh sample, as :func:`audit` does for an eraser.

    ``X`` must be rows the map was never fitted on, drawn after the fact (the
    report's protocol says :data:`~veil.audit.report.FRESH_KFOLD`).  What is
    audited is ``artifact.apply``: exactly what the service serves.

    Parameters
    ----------
    artifact : MapArtifact
    X : array-like of shape (n, d)
    z : array-like of shape (n,)
        Attribute labels of the fresh rows (classes the map was not fitted on are allowed: they are what they are).
    task : array-like of shape (n,), optional
    given : array-like of shape (n,), optional
        Each row's context value: the probes are then also measured within each value (as :func:`audit`).
    given_name : str, optional
    group : array-like of shape (n,), optional
        Each row's group: every probe's folds keep each group in one fold (as :func:`audit`; no transfer
        probe, which needs the fitting rows).
    group_name : str, optional
    independence : IndependenceSettings, optional
        As :func:`audit`.

    Returns
    -------
    AuditReport
    """
    return _audit_map(
        _Audited(artifact.method, artifact.map, artifact.apply, artifact.moments, FRESH_KFOLD),
        X,
        z,
        task=task,
        context=_Context(given, given_name),
        folds=folds,
        nonlinear=nonlinear,
        random_state=random_state,
        grouping=_Grouping(group, group_name, None),
        independence=independence,
    )


@dataclass(frozen=True)
class _Audited:
    """What an audit needs of a map: its method, the map, how it is applied, its fitting statistics, the scheme."""

    method: str
    map: EmbeddingMap
    apply: Callable[[NDArray[np.floating]], NDArray[np.floating]]
    moments: MomentState
    scheme: str


@dataclass(frozen=True)
class _Context:
    """Each audited row's context value (None: the population only) and the context column's name."""

    values: object
    name: str | None


@dataclass(frozen=True)
class _Grouping:
    """Each audited row's group (None: folds by row), the group column's name, and the fitting rows."""

    values: object
    name: str | None
    fitting: FittingRows | None


def _audit_map(
    audited: _Audited,
    X: ArrayLike,
    z: object,
    *,
    task: object,
    context: _Context,
    folds: int,
    nonlinear: bool,
    random_state: int,
    grouping: _Grouping | None = None,
    independence: IndependenceSettings | None = None,
) -> AuditReport:
    raw = check_array(X, dtype=(np.float64, np.float32))
    attribute = encode_attribute(z, raw.shape[0])
    erased = audited.apply(raw)
    notes: list[str] = []
    gap_before: float | None
    gap_after: float | None
    noise_floor: float | None
    regression_trees: tuple[RegressionScore, RegressionScore] | None = None
    # Each probe's held-out predictions on the erased rows: the readers' independence test uses the strongest's.
    predicted: dict[str, NDArray[np.intp]] = {}

    group_index = _group_index(grouping, attribute.labels is not None, raw.shape[0])
    if attribute.labels is not None:
        codes = attribute.codes
        if group_index is None:
            used_folds = probes.probe_folds(codes, folds)
        else:
            used_folds = _group_folds(codes, attribute.labels, group_index, folds)
        sizes = readers.fold_sizes(codes, folds, groups=group_index, random_state=random_state)
        scores: dict[str, tuple[ProbeScore, ProbeScore]] = {}
        for name in PROBES if nonlinear else ("linear",):
            model = readers.build_probe(name, random_state, sizes=sizes, features=raw.shape[1])
            before = probes.classification_score(
                model,
                raw,
                codes,
                folds=folds,
                random_state=random_state,
                stage=f"{PROBE_LABELS[name]}, raw (folds)",
                groups=group_index,
            )
            predicted[name] = probes.cross_val_labels(
                model, erased, codes, folds=folds, random_state=random_state,
                stage=f"{PROBE_LABELS[name]}, erased (folds)", groups=group_index,
            )  # fmt: skip
            scores[name] = (before, probes.score_predictions(codes, predicted[name]))
        linear_before: ProbeScore | RegressionScore
        linear_after: ProbeScore | RegressionScore
        linear_before, linear_after = scores.pop("linear")
        # Whitened by the fitting data's covariance, so before and after are
        # measured in the same units.
        eigenvectors, scale = whitening_factors(audited.moments.covariance_xx)
        gap_before = _class_mean_gap(whiten(raw, eigenvectors, scale), codes)
        gap_after = _class_mean_gap(whiten(erased, eigenvectors, scale), codes)
        noise_floor = _class_mean_noise_floor(codes, scale.size)
    else:
        codes = None
        used_folds = min(folds, raw.shape[0])
        scores = {}
        linear_before = probes.regression_score(raw, attribute.matrix, folds=folds, random_state=random_state)
        linear_after = probes.regression_score(erased, attribute.matrix, folds=folds, random_state=random_state)
        if nonlinear:
            # Boosted regression trees read what the ridge cannot (thresholds, interactions).
            trees = readers.trees_regression_probe(random_state)
            trees_before, trees_after = (
                probes.regression_score(
                    x, attribute.matrix, folds=folds, random_state=random_state, model=trees,
                    stage=f"{PROBE_LABELS['trees']}, {side} (folds)",
                )
                for x, side in ((raw, "raw"), (erased, "erased"))
            )  # fmt: skip
            regression_trees = (trees_before, trees_after)
        gap_before = gap_after = noise_floor = None
    absent: tuple[None, None] = (None, None)
    mlp, quadratic, kernel, trees = (scores.get(name, absent) for name in ("mlp", "quadratic", "kernel", "trees"))
    tree_scores: tuple[ProbeScore | RegressionScore | None, ProbeScore | RegressionScore | None] = (
        trees if regression_trees is None else regression_trees
    )
    leakage = Leakage(
        linear_before=linear_before,
        linear_after=linear_after,
        nonlinear_before=mlp[0],
        nonlinear_after=mlp[1],
        guardedness_gap_before=gap_before,
        guardedness_gap_after=gap_after,
        guardedness_noise_floor=noise_floor,
        quadratic_before=quadratic[0],
        quadratic_after=quadratic[1],
        kernel_before=kernel[0],
        kernel_after=kernel[1],
        trees_before=tree_scores[0],
        trees_after=tree_scores[1],
    )

    neighbours_raw = geometry.nearest_neighbours(raw, NEIGHBOURS)
    neighbours_erased = geometry.nearest_neighbours(erased, NEIGHBOURS)
    task_codes = None if task is None else _task_codes(task, raw.shape[0])
    task_before = task_after = tpr_before = tpr_after = None
    if task_codes is not None:
        model = probes.linear_probe(random_state)
        predicted_before = probes.cross_val_labels(
            model, raw, task_codes, folds=folds, random_state=random_state, stage="task probe, raw (folds)"
        )
        predicted_after = probes.cross_val_labels(
            model, erased, task_codes, folds=folds, random_state=random_state, stage="task probe, erased (folds)"
        )
        task_before = float(np.mean(predicted_before == task_codes))
        task_after = float(np.mean(predicted_after == task_codes))
        if codes is not None and attribute.labels is not None and attribute.labels.size == 2:
            tpr_before = geometry.tpr_gap_rms(task_codes, predicted_before, codes)
            tpr_after = geometry.tpr_gap_rms(task_codes, predicted_after, codes)
    utility = Utility(
        relative_distortion=geometry.relative_distortion(raw, erased),
        mean_cosine=geometry.mean_cosine(raw, erased),
        knn_overlap_at_10=geometry.neighbour_overlap(neighbours_raw, neighbours_erased),
        task_accuracy_before=task_before,
        task_accuracy_after=task_after,
        tpr_gap_rms_before=tpr_before,
        tpr_gap_rms_after=tpr_after,
    )

    retrieval = None
    if codes is not None:
        retrieval = Retrieval(
            attribute_share_before=geometry.neighbour_label_share(neighbours_raw, codes),
            attribute_share_after=geometry.neighbour_label_share(neighbours_erased, codes),
            attribute_base_rate=geometry.label_base_rate(codes),
            task_share_before=None
            if task_codes is None
            else geometry.neighbour_label_share(neighbours_raw, task_codes),
            task_share_after=None
            if task_codes is None
            else geometry.neighbour_label_share(neighbours_erased, task_codes),
            task_base_rate=None if task_codes is None else geometry.label_base_rate(task_codes),
        )

    ranking_fairness = None if codes is None else ranking.ranking_before_after(raw, erased, codes, NEIGHBOURS)
    tests = None
    if codes is not None and independence is not None:
        strata = None if context.values is None else context_groups(context.values, raw.shape[0])[1]
        tests = _independence(
            raw, erased, codes, neighbours_erased, leakage, predicted, independence, folds=folds, seed=random_state,
            strata=strata, group_index=group_index,
        )  # fmt: skip
    within = None
    if context.values is not None:
        if codes is None or attribute.labels is None:
            raise ValueError("an audit within a context needs a categorical attribute (1-D class labels z)")
        within = context_audit(
            raw, erased, codes, context.values, classes=tuple(str(label) for label in attribute.labels),
            column=context.name, folds=folds, nonlinear=nonlinear, random_state=random_state, groups=group_index,
        )  # fmt: skip
    across = None
    if grouping is not None and group_index is not None and codes is not None and attribute.labels is not None:
        assert isinstance(leakage.linear_before, ProbeScore)
        assert isinstance(leakage.linear_after, ProbeScore)
        nonlinear_strongest = _strongest_nonlinear(leakage)
        with phase("readers across groups"):
            across = group_audit(
                raw, erased, codes, attribute.labels, np.asarray(grouping.values), column=grouping.name,
                grouped=(leakage.linear_before, leakage.linear_after), strongest=nonlinear_strongest,
                fitting=grouping.fitting, apply=audited.apply, folds=folds, random_state=random_state,
            )  # fmt: skip

    notes.extend(_dead_coordinate_notes(raw, erased))
    fitted_rows = int(audited.moments.count)
    if fitted_rows / raw.shape[1] < 25:
        notes.append(
            f"the eraser was fitted on {fitted_rows} rows for {raw.shape[1]} dimensions; "
            "held-out leakage shrinks as the fitting sample grows relative to the dimension"
        )
    linear_after = leakage.linear_after
    strongest = leakage.strongest
    strongest_after = None if strongest is None else leakage.scores(strongest)[1]
    if (
        isinstance(linear_after, ProbeScore)
        and isinstance(strongest_after, ProbeScore)
        and strongest_after.interval_low > max(linear_after.accuracy, linear_after.majority)
    ):
        why = (
            "linear erasure does not remove nonlinear traces"
            if audited.map.kind == "affine-lowrank"
            else "this map leaves nonlinear traces"
        )
        notes.append(f"the {PROBE_LABELS[str(strongest)]} recovers more than the linear one: {why}")
    return AuditReport(
        method=audited.method,
        rank=audited.map.describe()["rank"],
        n_heldout=int(raw.shape[0]),
        dim=int(raw.shape[1]),
        leakage=leakage,
        utility=utility,
        retrieval=retrieval,
        notes=notes,
        classes=None if attribute.labels is None else tuple(str(label) for label in attribute.labels),
        protocol=ProbeProtocol(scheme=audited.scheme, folds=used_folds, seed=random_state, eraser_rows=fitted_rows),
        ranking=ranking_fairness,
        context=within,
        groups=across,
        independence=tests,
    )


def _group_index(grouping: _Grouping | None, categorical: bool, n_rows: int) -> NDArray[np.intp] | None:
    """Each audited row's group as an index (None: no group); refuses a group with a continuous attribute."""
    if grouping is None or grouping.values is None:
        return None
    if not categorical:
        raise ValueError("group folds need a categorical attribute (1-D class labels z)")
    return group_codes(grouping.values, n_rows)[1]


def _group_folds(codes: NDArray[np.intp], labels: NDArray[Any], groups: NDArray[np.intp], folds: int) -> int:
    problem = group_fold_problem(labels[codes], groups)
    if problem is not None:
        raise ValueError(f"cannot keep each group in one fold: {problem}")
    return probes.group_folds(codes, groups, folds)


def _strongest_nonlinear(leakage: Leakage) -> str | None:
    """The nonlinear probe with the most held-out rows right after erasure (ties: the first listed), or None."""
    scored = [
        (name, after) for name, _, after in leakage.probes() if name != "linear" and isinstance(after, ProbeScore)
    ]
    best = max(scored, key=lambda item: item[1].hits, default=None)
    return None if best is None else best[0]


def _independence(
    raw: NDArray[np.floating],
    erased: NDArray[np.floating],
    codes: NDArray[np.intp],
    neighbours: NDArray[np.intp],
    leakage: Leakage,
    predicted: dict[str, NDArray[np.intp]],
    settings: IndependenceSettings,
    *,
    folds: int,
    seed: int,
    strata: NDArray[np.intp] | None,
    group_index: NDArray[np.intp] | None,
) -> IndependenceAudit:
    """The independence tests of the erased rows, the readers' test on the strongest probe's predictions."""
    strongest = leakage.strongest
    reader = None
    # With the linear probe only (--probes linear), the linear probe's own figure and its card's levels judge the
    # linear readers; the readers' test runs where the audit's nonlinear readers ran.
    if strongest is not None and any(name != "linear" for name, _, _ in leakage.probes()):
        name = strongest

        def fit_predict(
            x: NDArray[np.floating], labels: NDArray[np.intp], groups: NDArray[np.intp] | None
        ) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
            # The same reader, sized for the rows it is given, with the same kind of folds as the audit.
            if groups is not None:
                groups = np.unique(groups, return_inverse=True)[1].reshape(-1).astype(np.intp)
            sizes = readers.fold_sizes(labels, folds, groups=groups, random_state=seed)
            model = readers.build_probe(name, seed, sizes=sizes, features=x.shape[1])
            labelled = probes.cross_val_labels(model, x, labels, folds=folds, random_state=seed, groups=groups)
            return labelled, probes.first_fold(labels, folds, seed, groups=groups)

        scores = {probe: after for probe, _, after in leakage.probes() if isinstance(after, ProbeScore)}
        # The rows of the audit's first test fold (a group fold with --group), where the predictions came from.
        held = probes.first_fold(codes, folds, seed, groups=group_index)
        # Every reader's predictions, the strongest first: the test takes the most hits of any of them on the fold.
        every = np.stack([predicted[name], *(labels for probe, labels in predicted.items() if probe != name)])
        reader = ReaderEvidence(name, every, held, scores, fit_predict)
    with phase("independence tests"):
        return independence_audit(
            raw, erased, codes, neighbours=neighbours,
            find_neighbours=lambda x, apart: geometry.nearest_neighbours(x, NEIGHBOURS, apart), reader=reader,
            settings=settings, seed=seed, groups=strata, grouped=group_index,
        )  # fmt: skip


def _task_codes(task: object, n_rows: int) -> NDArray[np.intp]:
    return encode_attribute(task, n_rows, require_categorical=True).codes


def fit_and_audit(
    eraser: E,
    X: ArrayLike,
    z: object,
    *,
    task: object = None,
    given: object = None,
    given_name: str | None = None,
    holdout: float = 0.3,
    random_state: int = 0,
    folds: int = 5,
    nonlinear: bool = True,
    group: object = None,
    group_name: str | None = None,
) -> tuple[E, AuditReport]:
    """Split off a held-out part (stratified by the attribute), fit on the rest, audit on it.

    Parameters
    ----------
    given : array-like of shape (n_samples,), optional
        Each row's context value: the eraser is fitted within it (for the
        methods that take ``given``) and the audit also reads within each
        value, against what the context alone tells.
    given_name : str, optional
        The context column's name, for the report.
    group : array-like of shape (n_samples,), optional
        Each row's group (an author, an account, a first name, a site): the
        held-out part is then whole groups (stratified by the attribute as far
        as groups allow: scikit-learn's ``StratifiedGroupKFold``), so the audit
        judges people the fit never saw; every probe's folds keep each group in
        one fold, and the transfer probe is trained on the cleaned fitting rows
        (see :func:`audit`).
    group_name : str, optional
        The group column's name, for the report.

    Returns
    -------
    (eraser, report)
        The fitted eraser and its :class:`AuditReport`.
    """
    raw = check_array(X, dtype=(np.float64, np.float32))
    attribute = encode_attribute(z, raw.shape[0])
    z_array = np.asarray(z)
    stratify = z_array if attribute.labels is not None else None
    indices = np.arange(raw.shape[0])
    groups = None if group is None else group_codes(group, raw.shape[0])[1]
    if groups is None:
        fit_rows, held_rows = train_test_split(indices, test_size=holdout, random_state=random_state, stratify=stratify)
    else:
        fit_rows, held_rows = _group_split(indices, stratify, groups, holdout, random_state)
    task_array = None if task is None else np.asarray(task)
    if isinstance(given, Mapping) or getattr(given, "ndim", 1) == 2:
        raise ValueError("fit_and_audit takes one context column: give the values of one column as a 1-D array")
    context = None if given is None else checked_context(np.asarray(given), raw.shape[0])
    if context is None:
        eraser.fit(raw[fit_rows], z_array[fit_rows])
    elif "given" in inspect.signature(eraser.fit).parameters:
        eraser.fit(raw[fit_rows], z_array[fit_rows], given=context[fit_rows])
    else:
        raise ValueError(
            f"{type(eraser).__name__} cannot be fitted within a context: fit it without given, then audit it "
            "within the context with audit(eraser, X, z, given=...)"
        )
    report = audit(
        eraser,
        raw[held_rows],
        z_array[held_rows],
        task=None if task_array is None else task_array[held_rows],
        given=None if context is None else context[held_rows],
        given_name=given_name,
        folds=folds,
        nonlinear=nonlinear,
        random_state=random_state,
        group=None if groups is None else np.asarray(group)[held_rows],
        group_name=group_name,
        fitting=None if groups is None else FittingRows(raw[fit_rows], z_array[fit_rows], np.asarray(group)[fit_rows]),
    )
    return eraser, report


def _group_split(
    indices: NDArray[np.intp], stratify: NDArray[Any] | None, groups: NDArray[np.intp], holdout: float, seed: int
) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """Fitting and held-out rows with every group on one side: one fold of about ``holdout`` of the groups.

    The held-out part is the first fold of ``round(1 / holdout)`` stratified group folds (group folds when the
    attribute is continuous), so its share is ``holdout`` as far as whole groups allow.
    """
    splits = max(2, round(1 / holdout))
    if np.unique(groups).size < splits:
        raise ValueError(
            f"a held-out part of whole groups needs at least {splits} groups for holdout={holdout}; "
            f"there are {np.unique(groups).size}"
        )
    if stratify is None:
        splitter: Any = GroupKFold(n_splits=splits)
    else:
        splitter = StratifiedGroupKFold(n_splits=splits, shuffle=True, random_state=seed)
    fit_rows, held_rows = next(iter(splitter.split(indices, stratify, groups)))
    return indices[fit_rows], indices[held_rows]
