"""Ranking-fairness figures against a hand-computed example and the definitions of Geyik, Ambler & Kenthapadi (2019).

The definitions, recalled from memory of the paper (KDD 2019, "Fairness-Aware
Ranking in Search & Recommendation Systems"): Skew_a@k = ln(p_{τ^k, a} / p_a);
MinSkew@k and MaxSkew@k are its minimum and maximum over the attribute values;
NDKL(τ) = (1/Z) Σ_{i=1..|τ|} d_KL(D_{τ^i} ‖ D) / log2(i + 1) with
Z = Σ_{i=1..|τ|} 1 / log2(i + 1), D_{τ^i} the attribute distribution of the
top i and D the desired distribution (here the corpus's base rates).  The
exposure share weighs position i by DCG's discount 1 / log2(i + 1).
"""

from __future__ import annotations

import math
import re

import numpy as np
from numpy.typing import NDArray
from sklearn.neighbors import NearestNeighbors

from veil.audit import audit
from veil.audit.ranking import ranked_neighbours, ranking_before_after, ranking_figures
from veil.checks.drift import check_drift
from veil.erasers import LEACE
from veil.registry import Registry
from veil.registry.card import card_audit, format_card
from veil.reporting import REPORT_FILE

from .conftest import Split
from .service_fixtures import PLANTED, ServiceRegistry, planted_population


def test_a_hand_computed_example() -> None:
    # Two queries over a corpus split evenly between classes 0 and 1; top 4 of each.
    # Query A ranks classes 0, 0, 1, 0; query B ranks 1, 1, 1, 1 (class 0 absent).
    figures = ranking_figures(np.array([[0, 0, 1, 0], [1, 1, 1, 1]]), np.array([0.5, 0.5]))
    w = [1.0, 1 / math.log2(3), 0.5, 1 / math.log2(5)]  # DCG's discounts of positions 1..4
    z = sum(w)  # 2.5616
    assert figures.share == (0.375, 0.625)  # A: 3/4 and 1/4; B: 0 and 1
    # Exposure of class 0: A (w1 + w2 + w4) / Z = 0.8048; B 0.
    np.testing.assert_allclose(figures.exposure_share, [(w[0] + w[1] + w[3]) / z / 2, (w[2] / z + 1) / 2])
    assert math.isclose(figures.exposure_share[0], 0.8048 / 2, abs_tol=1e-4)
    # MaxSkew: A ln(0.75 / 0.5) = 0.4055 (class 0); B ln(1 / 0.5) = 0.6931 (class 1).
    assert math.isclose(figures.max_skew, (math.log(1.5) + math.log(2)) / 2)
    assert figures.absent_class_share == 0.5
    # NDKL of A: prefixes (1, 0), (1, 0), (2/3, 1/3), (3/4, 1/4) -> KL 0.6931, 0.6931, 0.0566, 0.1308 nats;
    # (0.6931 + 0.6931 w2 + 0.0566 w3 + 0.1308 w4) / Z = 0.4744.  B: every prefix (0, 1) -> KL ln 2 -> NDKL ln 2.
    kl = [
        math.log(2),
        math.log(2),
        2 / 3 * math.log(4 / 3) + 1 / 3 * math.log(2 / 3),
        0.75 * math.log(1.5) + 0.25 * math.log(0.5),
    ]
    ndkl_a = sum(d * wi for d, wi in zip(kl, w, strict=True)) / z
    assert math.isclose(ndkl_a, 0.4744, abs_tol=1e-4)
    assert math.isclose(figures.ndkl, (ndkl_a + math.log(2)) / 2)


def paper_ndkl(ranking: list[int], desired: NDArray[np.float64]) -> float:
    """NDKL as the paper defines it, term by term (0 ln 0 = 0)."""
    z = sum(1 / math.log2(i + 1) for i in range(1, len(ranking) + 1))
    total = 0.0
    for i in range(1, len(ranking) + 1):
        top = ranking[:i]
        kl = sum(
            (top.count(a) / i) * math.log((top.count(a) / i) / desired[a]) for a in range(desired.size) if top.count(a)
        )
        total += kl / math.log2(i + 1)
    return total / z


def paper_skews(ranking: list[int], desired: NDArray[np.float64]) -> list[float]:
    """Skew_a@k for every attribute value a (-inf for a value absent from the top k)."""
    k = len(ranking)
    return [math.log(ranking.count(a) / k / desired[a]) if ranking.count(a) else -math.inf for a in range(desired.size)]


def test_the_figures_follow_the_paper_s_definitions_on_random_rankings() -> None:
    rng = np.random.default_rng(0)
    desired = np.array([0.6, 0.3, 0.1])
    rankings = rng.choice(3, size=(200, 10), p=[0.5, 0.3, 0.2])
    figures = ranking_figures(rankings, desired)
    skews = [paper_skews(list(r), desired) for r in rankings]
    assert math.isclose(figures.max_skew, float(np.mean([max(s) for s in skews])), rel_tol=1e-12)
    assert figures.absent_class_share == float(np.mean([min(s) == -math.inf for s in skews]))
    assert math.isclose(figures.ndkl, float(np.mean([paper_ndkl(list(r), desired) for r in rankings])), rel_tol=1e-12)
    # Gibbs' inequality: a KL divergence is never negative, and NDKL is 0 only when every prefix has D's shares.
    assert figures.ndkl > 0
    assert ranking_figures(np.zeros((3, 5), dtype=np.intp), np.array([1.0, 0.0])).ndkl == 0.0


