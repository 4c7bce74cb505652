"""Several protected attributes in one eraser: LEACE on the stacked encodings, the intersection, the refusals.

References: LEACE's guarantees (Belrose et al., 2023) for the stacked
encoding ``z`` of every attribute: ``Cov(x', z) = 0`` on the fitting data,
equal erased class means for each categorical attribute, and least-squares
optimality among affine erasers that achieve it (recalled from memory as
holding for every p.s.d. norm; checked here in the Euclidean one).  Probes
are scikit-learn's ``LogisticRegression``.
"""

from __future__ import annotations

import numpy as np
import pytest
from numpy.typing import NDArray
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import train_test_split

from veil import INLP, LEACE, RLACE, MeanProjection, attribute_table
from veil.maps.attribute import encode_attribute
from veil.registry.artifact_files import decode_artifact, encode_artifact
from veil.samples.attributes import joint_labels


def _people(n: int = 3000, d: int = 10, seed: int = 0) -> tuple[NDArray[np.float64], dict[str, NDArray[np.generic]]]:
    """Embeddings carrying a gender (3 classes, one of 5%), an age bracket and age in years, and their XOR."""
    rng = np.random.default_rng(seed)
    gender = rng.choice(np.array(["f", "m", "x"]), size=n, p=[0.5, 0.45, 0.05])
    age = rng.uniform(18, 80, n)
    bracket = np.digitize(age, [30, 45, 60])
    mixing = rng.normal(size=(d, d)) / np.sqrt(d)
    x = rng.normal(size=(n, d)) @ mixing
    x[:, 0] += 1.5 * (gender == "m") - 2.0 * (gender == "x")
    x[:, 1] += 0.7 * bracket + 0.02 * age
    # An interaction of centred codes: its mean is the same in every class of either attribute (the two are
    # independent), so it is readable from neither alone, only from their combination.
    male, older = (gender == "m").astype(float), (bracket >= 2).astype(float)
    x[:, 2] += 4.0 * (male - male.mean()) * (older - older.mean())
    return x, {"gender": gender, "age_bracket": bracket, "age_years": age}


def _xor(columns: dict[str, NDArray[np.generic]]) -> NDArray[np.bool_]:
    """A function of the joint class alone: male XOR in the older brackets."""
    return np.asarray((columns["gender"] == "m") ^ (columns["age_bracket"] >= 2))


def _stacked_cross_covariance(x: NDArray[np.floating], z: NDArray[np.void]) -> NDArray[np.float64]:
    matrix = encode_attribute(z, x.shape[0]).matrix
    return (x - x.mean(0)).T @ (matrix - matrix.mean(0)) / x.shape[0]


def _joint_probe_accuracy(x: NDArray[np.floating], joint: NDArray[np.generic]) -> tuple[float, float]:
    """Held-out accuracy of a linear probe of ``joint`` (a function of the joint class), and the majority share."""
    x_fit, x_held, j_fit, j_held = train_test_split(x, joint, test_size=0.4, random_state=0, stratify=joint)
    probe = LogisticRegression(max_iter=2000).fit(x_fit, j_fit)
    _, counts = np.unique(j_held, return_counts=True)
    return float(probe.score(x_held, j_held)), float(counts.max() / counts.sum())


def test_leace_guards_the_stacked_encoding_and_each_attribute() -> None:
    x, columns = _people()
    z = attribute_table(columns, continuous=["age_years"])
    erased = LEACE().fit(x, z).transform(x)
    # Cov(x', z) = 0 for the stacked encoding (Belrose et al. 2023), to 1e-8 relative.
    before = np.linalg.norm(_stacked_cross_covariance(x, z))
    assert np.linalg.norm(_stacked_cross_covariance(erased, z)) <= 1e-8 * before
    spread = np.sqrt(np.mean(np.sum((x - x.mean(0)) ** 2, axis=1)))
    for name in ("gender", "age_bracket"):
        labels = columns[name]
        means = np.stack([erased[labels == c].mean(0) for c in np.unique(labels)])
        assert np.max(np.abs(means - erased.mean(0))) <= 1e-8 * spread, name
    # The same guarantee as LEACE fitted on the stacked indicator matrix as a plain numeric attribute.
    plain = LEACE().fit(x, encode_attribute(z, x.shape[0]).matrix)
    assert np.allclose(plain.transform(x), erased, atol=1e-9)


def test_the_intersection_is_guarded_only_on_request() -> None:
    x, columns = _people()
    categorical = {name: columns[name] for name in ("gender", "age_bracket")}
    joint = _xor(columns)
    raw_accuracy, majority = _joint_probe_accuracy(x, joint)
    each = LEACE().fit(x, attribute_table(categorical)).transform(x)
    both = LEACE().fit(x, attribute_table(categorical, joint=True)).transform(x)
    each_accuracy, _ = _joint_probe_accuracy(each, joint)
    both_accuracy, _ = _joint_probe_accuracy(both, joint)
    # Guarding each attribute leaves the planted XOR readable; guarding the joint classes removes it.
    assert each_accuracy > majority + 0.1
    assert both_accuracy < majority + 0.03
    assert raw_accuracy > each_accuracy - 0.02
    # Equal erased means for every joint class (Belrose et al. 2023 applied to the joint attribute).
    spread = np.sqrt(np.mean(np.sum((x - x.mean(0)) ** 2, axis=1)))
    classes = joint_labels(attribute_table(categorical, joint=True))
    means = np.stack([both[classes == c].mean(0) for c in np.unique(classes)])
    assert np.max(np.abs(means - both.mean(0))) <= 1e-8 * spread


