"""The within-context figures of docs/methods.md: ``.venv/bin/python scripts/measure_within_context.py [NAME ...]``.

Protocol.  The large committed sample (24,000 rows of 384-d embeddings;
attribute ``pronoun``, context ``field``).  The fitting rows are drawn by the
row-index hash the fitting job uses (held-out share 0.25, seed 0: 17,923
rows); each method is fitted on them only.  Every reader is trained and tested
on the 6,077 other rows only: within each context value, stratified 5-fold
cross-validation (seed 0), each row predicted by a reader trained on the
other folds, accuracies weighted by the value's rows; the floor is each
value's majority share weighted the same way.  Readers: standardised logistic
regression (linear), scikit-learn's HistGradientBoostingClassifier (the
audit's settings: 100 rounds, step 0.2, 32 bins, early stopping) and an MLP
(128 hidden units, alpha 1e-3, early stopping), each on the coordinates whose
spread is at least 1e-6 of the typical one.  Also: the share of a row's 10
nearest held-out neighbours of the same value with its class (and that
share's base rate), the share of its 10 nearest held-out neighbours with its
field, a linear reader of the field (5-fold over the held-out rows), and the
mean Euclidean distance a row moves.  One core; about 2 minutes per line.

Names (all when none is given): see ``CONFIGS``.  ``noisy`` contexts replace
the field of a seeded 30% of the rows by a field drawn uniformly: a context
only partly readable from the embeddings, measured within that noisy context.
``age`` contexts are the age bracket (three values), which the profiles'
texts carry less plainly than the field; the 10-NN field share and the task
reader still read the field.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from sklearn.base import ClassifierMixin, clone
from sklearn.ensemble import HistGradientBoostingClassifier
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import StratifiedKFold, cross_val_predict
from sklearn.neighbors import NearestNeighbors
from sklearn.neural_network import MLPClassifier
from sklearn.pipeline import Pipeline, make_pipeline
from sklearn.preprocessing import StandardScaler
from threadpoolctl import threadpool_limits

from veil.audit.probes import LiveFeatures
from veil.erasers import LEACE, MeanProjection
from veil.erasers.transport import GaussianTransport
from veil.maps.context_transport import ContextTransportMap
from veil.samples.harbourline import load_harbourline_profiles
from veil.samples.splitting import holdout_mask

FloatArray = NDArray[np.floating]
NOISE_SHARE = 0.3
K = 10
#: The audit's boosted trees (veil.audit.readers).
TREES = {"learning_rate": 0.2, "max_iter": 100, "max_bins": 32, "early_stopping": True}


@dataclass(frozen=True)
class Data:
    x_fit: FloatArray
    z_fit: NDArray[np.str_]
    g_fit: NDArray[np.str_]
    x_held: FloatArray
    z_held: NDArray[np.str_]
    g_held: NDArray[np.str_]
    field_held: NDArray[np.str_]


def _load(column: str) -> Data:
    sample = load_harbourline_profiles(size="large")
    context = (sample.age_bracket if column == "age" else sample.field).copy()
    if column == "noisy":
        rng = np.random.default_rng(0)
        replaced = rng.random(context.size) < NOISE_SHARE
        context[replaced] = rng.choice(np.unique(sample.field), size=int(replaced.sum()))
    held = holdout_mask(sample.embedding.shape[0], fraction=0.25, seed=0)
    x, z = sample.embedding, sample.pronoun
    return Data(x[~held], z[~held], context[~held], x[held], z[held], context[held], sample.field[held])


def _readers() -> dict[str, Pipeline]:
    return {
        "linear": make_pipeline(LiveFeatures(), StandardScaler(), LogisticRegression(max_iter=3000, random_state=0)),
        "trees": make_pipeline(LiveFeatures(), HistGradientBoostingClassifier(**TREES, random_state=0)),
        "mlp": make_pipeline(
            LiveFeatures(),
            StandardScaler(),
            MLPClassifier(hidden_layer_sizes=(128,), alpha=1e-3, early_stopping=True, max_iter=300, random_state=0),
        ),
    }


def _cv_correct(reader: ClassifierMixin, x: FloatArray, y: NDArray[np.str_]) -> int:
    folds = StratifiedKFold(n_splits=5, shuffle=True, random_state=0)
    return int(np.count_nonzero(cross_val_predict(clone(reader), x, y, cv=folds) == y))


def within_readers(x: FloatArray, z: NDArray[np.str_], g: NDArray[np.str_]) -> dict[str, float]:
    """Each reader's accuracy within every value of ``g``, weighted by rows; and the floor."""
    out = {name: 0 for name in _readers()}
    floor = 0
    for value in np.unique(g):
        rows = g == value
        counts = np.unique(z[rows], return_counts=True)[1]
        floor += int(counts.max())
        for name, reader in _readers().items():
            # A value with one class, or a class too small for 5 folds, is read at its majority.
            fits = counts.size > 1 and counts.min() >= 5
            out[name] += _cv_correct(reader, x[rows], z[rows]) if fits else int(counts.max())
    result = {name: correct / z.size for name, correct in out.items()}
    result["floor"] = floor / z.size
    return result


