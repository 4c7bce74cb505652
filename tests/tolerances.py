"""How far two computations of one cleaned batch may differ by round-off alone: bounds, not picked numbers.

A client's batches against the whole batch, a corpus cleaned in chunks against one ``apply``, a server
capped at one BLAS thread against the test's process: each sums the same products in another order, and
float32 answers then differ in their last bits.  A fixed ``atol`` lets that round-off decide a test (2e-6
apart is nothing for a value of 7 in float32, whose spacing there is 5e-7).  The bounds here follow the
dtype's unit roundoff ``u = eps / 2``, the lengths of the sums and the size of the operands instead.

They rest on the standard rounding-error bound of a computed dot product, a published theorem of
floating-point error analysis: for any order of summation (hence any blocking, kernel or thread split a
BLAS picks),

    |fl(aᵀb) − aᵀb| ≤ γ_n Σ_i |a_i| |b_i|,   γ_n = n u / (1 − n u),

and a single operation rounds with relative error at most ``u``.  The cleaning map ``y = x − (x V − μ V) Uᵀ``
(:class:`veil.maps.lowrank.AffineLowRankMap`, d × k factors) is evaluated in the input's dtype as

1. ``V``, ``μ V`` (formed in float64) and ``Uᵀ`` rounded to the dtype: relative error ``u`` each;
2. ``c = x V``: d-term dot products, ``γ_d |x| |V|``;
3. ``c − μ V``: one rounding;
4. ``c Uᵀ``: k-term dot products, ``γ_k |c| |U|ᵀ``, carrying the error of ``c`` through ``|U|ᵀ``;
5. ``x − c Uᵀ`` (and ``+ h`` for a counterfactual or a class map's shift): one rounding each.

Adding these up to first order in ``u`` (the second-order terms are ~``d u`` times smaller, and ``γ_n``
already exceeds ``n u``), with ``P = ((|x| + |μ|) |V|) |U|ᵀ`` computed in float64,

    |ŷ − y| ≤ γ_{d+k+6} P + 3 u (|x| + |h|),

elementwise.  An error ``e`` already in ``x`` reaches ``y`` as at most ``e + (e |V|) |U|ᵀ``.  Two answers
computed independently differ by at most the sum of their bounds: the same-dtype comparisons below take
twice the bound.  The bound is the worst case: real round-off sits well inside it (about ``sqrt(n) u``
rather than ``n u`` per sum), and a test keeps it honest by checking it stays far below the signal.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import DTypeLike, NDArray

from veil.maps.artifact import MapArtifact
from veil.maps.context_transport import ContextTransportMap
from veil.maps.lowrank import AffineLowRankMap
from veil.maps.pins import CoordinatePins
from veil.maps.transport import ClassTransportMap

Float64Array = NDArray[np.float64]


def unit_roundoff(dtype: DTypeLike) -> float:
    """``u = eps / 2``: the largest relative error of one rounding to nearest in ``dtype``."""
    return float(np.finfo(dtype).eps) / 2


def gamma(n: int, dtype: DTypeLike) -> float:
    """``γ_n = n u / (1 − n u)``: the relative bound of an n-term dot product's round-off."""
    nu = n * unit_roundoff(dtype)
    assert nu < 0.5, f"{n} terms in {np.dtype(dtype)}: the dot-product bound needs n u < 1"
    return nu / (1 - nu)


@dataclass(frozen=True)
class Bounded:
    """A value computed in float64 from the exact inputs, and a bound on the round-off of the served path."""

    value: Float64Array
    error: Float64Array


def _input(x: NDArray[np.floating], dtype: DTypeLike) -> Bounded:
    # A float64 batch served as float32 (JSON bodies are) is rounded first: that error is known exactly.
    x64 = np.asarray(x, dtype=np.float64)
    return Bounded(x64, np.abs(x64 - x64.astype(dtype).astype(np.float64)))


def _lowrank_step(
    x: Bounded, mean: Float64Array, u: Float64Array, v: Float64Array, shift: Float64Array | None, dtype: DTypeLike
) -> Bounded:
    """``y = x − (x − μ) V Uᵀ + h`` evaluated in ``dtype`` from ``x`` that carries its own error (module docstring)."""
    d, k = v.shape
    h = np.zeros(d) if shift is None else np.asarray(shift, dtype=np.float64)
    value = x.value - ((x.value - mean) @ v) @ u.T + h
    magnitude = np.abs(x.value) + x.error
    products = ((magnitude + np.abs(mean)) @ np.abs(v)) @ np.abs(u).T
    carried = x.error + (x.error @ np.abs(v)) @ np.abs(u).T
    rounded = gamma(d + k + 6, dtype) * products + 3 * unit_roundoff(dtype) * (magnitude + np.abs(h))
    return Bounded(value, carried + rounded)


