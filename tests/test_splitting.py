"""The hash split holds out the same rows however the data is chunked."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from veil.samples.splitting import give_every_class_both_parts, holdout_mask


def test_chunked_masks_equal_the_whole_mask() -> None:
    whole = holdout_mask(10_000, fraction=0.2, seed=7)
    pieces = [holdout_mask(n, fraction=0.2, seed=7, start=s) for s, n in [(0, 1), (1, 999), (1000, 9000)]]
    np.testing.assert_array_equal(np.concatenate(pieces), whole)


def test_held_out_share_is_binomial_around_the_fraction() -> None:
    mask = holdout_mask(100_000, fraction=0.25, seed=1)
    # Reference: a two-sided binomial test (scipy.stats.binomtest) at the 0.1% level.
    assert stats.binomtest(int(mask.sum()), mask.size, 0.25).pvalue > 1e-3


def test_seeds_give_different_splits() -> None:
    assert not np.array_equal(holdout_mask(1000, fraction=0.5, seed=1), holdout_mask(1000, fraction=0.5, seed=2))


def test_bad_fraction_is_refused() -> None:
    with pytest.raises(ValueError, match=r"must be in \[0, 1\)"):
        holdout_mask(10, fraction=1.0, seed=0)


def test_repair_puts_every_class_on_both_sides() -> None:
    codes = np.array([0, 0, 0, 1, 1, 2])
    mask = np.array([False, False, False, True, True, False])
    repaired = give_every_class_both_parts(mask, codes)
    for c in (0, 1):
        assert repaired[codes == c].any()
        assert not repaired[codes == c].all()
    assert repaired[5] == mask[5]  # a one-row class cannot be on both sides and is left alone
