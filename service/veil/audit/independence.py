"""Tests of independence between erased held-out rows and the attribute, each with a permutation p-value.

Three tests, each reading the rows a different way:

- the aggregated kernel two-sample test: the between-class share of a
  Gaussian kernel's spread (for two classes the squared maximum mean
  discrepancy, up to a constant; for more, its k-class form), at several
  bandwidths (multiples of the median distance); the bandwidths are
  aggregated without splitting the rows by taking the largest of the
  statistics standardised by their own permutation mean and spread, and
  calibrating that maximum on the same permutations;
- the classifier two-sample test: the strongest reader's held-out
  (cross-validated) predictions against the labels, its hits counted;
- the nearest-neighbour two-sample test: how many of each row's 10 nearest
  neighbours share its class.

Every statistic is computed for the observed labels and for random
permutations of them on the same rows, the observed one counted among the
permuted (so a p-value is never 0).  Ties with the observed statistic are
split at random (seeded): the p-value is then uniform when there is no
dependence, not conservative, which the calibration tests check.  Holm's
step-down correction runs across the family.  Kernel matrices are computed
once per bandwidth on at most :data:`KERNEL_ROWS` rows, and permutations
are evaluated in blocks, so memory stays bounded whatever the sample.

With a group column (``--group``: a first name, an author) the rows of a
group share both their place and, usually, their label, so labels permuted
row by row ask whether rows are exchangeable, not whether the attribute
leaks beyond the group: on data where each group has its own offset and its
own label and nothing is shared across groups (tests/test_independence_groups.py:
24 groups of 2 to 8 rows), the row-level kernel and neighbour tests rejected
at 0.05 in 98.5% and 100% of 200 draws; permuted by whole groups, in 4.5% and
5.5% (the readers' test on a group fold in 3%), with uniform p-values.
Where the attribute is constant within every group, the labels are permuted
at the group level instead (each group's labels move as one block to another
group's rows: :data:`PERMUTE_GROUPS`), the neighbour test counts only
neighbours from other groups, the readers' test permutes its fold's groups,
and the bounds resample whole groups.  Where some group holds more than one
class, moving blocks would change what a group holds, so the labels are
permuted within each group (:data:`PERMUTE_WITHIN_GROUPS`): independence given
the group, which does not ask about the groups' own labels (said in the
record).
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray
from scipy.stats import beta
from threadpoolctl import ThreadpoolController

from veil.audit.independence_report import IndependenceTest
from veil.audit.scores import ProbeScore

#: The family's level, and the upper bounds' one-sided confidence (1 - ALPHA).
ALPHA = 0.05
#: Gaussian bandwidths as multiples of the median distance between rows.  Distances in a few hundred dimensions
#: bunch around their median, so narrower kernels see little more than each row itself; the widest approach a
#: comparison of class means (a kernel nearly linear in the squared distance).
KERNEL_SCALES = (0.5, 1.0, 2.0, 4.0, 8.0)
#: At most this many rows (a seeded draw) enter the kernel test: its matrices hold rows² float64 values each.
KERNEL_ROWS = 2000
#: Resamples of the rows behind the kernel and neighbour tests' upper bounds.
BOOTSTRAP_ROUNDS = 200
#: Found once: finding the thread pools on every call cost more than the small products it limits.
_THREADS = ThreadpoolController()
#: Permuted labels evaluated at a time are capped so that a block holds about this many values (2 MB of float64
#: or int64 per array: a streamed fit's peak stays that of its chunks).
_BLOCK_VALUES = 250_000

#: How a test's labels were permuted: row by row; whole groups' labels moved as units to other groups' rows; within
#: each group; within each value of a context.
PERMUTE_ROWS = "rows"
PERMUTE_GROUPS = "groups"
PERMUTE_WITHIN_GROUPS = "within groups"
PERMUTE_WITHIN_CONTEXT = "within context values"


@dataclass(frozen=True)
class Grouping:
    """How a test treats a group column: each row's group and how the labels are permuted.

    ``within`` names the groups to permute within (the fallback, and context values); ``blocks`` the groups whose
    labels move as units (set only when the attribute is constant within each of them).
    """

    permutation: str
    blocks: NDArray[np.intp] | None = None
    within: NDArray[np.intp] | None = None

    def take(self, rows: NDArray[np.intp]) -> Grouping:
        """The same grouping on a subset of the rows."""
        return Grouping(
            self.permutation,
            None if self.blocks is None else self.blocks[rows],
            None if self.within is None else self.within[rows],
        )

    @property
    def apart(self) -> NDArray[np.intp] | None:
        """The groups whose rows a statistic must not pair with each other (a row's neighbours come from other
        groups), whichever the permutation."""
        return self.blocks if self.blocks is not None else self.within


ROWS = Grouping(PERMUTE_ROWS)


def group_grouping(codes: NDArray[np.intp], groups: NDArray[np.intp]) -> Grouping:
    """The permutation a group column allows: whole groups where each holds one class, else within each group."""
    first = np.full(int(groups.max()) + 1, -1, dtype=np.intp)
    first[groups] = codes
    if np.array_equal(first[groups], codes):
        return Grouping(PERMUTE_GROUPS, blocks=groups)
    return Grouping(PERMUTE_WITHIN_GROUPS, blocks=None, within=groups)


@dataclass(frozen=True)
class Outcome:
    """One test's figures before the family's correction (see :class:`IndependenceTest`)."""

    name: str
    statistic: float
    p_value: float
    effect: float
    effect_upper: float
    rows: int
    reader: str | None = None
    detail: str = ""
    permutation: str = PERMUTE_ROWS


def permutation_p_value(
    observed: float, permuted: NDArray[np.floating] | NDArray[np.integer], rng: np.random.Generator, tolerance: float
) -> float:
    """The share of statistics at least the observed one, the observed counted, ties split at random.

    With ``G`` permuted statistics above the observed one and ``E`` equal to
    it (within ``tolerance``, which absorbs round-off between the same
    labelling summed in another order), the p-value is
    ``(G + U (E + 1)) / (P + 1)`` for ``U`` uniform on (0, 1]: exactly
    uniform when the labels are exchangeable.
    """
    values = np.asarray(permuted, dtype=np.float64)
    greater = int(np.count_nonzero(values > observed + tolerance))
    equal = int(np.count_nonzero(np.abs(values - observed) <= tolerance))
    return (greater + (1.0 - rng.random()) * (equal + 1)) / (values.size + 1)


def holm(p_values: NDArray[np.float64] | list[float]) -> NDArray[np.float64]:
    """Holm's step-down adjusted p-values: reject where the adjusted value is below the level."""
    p = np.asarray(p_values, dtype=np.float64)
    order = np.argsort(p, kind="stable")
    m = p.size
    adjusted = np.minimum(1.0, np.maximum.accumulate((m - np.arange(m)) * p[order]))
    out = np.empty(m)
    out[order] = adjusted
    return out