def _normalised(y: Bounded, dtype: DTypeLike) -> Bounded:
    """``y / ‖y‖`` per row: the norm (a d-term sum, a square root) and the division add ``γ_{d+3}`` relative.

    An error ``e`` in ``y`` moves ``y / ‖y‖`` by at most ``(|e| + |y / ‖y‖| ‖e‖) / ‖y‖`` to first order.
    """
    norms = np.linalg.norm(y.value, axis=1, keepdims=True)
    assert np.all(norms > 0), "a zero row has no direction: pick rows the map does not send to zero"
    unit = y.value / norms
    spread = np.linalg.norm(y.error, axis=1, keepdims=True)
    error = (y.error + np.abs(unit) * spread) / norms + gamma(y.value.shape[1] + 3, dtype) * np.abs(unit)
    return Bounded(unit, error)


def _inferred_classes(transport: ClassTransportMap, x: Bounded, dtype: DTypeLike) -> NDArray[np.intp]:
    """The class each row is moved as, refusing rows whose class round-off could flip (see :func:`_argmax`)."""
    return _argmax(transport.classifier_coef, transport.classifier_intercept, x, dtype)


def _argmax(coef: Float64Array, intercept: Float64Array, x: Bounded, dtype: DTypeLike) -> NDArray[np.intp]:
    """The most probable class of a stored linear classifier, refusing rows whose choice round-off could flip.

    A logit is a d-term dot product plus an intercept: ``γ_{d+3} (|x| |W|ᵀ + |b|)`` besides the input's own
    error.  Where the two largest logits lie closer than both bounds together, the argmax is round-off's
    choice, and no tolerance on the cleaned values could make the comparison fair: the test must use other rows.
    """
    logits = x.value @ coef.T + intercept
    bound = gamma(x.value.shape[1] + 3, dtype) * ((np.abs(x.value) + x.error) @ np.abs(coef).T + np.abs(intercept))
    bound += x.error @ np.abs(coef).T
    order = np.argsort(logits, axis=1)
    rows = np.arange(len(logits))
    first, second = order[:, -1], order[:, -2]
    margin = logits[rows, first] - logits[rows, second]
    ambiguous = np.flatnonzero(margin <= bound[rows, first] + bound[rows, second])
    assert ambiguous.size == 0, f"rows {ambiguous[:10].tolist()} lie within round-off of a tie"
    return np.asarray(first, dtype=np.intp)


def _class_step(transport: ClassTransportMap, x: Bounded, c: int, dtype: DTypeLike) -> Bounded:
    """Class ``c``'s move ``x + (x − μ) D_c G_c D_cᵀ + s_c``: the low-rank step with ``U = −D_c G_c``, ``V = D_c``."""
    directions = transport.directions[c]
    offsets = transport.class_means[c] - transport.mean
    shift = -offsets - ((offsets @ directions) * transport.gains[c]) @ directions.T
    return _lowrank_step(x, transport.mean, -directions * transport.gains[c], directions, shift, dtype)


def _softmax(transport: ClassTransportMap, x: Bounded, dtype: DTypeLike) -> Bounded:
    """Class probabilities, with a bound from the logits' errors.

    ``δ log p_c = δ_c − Σ_j p_j δ_j`` for logit errors ``δ``, so ``p_c`` moves by at most ``2 p_c max |δ|``; the
    shift by the largest logit rounds each logit once more (``u |l_c − l_max|``), and the exponential, the sum
    of C terms and the division add ``γ_{C+8}`` relative: numpy's vectorised float32 exponential is not
    correctly rounded, and 4 u for it is an allowance of a few ulps (recalled from memory, not measured here).
    """
    coef, intercept = transport.classifier_coef, transport.classifier_intercept
    logits = x.value @ coef.T + intercept
    delta = gamma(x.value.shape[1] + 3, dtype) * ((np.abs(x.value) + x.error) @ np.abs(coef).T + np.abs(intercept))
    delta += x.error @ np.abs(coef).T
    logits -= logits.max(axis=1, keepdims=True)
    delta += unit_roundoff(dtype) * np.abs(logits)
    p = np.exp(logits)
    p /= p.sum(axis=1, keepdims=True)
    spread = 2 * delta.max(axis=1, keepdims=True) + gamma(len(intercept) + 8, dtype)
    return Bounded(p, p * spread)


