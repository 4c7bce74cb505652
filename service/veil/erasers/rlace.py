"""R-LACE: relaxed linear adversarial concept erasure of a chosen rank."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray
from sklearn.utils import check_random_state
from threadpoolctl import threadpool_limits

from veil.erasers._base import LinearErasure
from veil.erasers._fantope import FantopePoint, ascend
from veil.maps.attribute import check_enough_rows, check_positive_int
from veil.maps.linalg import restrict_to_support
from veil.maps.lowrank import AffineLowRankMap
from veil.maps.moments import MomentState
from veil.progress import advance

Float64Array = NDArray[np.float64]

# The projection's step length shrinks as 1 / sqrt(1 + t / _STEP_DECAY_ITERATIONS).
_STEP_DECAY_ITERATIONS = 10.0


def _probabilities(rows: Float64Array, point: FantopePoint, weights: Float64Array, bias: Float64Array) -> Float64Array:
    """Class probabilities of the classifier on ``(I - P) x``, shape (n, c); the last class has logit 0."""
    logits = rows @ point.kept(weights) + bias
    logits = np.hstack([logits, np.zeros((logits.shape[0], 1))])
    shifted = np.exp(logits - logits.max(axis=1, keepdims=True))
    return np.asarray(shifted / shifted.sum(axis=1, keepdims=True))


def _free_residual(probabilities: Float64Array, targets: Float64Array) -> Float64Array:
    """``∂L/∂logits`` of the mean cross-entropy for the free classes, shape (n, c - 1)."""
    return np.asarray((probabilities - targets)[:, :-1] / probabilities.shape[0])


class RLACE(LinearErasure):
    """Relaxed linear adversarial concept erasure (R-LACE) of rank ``k``.

    Solves the minimax game ``max_P min_θ  L(θ; (I - P) x) + ½α‖W‖²`` between
    a multinomial logistic classifier ``θ = (W, b)`` of the attribute and a
    projection ``P`` of rank ``k``, relaxed to the Fantope
    ``{0 ⪯ P ⪯ I, tr P = k}``.  The game starts from a random rank-``k``
    projection; each iteration takes classifier gradient steps, then one
    projected ascent step on ``P`` whose length shrinks as
    ``1 / sqrt(1 + t / 10)``, so the iterates settle instead of circling the
    optimum.  The last iterate is rounded to the orthogonal projection onto
    its top-``k`` eigenvectors ``Q``: ``U = V = Q``.

    Rows are centred and scaled by one global factor (unit mean squared
    coordinate) first; ``alpha`` is relative to that scale.  From rank
    ``classes - 1`` on, a projection can make the class means coincide,
    which is exactly when no linear classifier beats the priors; the game's
    optimum then removes the span of the class-mean offsets (at rank
    ``classes - 1``, that span and nothing else) whatever ``alpha`` is, and
    ``alpha`` only sets how fast the game gets there.

    Parameters
    ----------
    rank : int, default=1
        Number of directions removed.
    max_iter : int, default=300
        Game iterations (one projection step each).
    classifier_steps : int, default=3
        Classifier gradient steps per iteration.  Each step has length
        ``1 / L``, with ``L`` a bound on the curvature of the classifier's
        loss (Böhning's bound on the multinomial logistic Hessian, times the
        largest variance of the scaled rows, plus ``alpha``), so on a full
        batch the classifier's penalised loss never rises during its steps.
    projection_learning_rate : float, default=0.05
        Frobenius length of the first ascent step of the projection; step
        ``t`` is ``1 / sqrt(1 + t / 10)`` times as long.  Steps are
        normalised, so the classifier's confidence does not set them.
    alpha : float, default=1.0
        L2 penalty of the classifier's weights.  A weaker penalty lets the
        adversary lean on directions of little variance, which makes the
        game slow to settle: at 0.01, a probe trained on held-out rows of
        the committed sample still reads 0.65 on the pronoun after 300
        iterations, against 0.61 at the default and after mean projection.
    batch_size : int, default=4096
        Rows per iteration (all rows when fewer).  Smaller batches make an
        iteration cheaper but leave their sampling noise in the projection
        found.
    random_state : int or None, default=None
        Seeds the starting projection and the mini-batches.
    normalize : bool, default=False
        Re-normalise erased rows to unit length.

    Attributes
    ----------
    map_ : AffineLowRankMap
    moments_ : MomentState
    history_ : list of dict
        Per iteration: ``iteration``, ``loss`` (the classifier's
        cross-entropy after its steps, which the projection pushes up) and
        ``prior_entropy`` (the loss of predicting the class priors, which a
        classifier that learned nothing has: the game's target).
    n_iter_ : int
        Game iterations run.
    relaxed_projection_ : ndarray of shape (d, d)
        The Fantope solution before rounding (fit-time diagnostic only).
    classes_ : ndarray of shape (n_classes,)
    n_features_in_ : int
    """

    method = "rlace"
    _requires_categorical = True

    def __init__(
        self,
        *,
        rank: int = 1,
        max_iter: int = 300,
        classifier_steps: int = 3,
        projection_learning_rate: float = 0.05,
        alpha: float = 1.0,
        batch_size: int = 4096,
        random_state: int | None = None,
        normalize: bool = False,
    ) -> None:
        self.rank = rank
        self.max_iter = max_iter
        self.classifier_steps = classifier_steps
        self.projection_learning_rate = projection_learning_rate
        self.alpha = alpha
        self.batch_size = batch_size
        self.random_state = random_state
        self.normalize = normalize

    def _check_params(self, d: int) -> None:
        check_positive_int("rank", self.rank)
        if self.rank >= d:
            raise ValueError(f"rank {self.rank} is too large: it must be below the dimension {d}")
        for name in ("max_iter", "classifier_steps", "batch_size"):
            check_positive_int(name, getattr(self, name))
        for name in ("projection_learning_rate", "alpha"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value) or value <= 0:
                raise ValueError(f"{name} must be a positive number, got {value!r}")

    def fit(self, X: ArrayLike, z: object = None, *, attribute: object = None) -> RLACE:
        """Fit the eraser.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
        z : array-like of shape (n_samples,)
            Class labels of the attribute.  Not read when ``attribute`` is
            given (in a pipeline it is the task).
        attribute : array-like of shape (n_samples,), optional
            The attribute by keyword, as a pipeline routes it
            (``set_fit_request(attribute=True)``); it then replaces ``z``.

        Returns
        -------
        self
        """
        array, encoded = self._validate_fit_input(X, self._attribute_to_erase(z, attribute), reset=True)
        check_enough_rows(array.shape[0], encoded.labels)
        d = array.shape[1]
        self._check_params(d)
        moments = MomentState.from_batch(array, encoded)
        rng = check_random_state(self.random_state)

        centred = np.asarray(array, dtype=np.float64) - moments.mean_x
        # One global scale keeps step sizes meaningful without changing which
        # projection is optimal (a per-feature scale would).
        spread = float(np.sqrt(np.mean(centred**2)))
        scale = spread if spread > 0 else 1.0
        centred /= scale
        largest_variance = float(np.linalg.eigvalsh(moments.covariance_xx)[-1]) / scale**2
        # Every product in the game is thin (d × (classes - 1)): BLAS threads
        # waiting on each other cost more than they give, many times over on a busy machine.
        with threadpool_limits(limits=1, user_api="blas"):
            point, history = self._play(centred, encoded.matrix, moments.class_priors, largest_variance, rng)

        q = restrict_to_support(point.top(self.rank), moments.covariance_xx)
        self.history_ = history
        self.n_iter_ = self.max_iter
        self.relaxed_projection_ = point.dense()
        self._set_fitted(AffineLowRankMap(mean=moments.mean_x, u=q, v=q), moments)
        return self

    def _play(
        self,
        rows: Float64Array,
        targets: Float64Array,
        priors: Float64Array,
        largest_variance: float,
        rng: np.random.RandomState,
    ) -> tuple[FantopePoint, list[dict[str, float]]]:
        """Play the game on centred, scaled ``rows`` (n, d) with one-hot ``targets`` (n, c).

        Returns the last point of the relaxed projection and the per-iteration history.
        """
        n, d = rows.shape
        classes = targets.shape[1]
        # The last class is the reference (logit 0): weights for the others
        # only, so no direction of W is fixed by round-off alone.
        weights = np.zeros((d, classes - 1))
        bias = np.log(priors[:-1] / priors[-1])
        # Böhning's bound: the Hessian of the multinomial cross-entropy in the
        # free logits is at most ½(I - 11ᵀ/c), whose largest eigenvalue is ¼
        # for two classes and ½ beyond.  Times the largest variance of the
        # kept rows (at most that of the rows, as ‖I - P‖ ≤ 1) plus the
        # penalty, it bounds the curvature in W.  Mini-batches take the same
        # steps: they are stochastic steps on the loss of all the rows.
        curvature = 0.25 if classes == 2 else 0.5
        weight_step = 1.0 / (curvature * largest_variance + self.alpha)
        bias_step = 1.0 / curvature
        prior_entropy = float(-np.sum(priors * np.log(priors)))

        point = FantopePoint.vertex(np.linalg.qr(rng.standard_normal((d, self.rank)))[0])
        history: list[dict[str, float]] = []
        for iteration in range(self.max_iter):
            if self.batch_size < n:
                chosen = rng.choice(n, size=self.batch_size, replace=False)
                batch, batch_targets = rows[chosen], targets[chosen]
            else:
                batch, batch_targets = rows, targets
            for _ in range(self.classifier_steps):
                residual = _free_residual(_probabilities(batch, point, weights, bias), batch_targets)
                weights -= weight_step * (point.kept(batch.T @ residual) + self.alpha * weights)
                bias -= bias_step * residual.sum(axis=0)
            probabilities = _probabilities(batch, point, weights, bias)
            loss = float(-np.mean(np.log(np.maximum((probabilities * batch_targets).sum(axis=1), 1e-300))))
            residual = _free_residual(probabilities, batch_targets)
            # Logits are x (I - P) W + b, so ∂L/∂P = -(xᵀ G) Wᵀ; the
            # projection ascends its symmetric part.
            length = self.projection_learning_rate / np.sqrt(1.0 + iteration / _STEP_DECAY_ITERATIONS)
            point = ascend(point, -(batch.T @ residual), weights, length, self.rank)
            history.append({"iteration": iteration, "loss": loss, "prior_entropy": prior_entropy})
            advance("R-LACE iterations", iteration + 1, self.max_iter)
        return point, history
