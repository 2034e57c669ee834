"""Stratified samples and the weighted estimators, checked against every sample of small populations.

Enumerating every sample a design can draw gives the estimators' exact sampling distributions,
so the checks below are the theorems themselves, not values we chose:
- Horvitz & Thompson (1952, JASA 47, 663-685, Theorem on unbiasedness): the HT estimator of a total
  has expectation equal to the total, and its variance is
  sum_i sum_j (pi_ij - pi_i pi_j) y_i y_j / (pi_i pi_j) with pi_ii = pi_i.
- Cochran (1977), Sampling Techniques, 3rd ed., Theorem 5.3 and eq. 5.9: under stratified simple
  random sampling without replacement, sum_h N_h^2 (1 - f_h) s_h^2 / n_h is unbiased for that variance.
- Cochran (1977), section 6.8 (Hartley & Ross 1954): the bias of a ratio estimate is at most its
  standard error times the coefficient of variation of the denominator's estimate.
"""

from __future__ import annotations

from itertools import combinations, product

import numpy as np
import pandas as pd
import pytest
from statsmodels.stats.proportion import proportion_confint

from analysis.errors import InvalidInputError
from analysis.rules import RegionMass, mine_rules
from analysis.sampling import (
    Design,
    Stratum,
    allocate,
    draw_sample,
    effective_size,
    ht_total,
    ratio,
    stratum_kinds,
    total_variance,
    wilson,
)

# Invented populations (invariants of the estimators hold for any values).
Y = [np.array([3.0, 7.0, 1.0, 4.0, 9.0]), np.array([2.0, 2.0, 8.0, 5.0])]
X = [np.array([1.0, 0.0, 1.0, 1.0, 0.0]), np.array([1.0, 1.0, 0.0, 1.0])]
SIZES = (2, 3)


def _samples():
    """Every stratified sample of SIZES from the two strata: (unit positions per stratum)."""
    return list(product(combinations(range(len(Y[0])), SIZES[0]), combinations(range(len(Y[1])), SIZES[1])))


def _design(picks) -> Design:
    strata = np.concatenate([np.full(len(p), h, dtype=np.int64) for h, p in enumerate(picks)])
    return Design(strata, np.array([float(len(Y[0])), float(len(Y[1]))]))


def _values(vals, picks):
    return np.concatenate([vals[h][list(p)] for h, p in enumerate(picks)])


def test_ht_total_unbiased_and_its_variance_estimator_unbiased_over_every_sample():
    samples = _samples()
    assert len(samples) == 10 * 4  # C(5,2) * C(4,3)
    estimates, variances = [], []
    for picks in samples:
        est = ht_total(_values(Y, picks), _design(picks))
        estimates.append(est.value[0])
        variances.append(est.se[0] ** 2)
    total = sum(v.sum() for v in Y)
    exact_var = np.var(estimates)  # every sample is equally likely
    # Horvitz & Thompson (1952): E[HT] = total.
    assert np.mean(estimates) == pytest.approx(total, rel=1e-12)
    # Cochran (1977) Theorem 5.3: V = sum_h N_h^2 (1 - f_h) S_h^2 / n_h with the population variances S_h^2.
    formula = sum(len(v) ** 2 * (1 - n / len(v)) * v.var(ddof=1) / n for v, n in zip(Y, SIZES))
    assert exact_var == pytest.approx(formula, rel=1e-12)
    # Cochran (1977) eq. 5.9: the estimated variance is unbiased.
    assert np.mean(variances) == pytest.approx(exact_var, rel=1e-12)


def test_ht_variance_matches_the_horvitz_thompson_double_sum_from_enumerated_inclusion_probabilities():
    samples = _samples()
    units = [(h, i) for h in range(2) for i in range(len(Y[h]))]
    index = {u: k for k, u in enumerate(units)}
    n = len(units)
    pi2 = np.zeros((n, n))
    for picks in samples:
        inside = [index[(h, i)] for h, p in enumerate(picks) for i in p]
        for a in inside:
            for b in inside:
                pi2[a, b] += 1 / len(samples)
    pi = np.diag(pi2).copy()
    y = np.concatenate(Y)
    ht_var = sum((pi2[a, b] - pi[a] * pi[b]) * y[a] * y[b] / (pi[a] * pi[b]) for a in range(n) for b in range(n))
    # Our stratified formula on the same population (the variance with the population's own s_h^2).
    picks_all = (tuple(range(len(Y[0]))), tuple(range(len(Y[1]))))
    d_all = _design(picks_all)
    per_stratum = sum(len(v) ** 2 * (1 - k / len(v)) * v.var(ddof=1) / k for v, k in zip(Y, SIZES))
    assert ht_var == pytest.approx(per_stratum, rel=1e-12)
    # and a census has no sampling error
    assert total_variance(np.concatenate(Y), d_all)[0] == pytest.approx(0.0, abs=1e-12)