def permuted_codes(
    codes: NDArray[np.intp],
    count: int,
    rng: np.random.Generator,
    groups: NDArray[np.intp] | None = None,
    *,
    blocks: NDArray[np.intp] | None = None,
) -> NDArray[np.intp]:
    """``count`` random permutations of ``codes``, one per row; with ``groups``, each within every group only.

    Permuting within each value of a context keeps what the context alone tells about the attribute (each
    value's class shares): the test is then of independence given the context.  With ``blocks`` (each row's
    group, the class constant within each) the groups' classes are permuted among the groups and each row takes
    its group's: a group's labels move as one block, so rows of a group always share a label, as observed.
    """
    if blocks is not None:
        present = np.unique(blocks)
        index = np.searchsorted(present, blocks)
        first = np.empty(present.size, dtype=np.intp)
        first[index] = codes
        moved = rng.permuted(np.tile(first, (count, 1)), axis=1)
        return np.asarray(moved[:, index], dtype=np.intp)
    tiled = np.tile(codes, (count, 1))
    if groups is None:
        return np.asarray(rng.permuted(tiled, axis=1), dtype=np.intp)
    for group in np.unique(groups):
        members = np.flatnonzero(groups == group)
        tiled[:, members] = rng.permuted(tiled[:, members], axis=1)
    return np.asarray(tiled, dtype=np.intp)


def _blocks(total: int, per_block: int) -> list[tuple[int, int]]:
    size = max(1, per_block)
    return [(start, min(start + size, total)) for start in range(0, total, size)]


