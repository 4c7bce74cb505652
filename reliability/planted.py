"""The population live checks are measured on, and the changes the harness plants in its samples.

The committed large sample is split once by a seeded permutation: the
version is fitted on the first rows, and every live sample is drawn from the
last :data:`HELD_OUT_ROWS`, which no fit ever sees.  Each planted change is
made here, on a draw of those rows, so what a check is asked to find is known
exactly:

- :func:`shift_along_leading_axis`: every row moved one standard deviation
  of the fit along the fit's leading axis (its covariance's top eigenvector,
  as the version's reference statistics store it);
- :func:`carry_along_hidden_direction`: a sub-population (a share of the
  rows) moved along a direction the version's map leaves untouched, towards
  one side for one class and the other side for the other, so that the
  attribute is readable again on those rows after erasure.  How far is set by
  the data (:func:`carrying_distance`): each moved row carries the attribute
  as strongly as the whole population carried it before erasure, its class
  half the raw class-mean distance from the other side;
- :func:`prior_shifted_rows`: a draw whose class shares differ from the
  fitted priors by a given total-variation distance.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from veil.checks.reference import ReferenceStatistics
from veil.maps.artifact import MapArtifact
from veil.maps.lowrank import AffineLowRankMap
from veil.samples.harbourline import load_harbourline_profiles

#: Rows of the large committed sample kept out of every fit: live samples are drawn from these only.
HELD_OUT_ROWS = 8000
SPLIT_SEED = 26


@dataclass(frozen=True)
class Population:
    """The committed large sample split into the rows a version is fitted on and the held-out rows."""

    fit_x: NDArray[np.float32]
    fit_labels: dict[str, NDArray[np.str_]]
    held_x: NDArray[np.float32]
    held_labels: dict[str, NDArray[np.str_]]

    @property
    def attributes(self) -> list[str]:
        return list(self.held_labels)


def split_population(fit_rows: int) -> Population:
    """The first ``fit_rows`` rows of a seeded permutation to fit on; the last :data:`HELD_OUT_ROWS` held out.

    The held-out rows are the same whatever ``fit_rows`` is, so a quick run and a full run draw their live
    samples from one population.
    """
    profiles = load_harbourline_profiles("large")
    order = np.random.default_rng(SPLIT_SEED).permutation(profiles.embedding.shape[0])
    if fit_rows < 1 or fit_rows + HELD_OUT_ROWS > order.size:
        raise ValueError(f"fit_rows must be between 1 and {order.size - HELD_OUT_ROWS}, got {fit_rows}")
    fit, held = order[:fit_rows], order[-HELD_OUT_ROWS:]
    columns = {"pronoun": profiles.pronoun, "age_bracket": profiles.age_bracket}
    return Population(
        fit_x=profiles.embedding[fit],
        fit_labels={name: values[fit] for name, values in columns.items()},
        held_x=profiles.embedding[held],
        held_labels={name: values[held] for name, values in columns.items()},
    )


def shift_along_leading_axis(x: NDArray[np.floating], reference: ReferenceStatistics) -> NDArray[np.float32]:
    """Every row moved by one standard deviation of the fitting rows along their leading axis."""
    axis = reference.eigenvectors[:, 0]
    return np.asarray(x + np.sqrt(reference.eigenvalues[0]) * axis, dtype=np.float32)


def hidden_direction(artifact: MapArtifact, *, seed: int) -> NDArray[np.float64]:
    """A unit direction the version's map leaves as it is.

    Random, then restricted to the coordinates the version does not pin and
    made orthogonal there to the map's read-out ``V`` (``x' = x − U Vᵀ(x − μ)``
    then passes a shift along it unchanged): a direction along which the fit
    saw no attribute, since it removes none there.
    """
    if not isinstance(artifact.map, AffineLowRankMap):
        raise ValueError(f"a hidden direction needs an affine low-rank map, not {artifact.map.kind}")
    d = artifact.map.dim
    free = np.ones(d, dtype=bool)
    if artifact.pins is not None:
        free[artifact.pins.coordinates] = False
    readout, _ = np.linalg.qr(artifact.map.v[free])
    direction = np.zeros(d)
    draw = np.random.default_rng(seed).normal(size=int(free.sum()))
    direction[free] = draw - readout @ (readout.T @ draw)
    return np.asarray(direction / np.linalg.norm(direction))


def spread_along(x: NDArray[np.floating], direction: NDArray[np.float64]) -> float:
    """One standard deviation of the rows along a unit direction."""
    return float(np.std(np.asarray(x, dtype=np.float64) @ direction))


def carrying_distance(x: NDArray[np.floating], labels: NDArray[np.str_]) -> float:
    """Half the Euclidean distance between the first class's raw mean and the other classes' (in sorted order).

    Rows moved ``±`` this along a unit direction, by the same split of the
    classes as :func:`carry_along_hidden_direction` makes, carry the attribute
    along it with the class-mean distance the rows had before erasure.
    """
    rows = np.asarray(x, dtype=np.float64)
    first = labels == np.unique(labels)[0]
    if first.all():
        raise ValueError("a carrying distance needs at least two classes")
    return float(np.linalg.norm(rows[first].mean(axis=0) - rows[~first].mean(axis=0))) / 2


def carry_along_hidden_direction(
    x: NDArray[np.floating],
    labels: NDArray[np.str_],
    direction: NDArray[np.float64],
    *,
    share: float,
    strength: float,
    rng: np.random.Generator,
) -> tuple[NDArray[np.float32], NDArray[np.intp]]:
    """``round(share · n)`` rows, drawn at random, moved ``±strength · direction`` by class; the rows moved.

    ``direction`` is a unit vector, ``strength`` a distance in the rows' units.

    The first class (in sorted order) goes towards ``+direction``, every other
    class towards ``−direction``: on those rows the attribute is then read
    along the direction, which erasure leaves in place.
    """
    n = x.shape[0]
    moved = np.sort(rng.choice(n, round(share * n), replace=False))
    first = np.unique(labels)[0]
    sign = np.where(labels[moved] == first, 1.0, -1.0)
    out = np.array(x, dtype=np.float64)
    out[moved] += strength * sign[:, None] * direction
    return out.astype(np.float32), moved


def shifted_shares(priors: NDArray[np.float64], distance: float) -> NDArray[np.float64]:
    """Class shares ``distance`` away from ``priors`` in total variation: the rarest class gains it all.

    The gain is taken from the other classes in turn, largest first, each down to no less than 0.
    """
    if not 0 < distance < 1 - float(priors.min()):
        raise ValueError(f"a prior shift of {distance} cannot be made on priors {priors.tolist()}")
    shares = np.array(priors, dtype=np.float64)
    gainer = int(np.argmin(shares))
    shares[gainer] += distance
    left = distance
    for loser in np.argsort(-shares):
        if loser == gainer or left <= 0:
            continue
        taken = min(left, float(shares[loser]))
        shares[loser] -= taken
        left -= taken
    return shares


def prior_shifted_rows(
    labels: NDArray[np.str_],
    classes: list[str],
    priors: NDArray[np.float64],
    distance: float,
    n: int,
    rng: np.random.Generator,
) -> NDArray[np.intp]:
    """``n`` rows of ``labels`` drawn without replacement, their class shares ``distance`` from ``priors``.

    The shares are :func:`shifted_shares`'s.  The gaining class's count is
    rounded up and the rest shared among the others by largest remainder, so
    the shift in whole rows is never smaller than ``distance`` (and less than
    one row, ``1 / n``, larger): a level set at the planted distance is reached
    by the planted rows, not by how their counts were rounded.
    """
    shares = shifted_shares(priors, distance)
    gainer = int(np.argmin(priors))
    exact = shares * n
    counts = np.floor(exact).astype(int)
    counts[gainer] = int(np.ceil(exact[gainer]))
    others = [int(i) for i in np.argsort(-(exact - np.floor(exact)), kind="stable") if i != gainer]
    for index in others[: n - int(counts.sum())]:
        counts[index] += 1
    rows = [
        rng.choice(np.flatnonzero(labels == name), count, replace=False)
        for name, count in zip(classes, counts, strict=True)
    ]
    return np.asarray(rng.permutation(np.concatenate(rows)), dtype=np.intp)
