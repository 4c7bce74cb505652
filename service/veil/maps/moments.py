"""Mergeable first and second moments of embeddings and their attribute.

Every moment-based eraser (LEACE, mean projection, INLP with the moments
classifier) is a function of these statistics alone, so fitting in chunks,
on many workers or in one pass gives the same eraser.  States merge with the
pairwise update of Chan, Golub and LeVeque for co-moments, which stays
accurate where the naive ``E[xxᵀ] - μμᵀ`` loses digits.

The per-class co-moments (one d×d matrix per class) are accumulated only
when asked for (``by_class=True``): an eraser that reads second moments by
class needs them, the others do not, and for 12 classes of 768 dimensions
they take 57 MB that a streamed fit of the pooled moments never holds.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from veil.maps.attribute import AttributeBlock, EncodedAttribute, check_blocks, check_enough_rows
from veil.maps.given import GivenMoments, context_columns
from veil.maps.linalg import whitening_factors
from veil.samples.attributes import JOINT_LABEL_SEPARATOR

# Rows converted to float64 at a time by MomentState.from_batch (64k × 768 × 8 bytes ≈ 400 MB at most).
BLOCK_ROWS = 65536


def _rows_of(attribute: EncodedAttribute, start: int, stop: int) -> EncodedAttribute:
    return EncodedAttribute(
        labels=attribute.labels,
        matrix=attribute.matrix[start:stop],
        blocks=attribute.blocks,
        present=tuple(rows[start:stop] for rows in attribute.present),
    )


Float64Array = NDArray[np.float64]


def _slice(given: Mapping[str, NDArray[np.generic]] | None, start: int) -> dict[str, NDArray[np.generic]] | None:
    return None if given is None else {name: values[start : start + BLOCK_ROWS] for name, values in given.items()}


@dataclass(frozen=True, eq=False)
class MomentState:
    """Count, means and centred co-moments of ``x`` (d features) and ``z`` (m columns).

    Attributes
    ----------
    count : int
        Number of rows seen.
    mean_x : ndarray of shape (d,)
    mean_z : ndarray of shape (m,)
    comoment_xx : ndarray of shape (d, d)
        ``Σ (x - x̄)(x - x̄)ᵀ`` over the rows seen.
    comoment_xz : ndarray of shape (d, m)
        ``Σ (x - x̄)(z - z̄)ᵀ``.
    comoment_zz : ndarray of shape (m, m)
        ``Σ (z - z̄)(z - z̄)ᵀ``.
    labels : ndarray of shape (m,) or None
        Class label of each column of ``z`` when the attribute is categorical.
    class_comoments : ndarray of shape (m, d, d) or None
        ``Σ_{i in c} (x_i - x̄_c)(x_i - x̄_c)ᵀ`` for each class ``c`` (zero for a
        class with no rows), when accumulated (``by_class=True``); None otherwise.
    blocks : tuple of AttributeBlock
        Each attribute's columns of ``z`` when the state holds several (``labels`` is then None);
        :meth:`block` gives one attribute's own state.
    partial : tuple of MomentState
        Incomplete labels: each attribute's own state, of the rows that carry
        it (``x`` and its encoding); this state then holds the moments of
        ``x`` over every row and no columns of ``z``.  Empty otherwise.
    given : GivenMoments or None
        The moments within every value of each context column, for every
        categorical attribute (:class:`~veil.maps.given.GivenMoments`); None without a context.
    """

    count: int
    mean_x: Float64Array
    mean_z: Float64Array
    comoment_xx: Float64Array
    comoment_xz: Float64Array
    comoment_zz: Float64Array
    labels: NDArray[np.generic] | None
    class_comoments: Float64Array | None = None
    blocks: tuple[AttributeBlock, ...] = ()
    partial: tuple[MomentState, ...] = ()
    given: GivenMoments | None = None

    @classmethod
    def from_batch(
        cls,
        x: NDArray[np.floating],
        attribute: EncodedAttribute,
        *,
        by_class: bool = False,
        given: object = None,
    ) -> MomentState:
        """Moments of one batch of rows ``x`` (n, d) with their encoded attribute.

        Large batches are taken ``BLOCK_ROWS`` rows at a time and merged, so
        the float64 working copy stays small whatever ``n`` is (and fits in
        cache better: a 200,000 × 768 float32 fit runs faster this way too).

        Parameters
        ----------
        x : ndarray of shape (n, d)
        attribute : EncodedAttribute
        by_class : bool, default=False
            Also accumulate each class's co-moments (a categorical attribute only).
        given : array-like of shape (n,), mapping of str to array-like, or 2-D table, optional
            Each row's value of one context column, or of several by name (see
            :func:`~veil.maps.given.context_columns`): also accumulate the moments within
            every value of each, for every categorical attribute (:class:`~veil.maps.given.GivenMoments`).
        """
        if by_class and not attribute.is_categorical:
            raise ValueError("per-class moments need 1-D class labels z, not a 2-D attribute matrix")
        columns = None if given is None else context_columns(given, x.shape[0])
        state = cls._from_block(x[:BLOCK_ROWS], _rows_of(attribute, 0, BLOCK_ROWS), by_class, _slice(columns, 0))
        for start in range(BLOCK_ROWS, x.shape[0], BLOCK_ROWS):
            stop = min(start + BLOCK_ROWS, x.shape[0])
            block = cls._from_block(x[start:stop], _rows_of(attribute, start, stop), by_class, _slice(columns, start))
            state = state.merge(block)
        return state

    @classmethod
    def _from_block(
        cls,
        x: NDArray[np.floating],
        attribute: EncodedAttribute,
        by_class: bool,
        given: Mapping[str, NDArray[np.generic]] | None,
    ) -> MomentState:
        state = cls._pooled(x, attribute, by_class)
        if given is None:
            return state
        return dataclasses.replace(state, given=GivenMoments.from_batch(x, attribute, given))

    @classmethod
    def _pooled(cls, x: NDArray[np.floating], attribute: EncodedAttribute, by_class: bool) -> MomentState:
        if attribute.present:
            # Incomplete labels: x over every row, and each attribute with x over the rows that carry it.
            pooled = cls._pooled(x, EncodedAttribute(labels=None, matrix=np.zeros((x.shape[0], 0))), False)
            partial = tuple(
                cls._pooled(
                    x[rows],
                    EncodedAttribute(labels=block.labels, matrix=attribute.matrix[rows, block.start : block.stop]),
                    False,
                )
                for block, rows in zip(attribute.blocks, attribute.present, strict=True)
            )
            return dataclasses.replace(pooled, blocks=attribute.blocks, partial=partial)
        z64 = attribute.matrix
        count = x.shape[0]
        if count == 0:
            empty = cls.empty(x.shape[1], z64.shape[1], attribute.labels, by_class=by_class)
            return dataclasses.replace(empty, blocks=attribute.blocks)
        # Always a copy (float64 input too), centred in place below: one block-sized float64 array instead of
        # the cast and a centred copy of it; a fresh 400 MB array costs its page faults on every block.
        xc = np.array(x, dtype=np.float64)
        mean_x = xc.mean(axis=0)
        mean_z = z64.mean(axis=0)
        class_comoments = _class_comoments(xc, attribute.codes, z64.shape[1]) if by_class else None
        xc -= mean_x
        zc = z64 - mean_z
        return cls(
            count=count,
            mean_x=mean_x,
            mean_z=mean_z,
            comoment_xx=xc.T @ xc,
            comoment_xz=xc.T @ zc,
            comoment_zz=zc.T @ zc,
            labels=attribute.labels,
            class_comoments=class_comoments,
            blocks=attribute.blocks,
        )

    @classmethod
    def empty(cls, d: int, m: int, labels: NDArray[np.generic] | None = None, *, by_class: bool = False) -> MomentState:
        """A state that has seen no rows (with zero per-class co-moments if ``by_class``)."""
        if by_class and labels is None:
            raise ValueError("per-class moments need 1-D class labels z, not a 2-D attribute matrix")
        class_comoments = np.zeros((m, d, d)) if by_class else None
        return cls(
            0, np.zeros(d), np.zeros(m), np.zeros((d, d)), np.zeros((d, m)), np.zeros((m, m)), labels, class_comoments
        )

    @property
    def n_features(self) -> int:
        return int(self.mean_x.shape[0])

    def _with_labels(self, labels: NDArray[np.generic]) -> MomentState:
        """Re-index the categorical columns onto ``labels`` (a superset).

        A class this state never saw had indicator 0 on all its rows, so its
        mean, and every co-moment with it, is exactly zero.
        """
        assert self.labels is not None
        position = np.searchsorted(labels, self.labels)
        m = labels.size
        mean_z, xz, zz = self._placed(position, m)
        by_class = None
        if self.class_comoments is not None:
            by_class = np.zeros((m, self.n_features, self.n_features))
            by_class[position] = self.class_comoments
        return MomentState(self.count, self.mean_x, mean_z, self.comoment_xx, xz, zz, labels, by_class)

    def _with_blocks(self, blocks: tuple[AttributeBlock, ...]) -> MomentState:
        """Re-index the stacked columns onto ``blocks`` (the same attributes, each with a superset of classes)."""
        position = np.concatenate(
            [
                np.arange(new.start, new.stop)
                if old.labels is None or new.labels is None
                else new.start + np.searchsorted(new.labels, old.labels)
                for old, new in zip(self.blocks, blocks, strict=True)
            ]
        ).astype(np.intp)
        mean_z, xz, zz = self._placed(position, blocks[-1].stop)
        return MomentState(self.count, self.mean_x, mean_z, self.comoment_xx, xz, zz, None, None, blocks)

    def _placed(
        self, position: NDArray[np.intp], m: int
    ) -> tuple[NDArray[np.float64], NDArray[np.float64], NDArray[np.float64]]:
        """The attribute's statistics moved to columns ``position`` of ``m`` (the others zero: no rows there)."""
        mean_z = np.zeros(m)
        mean_z[position] = self.mean_z
        xz = np.zeros((self.n_features, m))
        xz[:, position] = self.comoment_xz
        zz = np.zeros((m, m))
        zz[np.ix_(position, position)] = self.comoment_zz
        return mean_z, xz, zz

    def _aligned_blocks(self, other: MomentState) -> tuple[MomentState, MomentState]:
        names = [(block.name, block.kind) for block in self.blocks]
        if names != [(block.name, block.kind) for block in other.blocks]:
            raise ValueError(f"cannot merge moments of different attributes: {names} and {other.block_names}")
        if all(a.same_as(b) for a, b in zip(self.blocks, other.blocks, strict=True)):
            return self, other
        union: list[AttributeBlock] = []
        start = 0
        for a, b in zip(self.blocks, other.blocks, strict=True):
            labels = None if a.labels is None or b.labels is None else np.union1d(a.labels, b.labels)
            width = 1 if labels is None else labels.size
            union.append(AttributeBlock(a.name, labels, start, start + width, a.joint))
            start += width
        blocks = tuple(union)
        return self._with_blocks(blocks), other._with_blocks(blocks)

    @property
    def block_names(self) -> list[str]:
        """The attributes' names when the state holds several (empty otherwise)."""
        return [block.name for block in self.blocks]

    def block(self, name: str) -> MomentState:
        """The state of one attribute of several (its own columns of ``z``), with the same rows and ``x``."""
        matches = [block for block in self.blocks if block.name == name]
        if not matches:
            raise ValueError(f"unknown attribute {name!r}; the attributes are {self.block_names}")
        block = matches[0]
        if self.partial:
            return self.partial[self.blocks.index(block)]
        cols = slice(block.start, block.stop)
        return MomentState(
            self.count,
            self.mean_x,
            self.mean_z[cols],
            self.comoment_xx,
            self.comoment_xz[:, cols],
            self.comoment_zz[cols, cols],
            block.labels,
        )

    def _aligned(self, other: MomentState) -> tuple[MomentState, MomentState]:
        if self.n_features != other.n_features:
            raise ValueError(f"cannot merge moments of {self.n_features} and {other.n_features} features")
        if self.blocks or other.blocks:
            return self._aligned_blocks(other)
        if (self.labels is None) != (other.labels is None):
            raise ValueError("cannot merge moments of a categorical and a numeric attribute")
        if (self.class_comoments is None) != (other.class_comoments is None):
            raise ValueError("cannot merge moments with per-class co-moments and moments without them")
        if self.labels is None or other.labels is None:
            if self.mean_z.shape != other.mean_z.shape:
                raise ValueError(
                    f"cannot merge attribute matrices of {self.mean_z.size} and {other.mean_z.size} columns"
                )
            return self, other
        if (self.labels.dtype.kind in "US") != (other.labels.dtype.kind in "US"):
            raise ValueError("attribute labels changed type between batches (strings vs numbers)")
        if np.array_equal(self.labels, other.labels):
            return self, other
        union = np.union1d(self.labels, other.labels)
        return self._with_labels(union), other._with_labels(union)

    def merge(self, other: MomentState) -> MomentState:
        """The state of the union of the rows of ``self`` and ``other``.

        Pairwise update: with ``δ = mean_b - mean_a`` and ``n = n_a + n_b``,
        ``M = M_a + M_b + (n_a n_b / n) δ_x δ_zᵀ`` (Chan, Golub and LeVeque);
        the per-class co-moments take the same update class by class, with
        the class's counts and means.
        """
        if self.partial or other.partial:
            return self._merged_partial(other)
        if (self.given is None) != (other.given is None):
            raise ValueError("cannot merge moments within a context with moments without one")
        given = None if self.given is None or other.given is None else self.given.merge(other.given)
        return dataclasses.replace(self._merged_pooled(other), given=given)

    def _merged_pooled(self, other: MomentState) -> MomentState:
        a, b = self._aligned(other)
        if b.count == 0:
            return a
        if a.count == 0:
            return b
        n = a.count + b.count
        delta_x = b.mean_x - a.mean_x
        delta_z = b.mean_z - a.mean_z
        weight = a.count * b.count / n
        return MomentState(
            count=n,
            mean_x=a.mean_x + delta_x * (b.count / n),
            mean_z=a.mean_z + delta_z * (b.count / n),
            comoment_xx=a.comoment_xx + b.comoment_xx + weight * np.outer(delta_x, delta_x),
            comoment_xz=a.comoment_xz + b.comoment_xz + weight * np.outer(delta_x, delta_z),
            comoment_zz=a.comoment_zz + b.comoment_zz + weight * np.outer(delta_z, delta_z),
            labels=a.labels,
            class_comoments=_merged_class_comoments(a, b),
            blocks=a.blocks,
        )

    def check_fittable(self) -> None:
        """Refuse statistics no eraser can be fitted from (``ValueError`` naming the attribute at fault)."""
        if not self.blocks:
            check_enough_rows(self.count, self.labels)
            return
        if self.partial:
            for block, state in zip(self.blocks, self.partial, strict=True):
                spread = np.diag(state.comoment_zz) / max(state.count, 1)
                width = block.stop - block.start
                check_blocks(state.count, (AttributeBlock(block.name, block.labels, 0, width, block.joint),), spread)
            return
        spread = np.diag(self.comoment_zz) / max(self.count, 1)
        check_blocks(self.count, self.blocks, spread)

    def _merged_partial(self, other: MomentState) -> MomentState:
        """The merge of two states of incomplete labels: ``x`` over every row, each attribute over its own rows."""
        kinds = [(block.name, block.kind) for block in self.blocks]
        if not (self.partial and other.partial) or kinds != [(block.name, block.kind) for block in other.blocks]:
            raise ValueError("cannot merge moments of incomplete labels with moments of other attributes")
        pooled = dataclasses.replace(self, blocks=(), partial=()).merge(
            dataclasses.replace(other, blocks=(), partial=())
        )
        partial = tuple(a.merge(b) for a, b in zip(self.partial, other.partial, strict=True))
        blocks = []
        start = 0
        for block, state in zip(self.blocks, partial, strict=True):
            width = 1 if state.labels is None else state.labels.size
            blocks.append(AttributeBlock(block.name, state.labels, start, start + width, block.joint))
            start += width
        return dataclasses.replace(pooled, blocks=tuple(blocks), partial=partial)

    def _require_rows(self) -> None:
        if self.count == 0:
            raise ValueError("no rows have been seen yet")

    @property
    def covariance_xx(self) -> Float64Array:
        """Population covariance of ``x``, shape (d, d)."""
        self._require_rows()
        return self.comoment_xx / self.count

    @property
    def cross_covariance(self) -> Float64Array:
        """Population cross-covariance ``Cov(x, z)``, shape (d, m)."""
        self._require_rows()
        return self.comoment_xz / self.count

    @property
    def covariance_zz(self) -> Float64Array:
        """Population covariance of ``z``, shape (m, m)."""
        self._require_rows()
        return self.comoment_zz / self.count

    @property
    def attribute_rank(self) -> int | None:
        """The rank the structure of the attribute fixes: ``C - 1`` for ``C`` classes with rows; None if numeric.

        The indicators of ``C`` classes sum to 1 on every row, so their
        centred covariance has rank ``C - 1`` exactly; its remaining
        eigenvalue, and any direction built on it, is rounding noise.
        """
        if self.labels is None:
            return None
        return max(int(np.count_nonzero(self.mean_z > 0)) - 1, 0)

    def attribute_whitening(self) -> tuple[Float64Array, Float64Array]:
        """Eigen-factors of ``Cov(z)^(-1/2)`` on its support: eigenvectors (m, r) and scales (r,).

        ``r`` is :attr:`attribute_rank` for a categorical attribute; for a
        numeric one it is the rank of ``Cov(z)`` under the covariance cut of
        :func:`veil.maps.linalg.whitening_factors` (at most the number of columns).
        """
        return whitening_factors(self.covariance_zz, rank=self.attribute_rank)

    def standardized_cross_covariance(self) -> Float64Array:
        """``Cov(x, z̃)`` for the whitened attribute ``z̃ = Cov(z)^(-1/2) (z - z̄)``, shape (d, r).

        It spans the same directions as ``Cov(x, z)`` (whose rows lie in the
        support of ``Cov(z)``), but has exactly as many columns as the
        attribute has independent directions, and units that do not depend
        on how the attribute is scaled.

        With several attributes, each is whitened on its own (a categorical
        one to its exact rank ``C - 1``) and the blocks are stacked, shape
        (d, Σ r_a): the columns span ``Cov(x, z)`` of the stacked encoding,
        each block's singular values are canonical correlations (at most 1),
        and no joint whitening of attributes that may depend on each other
        (the intersection on its parts) has a rank to decide.
        """
        if self.blocks:
            return np.hstack([self.block(block.name).standardized_cross_covariance() for block in self.blocks])
        eigenvectors, scale = self.attribute_whitening()
        return np.asarray(self.cross_covariance @ (eigenvectors * scale))

    def guarded_cross_covariance(self, *, population: bool = True) -> tuple[Float64Array, float]:
        """The columns an eraser must remove, and the bound on their singular values, shape (d, r).

        Without a context: :meth:`standardized_cross_covariance`.  With contexts (:attr:`given`): each value's
        standardized within-value cross-covariance, weighted by its share of rows, for every pair of a context
        column and an attribute (see :meth:`GivenMoments.standardized_cross_covariances`), after the
        population's own columns when ``population`` is true.  Each attribute's population block and each
        pair's stack has singular values at most 1, so the whole stack's are at most the square root of their
        number: the bound returned.
        """
        own = max(len(self.blocks), 1)
        if self.given is None:
            if not population:
                raise ValueError("guarding within a context only needs a context: fit with given=...")
            return self.standardized_cross_covariance(), 1.0
        within, pairs = self.given.standardized_cross_covariances()
        if not population:
            return within, float(np.sqrt(pairs))
        return np.hstack([self.standardized_cross_covariance(), within]), float(np.sqrt(own + pairs))

    def conditional_mean(self, targets: Mapping[str, object]) -> Float64Array:
        """``E[x | z = t]`` under the linear model of ``x`` on the stacked attributes, shape (d,).

        ``targets`` names a class (categorical) or a value (continuous) for
        every attribute; the joint class follows from the categorical ones.
        The regression runs on each attribute whitened on its own, so a
        categorical one enters at its exact rank; what the attributes share
        (the intersection holds its parts) is resolved by the pseudo-inverse
        of their whitened covariance, whose zero eigenvalues are exact.
        """
        if not self.blocks:
            raise ValueError("targets by attribute need moments of several attributes")
        if self.partial:
            raise ValueError(
                "counterfactual targets need every attribute on the same rows; this eraser was fitted on "
                "incomplete labels"
            )
        if not isinstance(targets, Mapping):
            raise ValueError(f"the target must name a value for each attribute {self.block_names}, e.g. a dict")
        named = [block.name for block in self.blocks if not block.joint]
        missing = [name for name in named if name not in targets]
        extra = [str(name) for name in targets if name not in named]
        if missing or extra:
            raise ValueError(
                f"the target must name every attribute ({', '.join(named)}): "
                + (f"{missing[0]!r} is missing" if missing else f"{extra[0]!r} is not one of them")
            )
        whitened: list[Float64Array] = []
        factors: list[Float64Array] = []
        classes: list[str] = []
        for block in self.blocks:
            state = self.block(block.name)
            if block.joint:
                wanted: object = JOINT_LABEL_SEPARATOR.join(classes)
            else:
                wanted = targets[block.name]
            if block.labels is None:
                try:
                    value = float(wanted)  # type: ignore[arg-type]
                except (TypeError, ValueError):
                    raise ValueError(f"the target of continuous attribute {block.name!r} must be a number") from None
                if not np.isfinite(value):
                    raise ValueError(f"the target of continuous attribute {block.name!r} must be finite")
                vector = np.array([value])
            else:
                matches = np.flatnonzero(block.labels.astype(str) == str(wanted))
                if matches.size != 1:
                    raise ValueError(
                        f"unknown class {wanted!r} of attribute {block.name!r}; its classes are {block.labels.tolist()}"
                    )
                vector = np.zeros(block.labels.size)
                vector[matches[0]] = 1.0
                classes.append(str(block.labels[matches[0]]))
            eigenvectors, scale = state.attribute_whitening()
            factor = eigenvectors * scale
            factors.append(factor)
            whitened.append((vector - state.mean_z) @ factor)
        # Cov(z̃) of the blockwise-whitened attributes: identity blocks on the diagonal, correlations off it.
        widths = [f.shape[1] for f in factors]
        offsets = np.concatenate([[0], np.cumsum(widths)])
        joint_cov = np.zeros((offsets[-1], offsets[-1]))
        for i, (bi, fi) in enumerate(zip(self.blocks, factors, strict=True)):
            for j, (bj, fj) in enumerate(zip(self.blocks, factors, strict=True)):
                block_cov = self.covariance_zz[bi.start : bi.stop, bj.start : bj.stop]
                joint_cov[offsets[i] : offsets[i + 1], offsets[j] : offsets[j + 1]] = fi.T @ block_cov @ fj
        eigenvectors, scale = whitening_factors(joint_cov)
        coefficients = (np.concatenate(whitened) @ eigenvectors) * scale**2 @ eigenvectors.T
        return np.asarray(self.mean_x + self.standardized_cross_covariance() @ coefficients)

    @property
    def class_priors(self) -> Float64Array:
        """Share of rows in each class (categorical attributes only), shape (m,)."""
        self._require_categorical()
        return self.mean_z.copy()

    @property
    def class_means(self) -> Float64Array:
        """Mean of ``x`` in each class, shape (m, d).

        For an indicator column, ``Cov(x, z_c) = p_c (μ_c - μ)``; classes that
        have no rows get the overall mean.
        """
        self._require_categorical()
        priors = self.mean_z
        offsets = np.zeros((priors.size, self.n_features))
        seen = priors > 0
        offsets[seen] = (self.cross_covariance[:, seen] / priors[seen]).T
        return self.mean_x + offsets

    @property
    def class_counts(self) -> NDArray[np.int64]:
        """Rows in each class (categorical attributes only), shape (m,).

        ``count · mean_z`` is an integer up to a relative rounding of about
        1e-16 (an indicator's mean times the row count), far from ½.
        """
        self._require_categorical()
        return np.rint(self.count * self.mean_z).astype(np.int64)

    @property
    def class_covariances(self) -> Float64Array:
        """Population covariance of ``x`` within each class, shape (m, d, d); zero for a class with no rows.

        ``Σ_c p_c Cov_c + Cov_between = Cov(x)``: with the class shares as
        weights these are the within-class part of :attr:`covariance_xx`.
        """
        self._require_categorical()
        if self.class_comoments is None:
            raise ValueError("these moments hold no per-class co-moments; accumulate them with by_class=True")
        counts = self.class_counts
        out = np.zeros_like(self.class_comoments)
        seen = counts > 0
        out[seen] = self.class_comoments[seen] / counts[seen, None, None]
        return out

    def _require_categorical(self) -> None:
        self._require_rows()
        if self.labels is None:
            raise ValueError("class statistics need a categorical (1-D) attribute")


def _class_comoments(x64: Float64Array, codes: NDArray[np.intp], m: int) -> Float64Array:
    """``Σ_{i in c} (x_i - x̄_c)(x_i - x̄_c)ᵀ`` of each of ``m`` classes, shape (m, d, d)."""
    out = np.zeros((m, x64.shape[1], x64.shape[1]))
    for c in np.unique(codes):
        centred = x64[codes == c]
        centred -= centred.mean(axis=0)
        out[c] = centred.T @ centred
    return out


def _merged_class_comoments(a: MomentState, b: MomentState) -> Float64Array | None:
    """The per-class co-moments of the union of ``a``'s and ``b``'s rows (both with rows, labels aligned)."""
    if a.class_comoments is None or b.class_comoments is None:
        return None
    counts_a, counts_b = a.class_counts, b.class_counts
    total = counts_a + counts_b
    weight = np.zeros(total.size)
    both = (counts_a > 0) & (counts_b > 0)
    weight[both] = counts_a[both] * counts_b[both] / total[both]
    delta = b.class_means - a.class_means
    return a.class_comoments + b.class_comoments + weight[:, None, None] * (delta[:, :, None] * delta[:, None, :])