def _neighbour_share(x: FloatArray, label: NDArray[np.str_]) -> float:
    nearest = NearestNeighbors(n_neighbors=K + 1).fit(x).kneighbors(x, return_distance=False)[:, 1:]
    return float(np.mean(label[nearest] == label[:, None]))


def neighbours(x: FloatArray, z: NDArray[np.str_], g: NDArray[np.str_], field: NDArray[np.str_]) -> dict[str, float]:
    """10-NN class share within each value (and its base rate), and 10-NN field share over all held-out rows."""
    share = base = 0.0
    for value in np.unique(g):
        rows = g == value
        share += _neighbour_share(x[rows], z[rows]) * rows.sum()
        counts = np.unique(z[rows], return_counts=True)[1]
        base += float(np.sum(counts * (counts - 1)) / (rows.sum() - 1))
    return {"nn_within": share / z.size, "nn_base": base / z.size, "nn_field": _neighbour_share(x, field)}


def task_accuracy(x: FloatArray, field: NDArray[np.str_]) -> float:
    return _cv_correct(_readers()["linear"], x, field) / field.size


Method = Callable[[Data], tuple[FloatArray, str]]


def _context_transport(*, then_leace: bool, true_context: bool) -> Method:
    def run(data: Data) -> tuple[FloatArray, str]:
        model = GaussianTransport(random_state=0, then_leace=then_leace).fit(data.x_fit, data.z_fit, given=data.g_fit)
        mapping = model.map_
        assert isinstance(mapping, ContextTransportMap)
        known = np.searchsorted(mapping.values, data.g_held).astype(np.intp)
        inferred = mapping.inferred_values(data.x_held)
        note = f"context inferred right on {np.mean(inferred == known):.4f} of held-out rows"
        cleaned = mapping.apply_within(data.x_held, known) if true_context else mapping.apply(data.x_held)
        return cleaned, note

    return run


def _linear(make: Callable[[], LEACE | MeanProjection], given: bool) -> Method:
    def run(data: Data) -> tuple[FloatArray, str]:
        model = make().fit(data.x_fit, data.z_fit, given=data.g_fit if given else None)
        return model.transform(data.x_held), f"rank {model.rank_}"

    return run


def _population_transport(data: Data) -> tuple[FloatArray, str]:
    return GaussianTransport(random_state=0).fit(data.x_fit, data.z_fit).transform(data.x_held), ""


CONFIGS: dict[str, tuple[str, Method]] = {
    "raw": ("field", lambda data: (data.x_held, "")),
    "leace": ("field", _linear(LEACE, given=False)),
    "leace-given": ("field", _linear(LEACE, given=True)),
    "meanproj-given": ("field", _linear(MeanProjection, given=True)),
    "transport": ("field", _population_transport),
    "transport-given-true": ("field", _context_transport(then_leace=False, true_context=True)),
    "transport-given-inferred": ("field", _context_transport(then_leace=False, true_context=False)),
    "transport-given-leace-true": ("field", _context_transport(then_leace=True, true_context=True)),
    "transport-given-leace-inferred": ("field", _context_transport(then_leace=True, true_context=False)),
    "noisy-raw": ("noisy", lambda data: (data.x_held, "")),
    "noisy-leace-given": ("noisy", _linear(LEACE, given=True)),
    "noisy-transport-given-true": ("noisy", _context_transport(then_leace=False, true_context=True)),
    "noisy-transport-given-inferred": ("noisy", _context_transport(then_leace=False, true_context=False)),
    "age-raw": ("age", lambda data: (data.x_held, "")),
    "age-leace-given": ("age", _linear(LEACE, given=True)),
    "age-transport-given-true": ("age", _context_transport(then_leace=False, true_context=True)),
    "age-transport-given-inferred": ("age", _context_transport(then_leace=False, true_context=False)),
}


def measure(name: str) -> str:
    column, method = CONFIGS[name]
    data = _load(column)
    start = time.perf_counter()
    cleaned, note = method(data)
    cleaned = np.asarray(cleaned, dtype=np.float64)
    figures = within_readers(cleaned, data.z_held, data.g_held)
    figures.update(neighbours(cleaned, data.z_held, data.g_held, data.field_held))
    figures["task"] = task_accuracy(cleaned, data.field_held)
    figures["distortion"] = float(np.mean(np.linalg.norm(cleaned - data.x_held, axis=1)))
    strongest = max(figures["trees"], figures["mlp"])
    cells = " | ".join(f"{key} {value:.3f}" for key, value in figures.items())
    return f"{name} | {cells} | strongest nonlinear {strongest:.3f} | {note} | {time.perf_counter() - start:.0f} s"


def main(names: list[str]) -> None:
    with threadpool_limits(limits=1):
        for name in names or list(CONFIGS):
            print(measure(name), flush=True)


if __name__ == "__main__":
    main(sys.argv[1:])
