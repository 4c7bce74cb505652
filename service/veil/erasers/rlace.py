"""R-LACE: relaxed linear adversarial concept erasure of a chosen rank."""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike, NDArray
from sklearn.utils import check_random_state

from veil._validation import check_enough_rows, check_positive_int
from veil.erasers._base import LinearErasure
from veil.linalg import restrict_to_support
from veil.lowrank import AffineLowRankMap
from veil.moments import MomentState
from veil.progress import advance

Float64Array = NDArray[np.float64]

_BISECTION_STEPS = 60


def fantope_projection(matrix: Float64Array, rank: int) -> Float64Array:
    """Euclidean projection of a symmetric matrix onto ``{0 ⪯ P ⪯ I, tr P = rank}``.

    With ``M = E diag(λ) Eᵀ`` the projection is ``E diag(clip(λ - γ, 0, 1)) Eᵀ``
    for the shift ``γ`` that makes the trace equal ``rank``; the trace is
    monotone in ``γ``, so ``γ`` is found by bisection.
    """
    eigenvalues, eigenvectors = np.linalg.eigh((matrix + matrix.T) / 2)
    low, high = float(eigenvalues.min()) - 1.0, float(eigenvalues.max())
    for _ in range(_BISECTION_STEPS):
        shift = (low + high) / 2
        if np.clip(eigenvalues - shift, 0.0, 1.0).sum() > rank:
            low = shift
        else:
            high = shift
    clipped = np.clip(eigenvalues - (low + high) / 2, 0.0, 1.0)
    return np.asarray((eigenvectors * clipped) @ eigenvectors.T)


def _softmax(logits: Float64Array) -> Float64Array:
    shifted = np.exp(logits - logits.max(axis=1, keepdims=True))
    return np.asarray(shifted / shifted.sum(axis=1, keepdims=True))


class _Adam:
    """Adam steps for one parameter array (descent; pass a negated gradient to ascend)."""

    def __init__(self, shape: tuple[int, ...], learning_rate: float) -> None:
        self.learning_rate = learning_rate
        self.first = np.zeros(shape)
        self.second = np.zeros(shape)
        self.steps = 0

    def step(self, gradient: Float64Array) -> Float64Array:
        beta1, beta2 = 0.9, 0.999
        self.steps += 1
        self.first = beta1 * self.first + (1 - beta1) * gradient
        self.second = beta2 * self.second + (1 - beta2) * gradient**2
        corrected = self.first / (1 - beta1**self.steps)
        spread = np.sqrt(self.second / (1 - beta2**self.steps)) + 1e-8
        return np.asarray(self.learning_rate * corrected / spread)