def test_rankings_are_best_first_with_ties_by_row_index() -> None:
    corpus = np.array([[1.0, 0.0], [0.0, 1.0], [1.0, 0.0], [0.5, 0.5], [1.0, 0.0]])
    queries = np.array([[1.0, 0.0], [0.0, 1.0]])
    # Query 0 ties rows 0, 2 and 4 at 1.0: row index orders them, and row 2 is its own row, left out.
    np.testing.assert_array_equal(
        ranked_neighbours(queries, corpus, 3, exclude=np.array([2, 1])), [[0, 4, 3], [3, 0, 2]]
    )


def cosine_rankings(x: NDArray[np.floating], k: int) -> NDArray[np.intp]:
    """Each row's k nearest other rows by cosine, best first, from scikit-learn's brute-force search."""
    _, found = NearestNeighbors(n_neighbors=k + 1, metric="cosine", algorithm="brute").fit(x).kneighbors(x)
    return np.array([[j for j in row if j != i][:k] for i, row in enumerate(found)])


def test_the_audit_measures_raw_and_erased_rankings_on_the_same_queries(planted_split: Split) -> None:
    eraser = LEACE().fit(planted_split.x_fit, planted_split.z_fit)
    x, z = planted_split.x_held[:600], planted_split.z_held[:600]
    report = audit(eraser, x, z, nonlinear=False)
    rk = report.ranking
    assert rk is not None
    assert (rk.k, rk.queries) == (10, 600)
    codes = np.unique(z, return_inverse=True)[1]
    base = np.bincount(codes) / codes.size
    np.testing.assert_allclose(rk.base_rate, base)
    # The reference: scikit-learn's cosine neighbours, scored with the paper's NDKL term by term.
    for rankings, ndkl in (
        (cosine_rankings(x, 10), rk.ndkl_before),
        (cosine_rankings(eraser.transform(x), 10), rk.ndkl_after),
    ):
        assert math.isclose(ndkl, float(np.mean([paper_ndkl(list(codes[r]), base) for r in rankings])), rel_tol=1e-9)
    # The planted attribute shapes raw neighbourhoods; after LEACE the rankings carry it no more than rankings
    # with shuffled labels do (NDKL is not 0 for those: a top-1 is always one class).
    shuffled = ranking_figures(np.random.default_rng(0).permutation(codes)[cosine_rankings(x, 10)], base).ndkl
    assert abs(rk.ndkl_after - shuffled) < 0.02
    assert rk.ndkl_before > shuffled + 0.2
    assert rk.max_skew_before > rk.max_skew_after
    assert "NDKL@10" in report.format_table()


def test_the_live_checks_report_the_figures_of_the_posted_sample(service_registry: ServiceRegistry) -> None:
    from veil.server.catalog import ServedVersion

    stored = Registry(service_registry.path).read_version(PLANTED, "live")
    served = ServedVersion.from_stored(stored, threshold_overrides=None)
    x, z = planted_population(700, seed=5)
    report = check_drift(
        served.artifact, served.reference, served.whitening, served.thresholds, x, classes=served.classes,
        labels=list(z),
    )  # fmt: skip
    rk = report.ranking
    assert rk is not None
    # 500 of the 700 rows query (a seeded draw), against all 700.
    assert rk.queries == 500
    codes = np.array([served.classes.index(label) for label in z])
    queries = np.sort(np.random.default_rng(0).choice(700, 500, replace=False))
    assert rk == ranking_before_after(x, served.artifact.apply(x), codes, 10, queries=queries)
    assert rk.ndkl_before > rk.ndkl_after + 0.2


def test_the_card_and_the_report_of_a_stored_version_show_the_figures(service_registry: ServiceRegistry) -> None:
    stored = Registry(service_registry.path).read_version(PLANTED, "live")
    rk = card_audit(stored.card).ranking
    assert rk is not None
    shown = format_card(stored.id, stored.card)
    assert re.search(rf"NDKL@10 +{rk.ndkl_before:.4f} → {rk.ndkl_after:.4f}", shown)
    report = stored.files[REPORT_FILE].decode()
    assert "<h2>Ranking fairness</h2>" in report
    assert f"<td>NDKL@10</td><td>{rk.ndkl_before:.4f}</td><td>{rk.ndkl_after:.4f}</td>" in report


def test_a_class_absent_from_the_rows_keeps_its_place_with_a_share_of_zero() -> None:
    # A live sample of a three-class attribute in which the last class never appears: the per-class tuples keep
    # all three places (the names printed beside them stay right), and the other figures are those of the
    # classes present, as if the absent class did not exist (the same rows with codes 0 and 1 only).
    rng = np.random.default_rng(0)
    x = rng.normal(size=(60, 5))
    codes = (x[:, 0] > 0).astype(np.intp)
    erased = x.copy()
    erased[:, 0] = 0.0
    with_absent = ranking_before_after(x, erased, codes, 5, classes=3)
    present_only = ranking_before_after(x, erased, codes, 5)
    assert len(with_absent.base_rate) == len(with_absent.share_after) == 3
    assert with_absent.base_rate[2] == with_absent.share_before[2] == with_absent.exposure_share_after[2] == 0.0
    assert with_absent.base_rate[:2] == present_only.base_rate
    assert with_absent.share_after[:2] == present_only.share_after
    assert (with_absent.ndkl_after, with_absent.max_skew_before) == (
        present_only.ndkl_after,
        present_only.max_skew_before,
    )
    # The chance that five results miss a class counts the classes present only (worked by hand: two classes of
    # shares p and 1 - p miss one with probability p^5 + (1 - p)^5).
    p = with_absent.base_rate[0]
    level = with_absent.chance_levels()[3]
    assert level == f"{p**5 + (1 - p) ** 5:.3f} by chance"
