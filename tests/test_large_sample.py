"""The large committed Harbourline sample: columns, float16 storage, distinct rows, cells, a readable pronoun."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.linear_model import LogisticRegression

from veil.samples.harbourline import ProfileSample, load_harbourline_profiles

FIELDS = {"health care", "software", "education", "trades", "hospitality"}


@pytest.fixture(scope="module")
def large() -> ProfileSample:
    return load_harbourline_profiles("large")


@pytest.fixture(scope="module")
def small() -> ProfileSample:
    return load_harbourline_profiles()


def test_columns_shapes_and_dtypes_match_the_small_sample(large: ProfileSample, small: ProfileSample) -> None:
    rows = large.embedding.shape[0]
    assert rows >= 20_000
    assert large.embedding.shape == (rows, small.embedding.shape[1]) == (rows, 384)
    assert large.embedding.dtype == small.embedding.dtype == np.float32
    for name in ("pronoun", "age_bracket", "field"):
        assert getattr(large, name).dtype == getattr(small, name).dtype
        assert getattr(large, name).shape == (rows,)
    assert large.text.dtype.kind == "U"
    assert large.text.shape == (rows,)


def test_embeddings_are_float16_values_within_rounding_of_unit_rows(large: ProfileSample) -> None:
    x = large.embedding
    # Stored as float16 and widened on load: widening is exact, so a round trip changes nothing.
    assert np.array_equal(x.astype(np.float16).astype(np.float32), x)
    # IEEE 754 round-to-nearest: |fl(v) - v| <= u|v| with u = eps/2, so a unit row moves by at most u in
    # norm (plus subnormal steps of 2**-25 each, far below the float32 term that covers the model's own
    # normalisation round-off).
    norms = np.linalg.norm(x.astype(np.float64), axis=1)
    tolerance = np.finfo(np.float16).eps / 2 + x.shape[1] * np.finfo(np.float32).eps
    assert np.abs(norms - 1.0).max() <= tolerance


def test_no_text_and_no_embedding_row_repeats(large: ProfileSample, small: ProfileSample) -> None:
    rows = large.embedding.shape[0]
    assert np.unique(large.text).size == rows
    assert np.unique(large.embedding, axis=0).shape[0] == rows
    # Nor does any text of the small sample come back: one can fit on either and judge on the other.
    assert np.intersect1d(large.text, small.text).size == 0


def test_every_field_and_pronoun_cell_is_well_filled(large: ProfileSample, small: ProfileSample) -> None:
    assert set(large.field) == FIELDS
    assert set(large.pronoun) == {"she", "he"}
    assert set(large.age_bracket) == {"under 30", "30 to 50", "over 50"}
    for field in FIELDS:
        in_field = large.field == field
        for pronoun in ("she", "he"):
            assert (in_field & (large.pronoun == pronoun)).sum() >= 200
        # The same skew as the small sample: the two "she" shares differ by less than four standard errors of
        # a difference of two binomial proportions (common practice as a bound for one draw of each).
        small_field = small.field == field
        large_share = (large.pronoun[in_field] == "she").mean()
        small_share = (small.pronoun[small_field] == "she").mean()
        pooled = (large_share + small_share) / 2
        error = np.sqrt(pooled * (1 - pooled) * (1 / in_field.sum() + 1 / small_field.sum()))
        assert abs(large_share - small_share) < 4 * error


def test_a_linear_probe_reads_the_pronoun_on_held_out_rows(large: ProfileSample) -> None:
    # scikit-learn's LogisticRegression, fitted on 4,000 rows and scored on 4,000 others, overall and within
    # each field: the raw embeddings carry the pronoun, the signal the erasers are meant to remove.
    order = np.random.default_rng(0).permutation(large.embedding.shape[0])
    fit_rows, held_rows = order[:4000], order[4000:8000]
    x, z = large.embedding, large.pronoun == "she"
    probe = LogisticRegression(max_iter=1000).fit(x[fit_rows], z[fit_rows])
    accuracy = probe.score(x[held_rows], z[held_rows])
    majority = max(z[held_rows].mean(), 1 - z[held_rows].mean())
    assert accuracy > (1 + majority) / 2
    for field in FIELDS:
        rows = held_rows[large.field[held_rows] == field]
        field_majority = max(z[rows].mean(), 1 - z[rows].mean())
        assert probe.score(x[rows], z[rows]) > (1 + field_majority) / 2


def test_an_unknown_size_is_refused_by_name() -> None:
    with pytest.raises(ValueError, match="size must be one of"):
        load_harbourline_profiles("medium")  # type: ignore[arg-type]