class RLACE(LinearErasure):
    """Relaxed linear adversarial concept erasure (R-LACE) of rank ``k``.

    Solves the minimax game ``max_P min_θ  L(θ; (I - P) x)`` between a
    multinomial logistic classifier ``θ`` of the attribute and a projection
    ``P`` of rank ``k``, relaxed to the Fantope ``{0 ⪯ P ⪯ I, tr P = k}``:
    each iteration takes classifier descent steps on a mini-batch, then one
    projected ascent step on ``P``.  The game oscillates, so the iterate kept
    is the one against which the classifier's loss came closest to the
    entropy of the class priors (a classifier that learned nothing).  The result is rounded to the orthogonal
    projection onto the top-``k`` eigenvectors ``Q`` of ``P``: ``U = V = Q``.

    Parameters
    ----------
    rank : int, default=1
        Number of directions removed.
    max_iter : int, default=300
        Game iterations (one projection step each).
    classifier_steps : int, default=5
        Classifier descent steps per iteration.
    learning_rate : float, default=0.05
        Adam step of the classifier.
    projection_learning_rate : float, default=0.02
        Length (Frobenius norm) of each normalised ascent step of the projection.
    alpha : float, default=1e-2
        L2 penalty of the classifier.
    batch_size : int, default=512
        Rows per iteration (all rows when fewer).
    random_state : int or None, default=None
        Seeds the mini-batches.
    normalize : bool, default=False
        Re-normalise erased rows to unit length.

    Attributes
    ----------
    map_ : AffineLowRankMap
    moments_ : MomentState
    history_ : list of dict
        Per iteration: ``iteration`` and ``loss``, the classifier's
        cross-entropy after its steps (the game's objective, which the
        projection pushes up towards the entropy of the class priors).
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
        classifier_steps: int = 5,
        learning_rate: float = 0.05,
        projection_learning_rate: float = 0.02,
        alpha: float = 1e-2,
        batch_size: int = 512,
        random_state: int | None = None,
        normalize: bool = False,
    ) -> None:
        self.rank = rank
        self.max_iter = max_iter
        self.classifier_steps = classifier_steps
        self.learning_rate = learning_rate
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

    def fit(self, X: ArrayLike, z: object) -> RLACE:
        """Fit the eraser.

        Parameters
        ----------
        X : array-like of shape (n_samples, n_features)
        z : array-like of shape (n_samples,)
            Class labels of the attribute.

        Returns
        -------
        self
        """
        array, attribute = self._validate_fit_input(X, z, reset=True)
        check_enough_rows(array.shape[0], attribute.labels)
        d = array.shape[1]
        self._check_params(d)
        moments = MomentState.from_batch(array, attribute)
        rng = check_random_state(self.random_state)

        centred = np.asarray(array, dtype=np.float64) - moments.mean_x
        # One global scale keeps step sizes meaningful without changing which
        # projection is optimal (a per-feature scale would).
        spread = float(np.sqrt(np.mean(centred**2)))
        centred /= spread if spread > 0 else 1.0
        targets = attribute.matrix
        n, classes = targets.shape

        projection = np.eye(d) * (self.rank / d)
        weights = np.zeros((d, classes))
        bias = np.log(np.maximum(moments.class_priors, 1e-12))
        weight_opt = _Adam(weights.shape, self.learning_rate)
        bias_opt = _Adam(bias.shape, self.learning_rate)
        history: list[dict[str, float]] = []
        # A classifier that learned nothing has the loss of predicting the priors.
        priors = moments.class_priors[moments.class_priors > 0]
        prior_entropy = float(-np.sum(priors * np.log(priors)))
        best_distance, best_projection = np.inf, projection

        for iteration in range(self.max_iter):
            rows = rng.choice(n, size=min(self.batch_size, n), replace=False)
            batch, batch_targets = centred[rows], targets[rows]
            kept = batch - batch @ projection
            for _ in range(self.classifier_steps):
                residual = (_softmax(kept @ weights + bias) - batch_targets) / rows.size
                weights -= weight_opt.step(kept.T @ residual + self.alpha * weights)
                bias -= bias_opt.step(residual.sum(axis=0))
            probabilities = _softmax(kept @ weights + bias)
            loss = float(-np.mean(np.log(np.maximum((probabilities * batch_targets).sum(axis=1), 1e-300))))
            residual = (probabilities - batch_targets) / rows.size
            # ∂L/∂P for logits = x (I - P) θ + b is -xᵀ G θᵀ; symmetrised, and
            # ascended (the projection maximises the classifier's loss).
            gradient = -(batch.T @ residual) @ weights.T
            gradient = (gradient + gradient.T) / 2
            # A normalised step keeps the gradient's low-rank structure (an
            # element-wise adaptive step such as Adam's would scramble it)
            # while staying useful when a confident classifier makes it tiny.
            step = self.projection_learning_rate * gradient / max(float(np.linalg.norm(gradient)), 1e-300)
            if abs(loss - prior_entropy) < best_distance:
                best_distance, best_projection = abs(loss - prior_entropy), projection
            projection = fantope_projection(projection + step, self.rank)
            history.append({"iteration": iteration, "loss": loss})
            advance("R-LACE iterations", iteration + 1, self.max_iter)

        # The game oscillates; keep the projection against which the
        # classifier's loss came closest to that of knowing nothing.
        projection = best_projection
        _, eigenvectors = np.linalg.eigh(projection)
        q = restrict_to_support(eigenvectors[:, ::-1][:, : self.rank], moments.covariance_xx)
        self.history_ = history
        self.n_iter_ = self.max_iter
        self.relaxed_projection_ = projection
        self._set_fitted(AffineLowRankMap(mean=moments.mean_x, u=q, v=q), moments)
        return self