def test_sequential_guarding_is_not_joint_guarding() -> None:
    x, columns = _people()
    gender, bracket = columns["gender"], columns["age_bracket"]
    first = LEACE().fit(x, gender)
    sequential = LEACE().fit(first.transform(x), bracket).transform(first.transform(x))
    joint_fit = LEACE().fit(x, attribute_table({"gender": gender, "age_bracket": bracket}, joint=True))
    joint = joint_fit.transform(x)
    assert np.max(np.abs(sequential - joint)) > 0.1
    # Guarding one attribute after the other leaves their intersection readable; the joint fit does not.
    joint_classes = _xor(columns)
    sequential_accuracy, majority = _joint_probe_accuracy(sequential, joint_classes)
    assert sequential_accuracy > majority + 0.1
    assert _joint_probe_accuracy(joint, joint_classes)[0] < majority + 0.03
    # What the two steps do guard is the stacked encoding of the two attributes: for LEACE, removing the second
    # attribute's whitened directions after the first's spans exactly the stacked fit's directions, so the steps
    # equal the joint fit without the intersection, which is LEACE's least-squares optimum (Belrose et al. 2023).
    z = attribute_table({"gender": gender, "age_bracket": bracket})
    stacked = LEACE().fit(x, z).transform(x)
    assert np.allclose(sequential, stacked, atol=1e-8 * np.abs(x).max())
    assert np.linalg.norm(_stacked_cross_covariance(sequential, z)) <= 1e-8 * np.linalg.norm(
        _stacked_cross_covariance(x, z)
    )


def test_counterfactual_names_a_target_per_attribute() -> None:
    x, columns = _people()
    categorical = {name: columns[name] for name in ("gender", "age_bracket")}
    eraser = LEACE().fit(x, attribute_table(categorical, joint=True))
    # With the joint classes guarded the linear model is saturated: the target's mean is the joint class mean.
    target = (columns["gender"] == "x") & (columns["age_bracket"] == 3)
    moved = eraser.counterfactual(x, {"gender": "x", "age_bracket": 3})
    assert np.allclose(moved.mean(0), x[target].mean(0), atol=1e-9)
    with pytest.raises(ValueError, match="'age_bracket' is missing"):
        eraser.counterfactual(x, {"gender": "x"})
    with pytest.raises(ValueError, match="unknown class 'y' of attribute 'gender'"):
        eraser.counterfactual(x, {"gender": "y", "age_bracket": 3})


def test_several_attributes_survive_the_artifact_files() -> None:
    x, columns = _people(n=600)
    eraser = LEACE().fit(x, attribute_table(columns, continuous=["age_years"], joint=True))
    artifact = decode_artifact(encode_artifact(eraser.export()))
    assert [(b.name, b.kind) for b in artifact.moments.blocks] == [
        ("gender", "categorical"),
        ("age_bracket", "categorical"),
        ("age_years", "continuous"),
        ("gender&age_bracket", "joint"),
    ]
    assert np.allclose(artifact.apply(x), eraser.transform(x))


@pytest.mark.parametrize("method", [INLP, RLACE])
def test_methods_of_one_attribute_refuse_several(method: type) -> None:
    x, columns = _people(n=300)
    with pytest.raises(ValueError, match="several attributes need LEACE or mean projection"):
        method().fit(x, attribute_table(columns, continuous=["age_years"]))


def test_mean_projection_guards_several_attributes() -> None:
    x, columns = _people()
    z = attribute_table(columns, continuous=["age_years"])
    erased = MeanProjection().fit(x, z).transform(x)
    assert np.linalg.norm(_stacked_cross_covariance(erased, z)) <= 1e-8 * np.linalg.norm(
        _stacked_cross_covariance(x, z)
    )


@pytest.mark.parametrize(
    ("change", "message"),
    [
        ({"age_years": np.full(300, np.nan)}, "continuous attribute 'age_years' holds NaN"),
        ({"age_years": np.full(300, 41.0)}, "continuous attribute 'age_years' takes a single value"),
        ({"gender": np.full(300, "f")}, "attribute 'gender' has only one class"),
    ],
)
def test_bad_attributes_are_refused_by_name(change: dict[str, NDArray[np.generic]], message: str) -> None:
    x, columns = _people(n=300)
    with pytest.raises(ValueError, match=message):
        LEACE().fit(x, attribute_table({**columns, **change}, continuous=["age_years"]))


def test_too_few_rows_and_unmarked_tables_are_refused() -> None:
    x, columns = _people(n=8)
    with pytest.raises(ValueError, match="need more rows than attribute columns"):
        LEACE().fit(x[:6], attribute_table({k: v[:6] for k, v in columns.items()}, continuous=["age_years"]))
    with pytest.raises(ValueError, match="'weight' is marked continuous but is not one of the attributes"):
        attribute_table(columns, continuous=["weight"])
    plain = np.zeros(8, dtype=[("gender", "U1"), ("age_years", "f8")])
    with pytest.raises(ValueError, match=r"veil\.attribute_table"):
        LEACE().fit(x, plain)