def _recoded(codes: NDArray[np.intp]) -> tuple[NDArray[np.intp], NDArray[np.intp]]:
    """Codes ``0 .. k - 1`` of the classes present, and each class's count."""
    _, inverse, counts = np.unique(codes, return_inverse=True, return_counts=True)
    return inverse.astype(np.intp), counts


def squared_distances(x: NDArray[np.floating]) -> NDArray[np.float64]:
    """Squared Euclidean distances between rows (float64, the diagonal exactly 0)."""
    rows = np.asarray(x, dtype=np.float64)
    norms = np.einsum("ij,ij->i", rows, rows)
    out: NDArray[np.float64] = norms[:, None] + norms[None, :] - 2.0 * (rows @ rows.T)
    np.maximum(out, 0.0, out=out)
    np.fill_diagonal(out, 0.0)
    return out


def class_sums(kernel: NDArray[np.float64], labels: NDArray[np.intp], counts: NDArray[np.intp]) -> NDArray[np.float64]:
    """``sum_c 1_c' K 1_c / n_c`` for each labelling (one per row of ``labels``), in blocks.

    ``counts`` are the observed labelling's class counts (their number is ``k``); ``n_c`` is each labelling's own
    count, which moves when whole groups of different sizes change class.

    BLAS runs on one thread: these products are small and many, and on a busy 2-core machine a second thread's
    spin-waiting made a 60 x 400 product a thousand times slower (34 ms against 0.03 ms).
    """
    with _THREADS.limit(limits=1):
        return _class_sums(kernel, labels, counts)