def test_ratio_bias_within_the_hartley_ross_bound_and_linearised_variance_near_the_exact_one():
    samples = _samples()
    estimates, se2, tx = [], [], []
    for picks in samples:
        d = _design(picks)
        r = ratio(_values(Y, picks), _values(X, picks), d)
        estimates.append(r.value[0])
        se2.append(r.se[0] ** 2)
        tx.append(ht_total(_values(X, picks), d).value[0])
    truth = sum(v.sum() for v in Y) / sum(v.sum() for v in X)
    bias = np.mean(estimates) - truth
    sd = np.std(estimates)
    cv_x = np.std(tx) / np.mean(tx)
    assert abs(bias) <= sd * cv_x + 1e-12  # Hartley & Ross (1954), Cochran (1977) section 6.8
    # Linearisation is a first-order approximation: on 5 + 4 units it lands within a factor of 2 of the exact MSE.
    mse = np.mean((np.array(estimates) - truth) ** 2)
    assert 0.5 * mse < np.mean(se2) < 2.0 * mse


def test_weighted_support_is_unbiased_over_every_sample_of_a_tiny_population():
    # Population: 9 images in two strata (predicted class "a": 5, "b": 4) with one concept.
    concept = [np.array([1, 0, 1, 1, 0], dtype=bool), np.array([1, 1, 0, 0], dtype=bool)]
    cls = [np.array(["a"] * 5), np.array(["b"] * 4)]
    truth_support = (concept[0].sum()) / 9  # images showing the concept and predicted "a", over all
    truth_conf = concept[0].sum() / (concept[0].sum() + concept[1].sum())
    supports, confs = [], []
    for picks in _samples():
        table = pd.DataFrame({"tag": _values(concept, picks)})
        classes = pd.Series(_values(cls, picks))
        found = mine_rules(table, classes, design=_design(picks), min_support=1e-9, min_lift=-np.inf).rules
        row = found[(found["class"] == "a") & (found["concepts"] == "tag")]
        supports.append(float(row["support"].iloc[0]) if len(row) else 0.0)
        confs.append(float(row["confidence"].iloc[0]) if len(row) else 0.0)
    # Sum of weights is N in every stratified sample, so support is an HT total over N: exactly unbiased.
    assert np.mean(supports) == pytest.approx(truth_support, rel=1e-12)
    # Confidence is a ratio: close, not exact.
    assert np.mean(confs) == pytest.approx(truth_conf, abs=0.1)


def test_weighted_rules_of_a_census_equal_the_unweighted_rules():
    rng = np.random.default_rng(3)
    table = pd.DataFrame(rng.random((60, 4)) < 0.4, columns=["cap", "tag", "belt", "foil"])
    classes = pd.Series(np.where(table["tag"] | (rng.random(60) < 0.2), "can", "bottle"))
    design = Design(np.where(classes == "can", 0, 1).astype(np.int64), np.array([float((classes == "can").sum()), float((classes == "bottle").sum())]))
    plain = mine_rules(table, classes, min_support=0.05).rules.set_index(["class", "concepts"]).sort_index()
    weighted = mine_rules(table, classes, design=design, min_support=0.05).rules.set_index(["class", "concepts"]).sort_index()
    assert list(weighted.index) == list(plain.index)
    for col in ("support", "confidence", "lift", "leverage", "n_images"):
        np.testing.assert_allclose(weighted[col].to_numpy(dtype=float), plain[col].to_numpy(dtype=float), rtol=1e-12)
    # a census: every image counted, no sampling error, estimated counts are the counts
    np.testing.assert_allclose(weighted["images_estimated"].to_numpy(dtype=float), plain["n_images"].to_numpy(dtype=float))
    assert (weighted["support_se"] == 0).all()