def _transported(transport: ClassTransportMap, x: Bounded, dtype: DTypeLike) -> Bounded:
    if not transport.soft:
        classes = _inferred_classes(transport, x, dtype)
        steps = [_class_step(transport, x, c, dtype) for c in range(transport.n_classes)]
        rows = np.arange(len(classes))
        value = np.stack([s.value for s in steps])[classes, rows]
        error = np.stack([s.error for s in steps])[classes, rows]
        return Bounded(value, error)
    # Soft: x + Σ_c p_c (T_c(x) − x), a sum of C + 1 terms each rounded once more than its parts.
    p = _softmax(transport, x, dtype)
    value, error, terms = x.value.copy(), x.error.copy(), np.abs(x.value)
    for c in range(transport.n_classes):
        step = _class_step(transport, x, c, dtype)
        move = step.value - x.value
        weight = p.value[:, c : c + 1]
        value += weight * move
        error += p.error[:, c : c + 1] * np.abs(move) + weight * (step.error + x.error)
        terms = terms + weight * np.abs(move)
    return Bounded(value, error + gamma(transport.n_classes + 2, dtype) * terms)


def _pinned(y: Bounded, pins: CoordinatePins | None, dtype: DTypeLike) -> Bounded:
    """The pinned coordinates hold the pinned value, rounded once to ``dtype``."""
    if pins is None or not pins.coordinates.size:
        return y
    value, error = y.value.copy(), y.error.copy()
    value[:, pins.coordinates] = pins.values
    error[:, pins.coordinates] = np.abs(pins.values - pins.values.astype(dtype).astype(np.float64))
    return Bounded(value, error)


def _cleared(y: Bounded, pins: CoordinatePins | None) -> Bounded:
    """``P y``: the pinned coordinates set to zero, exactly."""
    if pins is None:
        return y
    value, error = y.value.copy(), y.error.copy()
    value[:, pins.coordinates] = 0.0
    error[:, pins.coordinates] = 0.0
    return Bounded(value, error)


def _within_context(mapping: ContextTransportMap, x: Bounded, dtype: DTypeLike) -> Bounded:
    """Each row moved by the class transport of its inferred context value (refusing values round-off could flip)."""
    values = _argmax(mapping.context_coef, mapping.context_intercept, x, dtype)
    value, error = x.value.copy(), x.error.copy()
    for g, value_map in enumerate(mapping.value_maps):
        rows = np.flatnonzero(values == g)
        if rows.size:
            moved = _transported(value_map, Bounded(x.value[rows], x.error[rows]), dtype)
            value[rows], error[rows] = moved.value, moved.error
    return Bounded(value, error)


def _map_bound(mapping: object, x: Bounded, dtype: DTypeLike) -> Bounded:
    if isinstance(mapping, AffineLowRankMap):
        return _lowrank_step(x, mapping.mean, mapping.u, mapping.v, None, dtype)
    if isinstance(mapping, ContextTransportMap):
        moved = _within_context(mapping, x, dtype)
        return moved if mapping.after is None else _map_bound(mapping.after, moved, dtype)
    assert isinstance(mapping, ClassTransportMap), f"no round-off bound for a {type(mapping).__name__}"
    moved = _transported(mapping, x, dtype)
    return moved if mapping.after is None else _map_bound(mapping.after, moved, dtype)


def _unpack(
    fitted: MapArtifact | AffineLowRankMap | ClassTransportMap | ContextTransportMap,
) -> tuple[object, bool, CoordinatePins | None]:
    if isinstance(fitted, MapArtifact):
        return fitted.map, fitted.normalize, fitted.pins
    return fitted, False, None


def apply_bound(
    fitted: MapArtifact | AffineLowRankMap | ClassTransportMap | ContextTransportMap,
    x: NDArray[np.floating],
    dtype: DTypeLike = np.float32,
) -> Bounded:
    """``fitted.apply(x)`` computed in float64 from ``x``, and the round-off bound of computing it in ``dtype``."""
    mapping, normalize, pins = _unpack(fitted)
    y = _map_bound(mapping, _input(x, dtype), dtype)
    return _pinned(_normalised(y, dtype) if normalize else y, pins, dtype)