def _class_sums(kernel: NDArray[np.float64], labels: NDArray[np.intp], counts: NDArray[np.intp]) -> NDArray[np.float64]:
    n, k = kernel.shape[0], counts.size
    out = np.empty(labels.shape[0])
    for start, stop in _blocks(labels.shape[0], _BLOCK_VALUES // (n * k)):
        block = labels[start:stop]
        onehot = np.zeros((n, block.shape[0] * k))
        columns = np.arange(block.shape[0]) * k
        onehot[np.arange(n)[:, None], (columns[None, :] + block.T)] = 1.0
        quadratic = np.einsum("ij,ij->j", onehot, kernel @ onehot).reshape(block.shape[0], k)
        sizes = onehot.sum(axis=0).reshape(block.shape[0], k)
        out[start:stop] = np.divide(quadratic, sizes, out=np.zeros_like(quadratic), where=sizes > 0).sum(axis=1)
    return out


def kernel_test(
    x: NDArray[np.floating],
    codes: NDArray[np.intp],
    *,
    permutations: int,
    rng: np.random.Generator,
    alpha: float = ALPHA,
    max_rows: int = KERNEL_ROWS,
    bootstrap: int = BOOTSTRAP_ROUNDS,
    groups: NDArray[np.intp] | None = None,
    grouping: Grouping = ROWS,
) -> Outcome:
    """The aggregated kernel two-sample test (k classes) with its effect and upper bound.

    For each bandwidth the statistic is ``S = sum_c 1_c' K 1_c / n_c``; what
    changes with the labels in the kernel's between-class sum of squares.
    Each bandwidth's statistics over the observed and permuted labels are
    standardised by their own mean and spread, and the test's statistic is the
    largest over the bandwidths, calibrated on the same permutations.

    The effect is the kernel share ``R² = between / total`` (the class's share
    of the rows' spread in the kernel's feature space) at the bandwidth with
    the largest standardised statistic, less its mean under permuted labels;
    its upper bound adds the spread of a bootstrap of the rows (the upper
    ``1 - alpha`` quantile less the bootstrap mean) to the estimate.
    ``bootstrap=0`` skips the bound (it is then the estimate).

    With ``groups`` (each row's context value) the classes are those within each value (the cells of value and
    class) and the labels are permuted within each value: a test of independence given the context
    (named ``kernel-context``).

    With ``grouping`` (a group column, see :func:`group_grouping`) the labels are permuted as it says and the
    bootstrap resamples whole groups.  Pairs of rows of one group stay in the statistic: under a group-level
    permutation they always fall in one class, as observed, so they cannot make the null wrong.
    """
    name = "kernel" if groups is None else "kernel-context"
    n_all = codes.size
    rows = np.arange(n_all)
    if n_all > max_rows:
        rows = np.sort(rng.choice(n_all, size=max_rows, replace=False))
    cells = codes[rows] if groups is None else groups[rows] * (int(codes.max()) + 1) + codes[rows]
    labels, counts = _recoded(cells)
    n = labels.size
    distances = squared_distances(x[rows])
    median = float(np.median(distances[np.triu_indices(n, 1)]))
    drawn_grouping = grouping.take(rows)
    within = groups[rows] if groups is not None else drawn_grouping.within
    blocks = None if groups is not None else drawn_grouping.blocks
    all_labels = np.vstack([labels, permuted_codes(labels, permutations, rng, within, blocks=blocks)])
    permutation = PERMUTE_WITHIN_CONTEXT if groups is not None else grouping.permutation
    if median <= 0 or counts.size < 2:
        return Outcome(
            name, 0.0, 1.0, 0.0, 0.0, n, detail="the rows do not differ: nothing to test", permutation=permutation
        )
    sums = np.empty((len(KERNEL_SCALES), permutations + 1))
    totals = np.empty(len(KERNEL_SCALES))
    for index, scale in enumerate(KERNEL_SCALES):
        kernel = np.exp(-distances / (2.0 * scale**2 * median))
        totals[index] = kernel.sum()
        sums[index] = class_sums(kernel, all_labels, counts)
    centre = sums.mean(axis=1, keepdims=True)
    spread = sums.std(axis=1, keepdims=True)
    # Round-off of one labelling's sum in another order: n² terms of at most 1, a few epsilons each.
    slack = 16 * np.finfo(np.float64).eps * n * np.abs(sums).max(axis=1, keepdims=True)
    safe = np.where(spread > slack, spread, np.inf)
    standardised = (sums - centre) / safe
    largest = standardised.max(axis=0)
    tolerance = float((slack / safe).max())
    p_value = permutation_p_value(float(largest[0]), largest[1:], rng, tolerance)
    best = int(np.argmax(standardised[:, 0]))
    between = sums[best] - totals[best] / n
    total = n - totals[best] / n
    shares = between / total
    effect = float(shares[0] - shares[1:].mean())
    upper = effect
    if bootstrap:
        kernel = np.exp(-distances / (2.0 * KERNEL_SCALES[best] ** 2 * median))
        with _THREADS.limit(limits=1):
            drawn = _bootstrap_shares(kernel, labels, counts.size, bootstrap, rng, drawn_grouping.apart)
        upper = effect + float(np.quantile(drawn, 1 - alpha) - drawn.mean())
    detail = (
        f"{n} rows; Gaussian bandwidths {', '.join(f'{s:g}' for s in KERNEL_SCALES)} times the median distance "
        f"{np.sqrt(median):.3g}; strongest at {KERNEL_SCALES[best]:g}"
    )
    return Outcome(
        name, float(largest[0]), p_value, effect, max(upper, effect), n, detail=detail, permutation=permutation
    )


def _bootstrap_shares(
    kernel: NDArray[np.float64],
    labels: NDArray[np.intp],
    classes: int,
    rounds: int,
    rng: np.random.Generator,
    units: NDArray[np.intp] | None = None,
) -> NDArray[np.float64]:
    """The kernel share ``R²`` of ``rounds`` resamples of the rows, as weights (a row drawn twice weighs 2).

    With ``units`` (each row's group) whole groups are resampled: rows of a group are not independent draws.
    """
    n = labels.size
    index = np.arange(n) if units is None else np.unique(units, return_inverse=True)[1].reshape(-1)
    m = int(index.max()) + 1
    out = np.empty(rounds)
    for start, stop in _blocks(rounds, _BLOCK_VALUES // (n * (classes + 1))):
        drawn = rng.multinomial(m, np.full(m, 1.0 / m), size=stop - start).T.astype(np.float64)
        weights = drawn[index]
        whole = np.einsum("ij,ij->j", weights, kernel @ weights)
        # The resample's weight: n for rows, the drawn groups' rows for groups (the kernel's diagonal is 1).
        mass_all = weights.sum(axis=0)
        between = -whole / mass_all
        for c in range(classes):
            part = weights * (labels == c)[:, None]
            mass = part.sum(axis=0)
            quadratic = np.einsum("ij,ij->j", part, kernel @ part)
            between += np.divide(quadratic, mass, out=np.zeros_like(mass), where=mass > 0)
        out[start:stop] = between / (mass_all - whole / mass_all)
    return out


def reader_test(
    predicted: NDArray[np.intp],
    codes: NDArray[np.intp],
    scores: Mapping[str, ProbeScore],
    reader: str,
    *,
    rows: NDArray[np.intp],
    permutations: int,
    rng: np.random.Generator,
    alpha: float = ALPHA,
    grouping: Grouping = ROWS,
) -> Outcome:
    """The classifier two-sample test on the readers' held-out predictions of one fold's ``rows``.

    ``predicted`` holds each row's held-out prediction, of one reader (shape ``(n,)``) or of several (shape
    ``(readers, n)``, the named ``reader`` first).  The statistic is the most hits any reader has on ``rows``,
    which no reader's model saw: with no dependence their labels are exchangeable among them whatever the models,
    so permuting them against the fixed predictions, and taking the most hits of any reader in each permutation,
    is exact.  Testing only the reader with the most hits over every fold would not be: that choice reads the
    tested fold's labels too (five readers that read nothing, chosen so, rejected in 10% of draws at 5%).  Hits
    summed over every fold are not exact either: each fold's model is trained on the other folds' labels, the
    folds' hits move together, and labels permuted across all rows make a null too narrow (on 60 to 200 rows of
    no dependence a linear reader's summed hits rejected in 8-12% of draws at 5%).

    The effect is the named reader's accuracy above majority on every row; the upper bound is the largest
    one-sided Clopper-Pearson bound of any reader's accuracy in ``scores`` at ``1 - alpha / readers``
    (Bonferroni over the readers, so it covers the best of them, not only the one named), less majority.
    Without ``scores``, the named reader's own bound.

    With ``grouping`` (a group column; ``rows`` then a group fold) the fold's labels are permuted as it says:
    the readers' predictions of a group's rows move together, so do its labels.
    """
    n = codes.size
    readers = np.atleast_2d(predicted)
    fold_predicted, fold_codes = readers[:, rows], codes[rows]
    hits = int(np.count_nonzero(fold_predicted == fold_codes[None, :], axis=1).max())
    fold = grouping.take(rows)
    per_block = _BLOCK_VALUES // max(1, rows.size * readers.shape[0])
    null = np.concatenate(
        [
            np.count_nonzero(
                permuted_codes(fold_codes, stop - start, rng, fold.within, blocks=fold.blocks)[:, None, :]
                == fold_predicted[None, :, :],
                axis=2,
            ).max(axis=1)
            for start, stop in _blocks(permutations, per_block)
        ]
    )
    p_value = permutation_p_value(float(hits), null, rng, 0.0)
    majority = float(np.bincount(codes).max() / n)
    total = int(np.count_nonzero(readers[0] == codes))
    level = 1 - alpha / max(1, len(scores))
    bounds = [_upper_proportion(score.hits, score.n, level) for score in scores.values()]
    upper = max(bounds, default=_upper_proportion(total, n, 1 - alpha)) - majority
    read = f"the {reader} reader's" if readers.shape[0] == 1 else f"the most hits of {readers.shape[0]} readers'"
    detail = (
        f"{read} held-out predictions of one fold's {rows.size} rows (of {n}); bound over "
        f"{max(1, len(scores))} reader(s)"
    )
    return Outcome(
        "readers", hits / rows.size, p_value, total / n - majority, upper, int(rows.size), reader, detail,
        grouping.permutation,
    )  # fmt: skip


def _upper_proportion(successes: int, trials: int, level: float) -> float:
    """The one-sided Clopper-Pearson upper bound of a binomial proportion at confidence ``level``."""
    if successes >= trials:
        return 1.0
    return float(beta.ppf(level, successes + 1, trials - successes))


def neighbour_test(
    neighbours: NDArray[np.intp],
    codes: NDArray[np.intp],
    *,
    permutations: int,
    rng: np.random.Generator,
    alpha: float = ALPHA,
    bootstrap: int = BOOTSTRAP_ROUNDS,
    queries: NDArray[np.intp] | None = None,
    groups: NDArray[np.intp] | None = None,
    grouping: Grouping = ROWS,
) -> Outcome:
    """The nearest-neighbour two-sample test: the count of neighbours sharing a row's class, labels permuted.

    The neighbours stay as they are (they depend on the rows only).  The
    effect is the same-class share above its mean under permuted labels; the
    upper bound adds the spread of a bootstrap over the query rows.

    ``queries`` names the rows whose neighbours ``neighbours`` holds (all rows by default).  With ``groups``
    (each row's context value; the neighbours found within each value) the labels are permuted within each
    value: a test of independence given the context (named ``neighbours-context``).

    With ``grouping`` (a group column) ``neighbours`` must come from other groups than the row's own (see
    ``apart`` of :func:`veil.audit.geometry.nearest_neighbours`): rows of one group always share a label under a
    group-level permutation, so their pairs would only add a constant, and the question is whether rows of other
    groups with the same class sit nearby.  The labels are permuted as ``grouping`` says and the bound resamples
    whole groups.
    """
    name = "neighbours" if groups is None else "neighbours-context"
    asked = np.arange(codes.size) if queries is None else queries
    n, k = neighbours.shape
    same = int(np.count_nonzero(codes[neighbours] == codes[asked][:, None]))
    counts = []
    within = groups if groups is not None else grouping.within
    for start, stop in _blocks(permutations, _BLOCK_VALUES // (n * k)):
        labels = permuted_codes(
            codes, stop - start, rng, within, blocks=None if groups is not None else grouping.blocks
        )
        counts.append(np.count_nonzero(labels[:, neighbours] == labels[:, asked][:, :, None], axis=(1, 2)))
    null = np.concatenate(counts)
    p_value = permutation_p_value(float(same), null, rng, 0.0)
    share = same / (n * k)
    effect = share - float(null.mean()) / (n * k)
    upper = effect
    if bootstrap:
        per_row = np.mean(codes[neighbours] == codes[asked][:, None], axis=1)
        units = grouping.apart
        if units is None or groups is not None:
            drawn = np.concatenate(
                [
                    per_row[rng.integers(0, n, size=(stop - start, n))].mean(axis=1)
                    for start, stop in _blocks(bootstrap, _BLOCK_VALUES // n)
                ]
            )
        else:
            drawn = _group_bootstrap_means(per_row, units[asked], bootstrap, rng)
        upper = effect + float(np.quantile(drawn, 1 - alpha) - drawn.mean())
    where = " within each context value" if groups is not None else ""
    where += " from other groups" if grouping.apart is not None and groups is None else ""
    permutation = PERMUTE_WITHIN_CONTEXT if groups is not None else grouping.permutation
    return Outcome(
        name, share, p_value, effect, max(upper, effect), n, detail=f"{n} rows, {k} neighbours by cosine{where}",
        permutation=permutation,
    )  # fmt: skip


def _group_bootstrap_means(
    per_row: NDArray[np.float64], units: NDArray[np.intp], rounds: int, rng: np.random.Generator
) -> NDArray[np.float64]:
    """The mean of ``per_row`` over ``rounds`` resamples of whole groups (``units``: each row's group)."""
    index = np.unique(units, return_inverse=True)[1].reshape(-1)
    sums, sizes = np.bincount(index, weights=per_row), np.bincount(index).astype(np.float64)
    m = sums.size
    out = np.empty(rounds)
    for start, stop in _blocks(rounds, _BLOCK_VALUES // m):
        drawn = rng.multinomial(m, np.full(m, 1.0 / m), size=stop - start).astype(np.float64)
        out[start:stop] = (drawn @ sums) / (drawn @ sizes)
    return out


def corrected(outcomes: list[Outcome]) -> tuple[IndependenceTest, ...]:
    """The outcomes as tests of one family, each with its Holm-corrected p-value."""
    adjusted = holm([outcome.p_value for outcome in outcomes])
    return tuple(
        IndependenceTest(
            name=outcome.name,
            statistic=outcome.statistic,
            p_value=outcome.p_value,
            p_holm=float(p),
            effect=outcome.effect,
            effect_upper=outcome.effect_upper,
            rows=outcome.rows,
            reader=outcome.reader,
            detail=outcome.detail,
            permutation=outcome.permutation,
        )
        for outcome, p in zip(outcomes, adjusted, strict=True)
    )