def test_weighted_rules_undo_an_oversampled_stratum():
    # Population: 100 "can" images, 20 show "tag"; 900 "bottle" images, 90 show "tag".
    # The sample takes 50 of each; the raw sample confidence of tag => can is 10/(10+5) = 0.67, the population's 20/110.
    table = pd.DataFrame({"tag": np.r_[np.ones(10), np.zeros(40), np.ones(5), np.zeros(45)].astype(bool)})
    classes = pd.Series(["can"] * 50 + ["bottle"] * 50)
    design = Design(np.r_[np.zeros(50), np.ones(50)].astype(np.int64), np.array([100.0, 900.0]))
    found = mine_rules(table, classes, design=design, min_support=0.001, min_lift=-np.inf).rules.set_index(["class", "concepts"])
    row = found.loc[("can", "tag")]
    assert row["confidence"] == pytest.approx(20 / 110)
    assert row["support"] == pytest.approx(20 / 1000)
    assert row["presence_share"] == pytest.approx(0.2)
    assert row["images_estimated"] == pytest.approx(20)
    assert row["class_images_estimated"] == pytest.approx(100)
    assert row["confidence_low"] < row["confidence"] < row["confidence_high"]
    assert row["lift_low"] < row["lift"] < row["lift_high"]


def _sample_with_regions(seed: int):
    """A sample of 9 images from strata of 12 (4 drawn, weight 3) and 10 (5 drawn, weight 2), two regions each."""
    rng = np.random.default_rng(seed)
    n = 9
    strata = np.r_[np.zeros(4), np.ones(5)].astype(np.int64)
    classes = pd.Series(np.where(rng.random(n) < 0.6, "can", "bottle"))
    tag = rng.random(n) < 0.7
    yellow = tag & (rng.random(n) < 0.5)
    cap = rng.random(n) < 0.5
    table = pd.DataFrame({"tag": tag, "yellow tag": yellow, "cap": cap})
    region_image = np.repeat(np.arange(n), 2)
    mass = rng.uniform(0.05, 0.5, 2 * n)
    # A region carries what its image shows, shared out: the first region the tag family, the second the cap.
    carries = np.zeros((2 * n, 3), dtype=bool)
    carries[0::2, 0], carries[0::2, 1], carries[1::2, 2] = tag, yellow, cap
    from scipy import sparse

    regions = RegionMass(region_image, mass, sparse.csc_matrix(carries))
    return table, classes, Design(strata, np.array([12.0, 10.0])), regions


def test_weighted_rates_equal_the_plain_ones_of_the_population_each_unit_stands_for():
    """A Horvitz-Thompson weight says how many population units a sampled unit stands for (Horvitz & Thompson 1952):
    a Hajek ratio is exactly the plain ratio over the sample with every unit repeated by its (whole) weight. Every
    rate of a weighted rule, typicality and saliency share included, must equal the unweighted rule's over that
    expanded table; the sample's own unweighted typicality and saliency share differ from it."""
    from scipy import sparse

    families = {"yellow tag": "tag"}
    for seed in range(4):
        table, classes, design, regions = _sample_with_regions(seed)
        reps = design.weights.astype(int)
        rows = np.repeat(np.arange(len(table)), reps)
        big = table.iloc[rows].reset_index(drop=True)
        big_classes = classes.iloc[rows].reset_index(drop=True)
        # Each repeated image keeps its own regions.
        new_pos = np.cumsum(np.r_[0, reps[:-1]])
        reg_rows = [(r, new_pos[regions.region_image[r]] + k) for r in range(len(regions.mass)) for k in range(reps[regions.region_image[r]])]
        picked = np.array([r for r, _ in reg_rows])
        big_regions = RegionMass(np.array([i for _, i in reg_rows]), regions.mass[picked], sparse.csc_matrix(regions.carries)[picked])
        options = {"min_support": 1e-9, "min_lift": -np.inf, "max_len": 2, "prune": False, "families": families}
        weighted = mine_rules(table, classes, design=design, saliency=regions, **options).rules.set_index(["class", "concepts"]).sort_index()
        expanded = mine_rules(big, big_classes, saliency=big_regions, **options).rules.set_index(["class", "concepts"]).sort_index()
        sample = mine_rules(table, classes, saliency=regions, **options).rules.set_index(["class", "concepts"]).sort_index()
        assert list(weighted.index) == list(expanded.index)
        for col in ("support", "confidence", "lift", "leverage", "typicality", "saliency_share"):
            np.testing.assert_allclose(weighted[col].to_numpy(dtype=float), expanded[col].to_numpy(dtype=float), rtol=1e-12, err_msg=col)
        assert weighted["typicality"].notna().any() and weighted["saliency_share"].notna().all()
        common = sample.index.intersection(weighted.index)
        differs = [not np.allclose(sample.loc[common, c].to_numpy(dtype=float), weighted.loc[common, c].to_numpy(dtype=float), equal_nan=True)
                   for c in ("typicality", "saliency_share")]
        assert any(differs), "the sample's own values equal the weighted ones: the check could not fail"