def counterfactual_bound(
    fitted: MapArtifact | AffineLowRankMap | ClassTransportMap,
    x: NDArray[np.floating],
    target_mean: NDArray[np.floating],
    dtype: DTypeLike = np.float32,
) -> Bounded:
    """The counterfactual towards the class (or joint target) of mean ``target_mean``, and its round-off bound.

    Affine: ``apply(x) + U Vᵀ (μ_t − μ)`` (the shift formed in float64, rounded, added once).  Class transport:
    the inferred class's move, then class ``t``'s inverse move ``x + (x − μ) D_t (1/(1+G_t) − 1) D_tᵀ + μ_t − μ``
    (``target_mean`` must then be one of the map's class means).
    """
    mapping, normalize, pins = _unpack(fitted)
    x_in, target = _input(x, dtype), np.asarray(target_mean, dtype=np.float64)
    if isinstance(mapping, AffineLowRankMap):
        y = _lowrank_step(x_in, mapping.mean, mapping.u, mapping.v, mapping.shift_towards(target), dtype)
    else:
        assert isinstance(mapping, ClassTransportMap), f"no round-off bound for a {type(mapping).__name__}"
        matches = np.flatnonzero(np.all(mapping.class_means == target, axis=1))
        assert matches.size == 1, "a transport counterfactual goes towards one of the map's own class means"
        t = int(matches[0])
        moved = _transported(mapping, x_in, dtype)
        directions, inverse = mapping.directions[t], 1.0 / (1.0 + mapping.gains[t]) - 1.0
        y = _lowrank_step(moved, mapping.mean, -directions * inverse, directions, target - mapping.mean, dtype)
    return _pinned(_normalised(y, dtype) if normalize else y, pins, dtype)


def search_vectors_bound(
    artifact: MapArtifact, queries: NDArray[np.floating], dtype: DTypeLike = np.float32
) -> tuple[Bounded, Bounded]:
    """``Aᵀ r(q)`` and the offsets ``⟨r(q), b⟩`` of :func:`veil.search_vectors`, with their round-off bounds.

    ``Aᵀ r = r − (r U) Vᵀ`` is the low-rank step with the factors swapped and no centring; the offsets are a
    float64 d-term dot product of the served ``r(q)`` with ``b = (μ V) Uᵀ`` (itself formed in float64).  With
    pins, the vectors start from ``P r(q)`` and ``b`` holds the pinned values (``veil.maps.pins``).
    """
    mapping = artifact.map
    assert isinstance(mapping, AffineLowRankMap), "exact search vectors exist for an affine map only"
    cleaned = apply_bound(artifact, queries, dtype)
    zero = np.zeros(mapping.dim)
    vectors = _lowrank_step(_cleared(cleaned, artifact.pins), zero, mapping.v, mapping.u, None, dtype)
    constant = _lowrank_step(Bounded(zero[None, :], zero[None, :]), mapping.mean, mapping.u, mapping.v, None, "f8")
    constant = _pinned(constant, artifact.pins, "f8")
    b, b_error = constant.value[0], constant.error[0]
    magnitude = np.abs(cleaned.value) + cleaned.error
    offsets_error = cleaned.error @ np.abs(b) + magnitude @ b_error + gamma(mapping.dim, "f8") * magnitude @ np.abs(b)
    return vectors, Bounded(cleaned.value @ b, offsets_error)


def assert_within(
    actual: NDArray[np.floating], expected: NDArray[np.floating], tolerance: NDArray[np.floating], what: str = ""
) -> float:
    """Assert ``|actual − expected| ≤ tolerance`` elementwise; returns the largest share of the tolerance used."""
    actual64, expected64 = np.asarray(actual, dtype=np.float64), np.asarray(expected, dtype=np.float64)
    assert actual64.shape == expected64.shape, f"{what}: shapes {actual64.shape} and {expected64.shape}"
    gap = np.abs(actual64 - expected64)
    tolerance = np.broadcast_to(np.asarray(tolerance, dtype=np.float64), gap.shape)
    over = gap > tolerance
    if np.any(over):
        worst = np.unravel_index(np.argmax(np.where(over, gap - tolerance, -np.inf)), gap.shape)
        raise AssertionError(
            f"{what}: {np.count_nonzero(over)} of {gap.size} values differ by more than round-off allows; at "
            f"{tuple(int(i) for i in worst)}: {actual64[worst]!r} vs {expected64[worst]!r}, "
            f"gap {gap[worst]:.3g} > bound {tolerance[worst]:.3g}"
        )
    positive = tolerance > 0
    return float(np.max(gap[positive] / tolerance[positive], initial=0.0))


def assert_same_answer(
    actual: NDArray[np.floating], expected: NDArray[np.floating], bound: Bounded, what: str = ""
) -> float:
    """Two independent computations of ``bound.value`` in one dtype: each within ``bound.error``, so 2x apart."""
    return assert_within(actual, expected, 2 * bound.error, what)