def test_wilson_matches_statsmodels():
    for k, n in [(0, 10), (3, 10), (50, 50), (17, 40)]:
        lo, hi = wilson(k / n, n)
        ref = proportion_confint(k, n, alpha=0.05, method="wilson")
        assert float(lo) == pytest.approx(ref[0], abs=1e-9)
        assert float(hi) == pytest.approx(ref[1], abs=1e-9)


def test_effective_size_of_a_simple_random_sample_is_its_size():
    p, n = 0.3, 50
    assert float(effective_size(p, np.sqrt(p * (1 - p) / n), n)) == pytest.approx(n)
    assert float(effective_size(1.0, 0.0, 12)) == 12


def test_allocation_gives_each_class_its_regions_and_represents_confident_errors():
    strata = [Stratum("can", "confident error", 6, 12), Stratum("can", "confident correct", 400, 800), Stratum("can", "other", 94, 188),
              Stratum("bottle", "confident correct", 50, 50), Stratum("bottle", "other", 3, 3)]
    sizes = allocate(strata, regions_per_class=40)
    assert sum(sizes[st.name] for st in strata if st.cls == "can") == 20  # two regions per can image
    assert sizes["can / confident error"] >= 5  # a quarter of the class's images, though only 1.2% of the population
    assert sizes["can / other"] >= 2
    assert sum(sizes[st.name] for st in strata if st.cls == "bottle") == 40
    assert sizes["bottle / other"] == 3 or sizes["bottle / other"] >= 2
    assert all(0 <= sizes[st.name] <= st.images for st in strata)
    # a class smaller than its share is taken whole
    assert sum(allocate(strata, regions_per_class=10_000).values()) == sum(st.images for st in strata)


def test_draw_sample_is_seeded_and_records_inclusion_probabilities():
    units = {"a": list(range(10)), "b": list(range(10, 14))}
    first = draw_sample(units, {"a": 4, "b": 4}, seed=7)
    assert first == draw_sample(units, {"a": 4, "b": 4}, seed=7)
    assert sum(1 for s, _ in first.values() if s == "a") == 4
    assert {pi for s, pi in first.values() if s == "a"} == {0.4}
    assert {pi for s, pi in first.values() if s == "b"} == {1.0}
    with pytest.raises(InvalidInputError, match="cannot draw"):
        draw_sample(units, {"a": 11}, seed=0)


def test_stratum_kinds():
    kinds = stratum_kinds(["can", "can", "bottle", "can"], ["can", "bottle", "bottle", ""], [0.95, 0.9, 0.5, 0.99], confident_at=0.8)
    assert kinds == ["confident correct", "confident error", "other", "other"]
    with pytest.raises(InvalidInputError, match="confident_at"):
        stratum_kinds([], [], [], confident_at=1.5)


def test_compare_classes_on_a_sample_weights_each_class_back():
    from analysis.compare import compare_classes
    from analysis.concept_table import build_concept_table

    # Class "can": 100 images, 20 "confident error" ones all show "tag", 80 others none; the sample takes 10 of each
    # kind, so half the sampled cans show "tag" while a fifth of all cans do. "bottle": 50 images, sampled whole, none show it.
    kinds = ["err"] * 10 + ["ok"] * 10 + ["bottle"] * 50
    meta = pd.DataFrame({"true_class": ["bottle"] * 10 + ["can"] * 10 + ["bottle"] * 50, "predicted_class": ["can"] * 20 + ["bottle"] * 50,
                         "confidence": 0.9, "split": ""}, index=range(70))
    regions = {i: [i] for i in range(70)}
    concepts = {i: ({"tag": 1.0} if i < 10 else {"cap": 1.0}) for i in range(70)}
    table = build_concept_table(meta, regions, {i: 1.0 for i in range(70)}, concepts, method="majority")
    code = {"bottle": 0, "err": 1, "ok": 2}
    from dataclasses import replace

    sampled = replace(table, design=Design(np.array([code[k] for k in kinds], dtype=np.int64), np.array([50.0, 20.0, 80.0])))
    plain = {r.concept: r for r in compare_classes(table, "can", "bottle").all}
    weighted = {r.concept: r for r in compare_classes(sampled, "can", "bottle").all}
    assert plain["tag"].rate_a == pytest.approx(0.5)
    assert weighted["tag"].rate_a == pytest.approx(0.2)  # 20 of 100 cans
    assert weighted["tag"].rate_b == 0.0 and weighted["tag"].p_value < 0.05
