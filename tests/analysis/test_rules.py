from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from mlxtend.frequent_patterns import apriori, association_rules, fpgrowth
from statsmodels.stats.proportion import proportion_confint

from analysis.errors import InvalidInputError
from analysis.rules import mine_rules, to_csv

# Han, Kamber & Pei, Data Mining: Concepts and Techniques (3rd ed., 2012), Table 6.1: nine transactions.
HAN = {
    "T100": {"I1", "I2", "I5"}, "T200": {"I2", "I4"}, "T300": {"I2", "I3"}, "T400": {"I1", "I2", "I4"},
    "T500": {"I1", "I3"}, "T600": {"I2", "I3"}, "T700": {"I1", "I3"}, "T800": {"I1", "I2", "I3", "I5"}, "T900": {"I1", "I2", "I3"},
}


def _han(target: str) -> tuple[pd.DataFrame, pd.Series]:
    items = ["I1", "I2", "I3", "I4", "I5"]
    table = pd.DataFrame({i: [i in t for t in HAN.values()] for i in items if i != target}, index=list(HAN))
    classes = pd.Series([target if target in t else "other" for t in HAN.values()], index=list(HAN))
    return table, classes


@pytest.mark.parametrize(
    ("target", "antecedent", "confidence", "count"),
    [("I5", "I1 & I2", 0.5, 2), ("I1", "I2 & I5", 1.0, 2), ("I2", "I1 & I5", 1.0, 2)],
)
def test_han_kamber_pei_confidences(target: str, antecedent: str, confidence: float, count: int) -> None:
    # The book's rules from {I1, I2, I5} at minimum support count 2 (of 9).
    table, classes = _han(target)
    rules = mine_rules(table, classes, min_support=2 / 9 - 1e-9, max_len=2, min_lift=0.0).rules
    row = rules[(rules["class"] == target) & (rules["concepts"] == antecedent)]
    assert len(row) == 1
    assert row["confidence"].iloc[0] == pytest.approx(confidence)
    assert row["n_images"].iloc[0] == count


def test_matches_mlxtend_apriori_on_random_tables() -> None:
    rng = np.random.default_rng(7)
    n = 400
    table = pd.DataFrame(rng.random((n, 8)) < rng.uniform(0.1, 0.5, 8), columns=[f"c{i}" for i in range(8)])
    classes = pd.Series(np.where(table["c0"] & (rng.random(n) < 0.8), "x", rng.choice(["y", "z"], n)))
    ours = mine_rules(table, classes, min_support=0.03, max_len=2, min_lift=0.0).rules
    onehot = pd.concat([table, pd.get_dummies(classes).add_prefix("k=")], axis=1).astype(bool)
    ref = association_rules(apriori(onehot, min_support=0.03, use_colnames=True, max_len=3), num_itemsets=n, metric="confidence", min_threshold=0.0)
    ref = ref[ref["consequents"].map(lambda s: len(s) == 1 and next(iter(s)).startswith("k=")) & ref["antecedents"].map(lambda s: not any(i.startswith("k=") for i in s))]
    ref_map = {(next(iter(r.consequents))[2:], " & ".join(sorted(r.antecedents))): (r.support, r.confidence, r.lift) for r in ref.itertuples()}
    ours_map = {(r["class"], r["concepts"]): (r["support"], r["confidence"], r["lift"]) for r in ours.to_dict("records")}
    assert ours_map.keys() == ref_map.keys() and len(ours_map) > 10
    for k, v in ref_map.items():
        assert ours_map[k] == pytest.approx(v)


def test_rules_bad_input_and_csv_escaping() -> None:
    table = pd.DataFrame({"=cmd()": [True, False, True]})
    with pytest.raises(InvalidInputError, match="min_support"):
        mine_rules(table, pd.Series(["a", "b", "a"]), min_support=1.5)
    rules = mine_rules(table, pd.Series(["a", "b", "a"]), min_support=0.1).rules
    text = to_csv(rules)
    assert "'=cmd()" in text and "\n=cmd" not in text and ",=cmd" not in text


def test_han_kamber_pei_frequent_itemsets() -> None:
    # Han, Kamber & Pei (2012), Table 6.1 with minimum support count 2: the book's L1, L2 and L3
    # (counts recalled from memory; mlxtend's apriori on the same table is the second witness).
    from analysis.itemsets import count_itemsets

    items = ["I1", "I2", "I3", "I4", "I5"]
    x = np.array([[i in t for i in items] for t in HAN.values()])
    got = count_itemsets(x, np.zeros(len(x), dtype=int), n_classes=1, min_count=2, max_len=3)
    found = {tuple(items[i] for i in s): int(c) for s, c in zip(got.itemsets, got.totals)}
    book = {
        ("I1",): 6, ("I2",): 7, ("I3",): 6, ("I4",): 2, ("I5",): 2,
        ("I1", "I2"): 4, ("I1", "I3"): 4, ("I1", "I5"): 2, ("I2", "I3"): 4, ("I2", "I4"): 2, ("I2", "I5"): 2,
        ("I1", "I2", "I3"): 2, ("I1", "I2", "I5"): 2,
    }
    assert found == book
    ref = apriori(pd.DataFrame(x, columns=items), min_support=2 / 9 - 1e-9, use_colnames=True)
    assert {tuple(sorted(s)): round(v * 9) for s, v in zip(ref["itemsets"], ref["support"])} == book


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_bitset_engine_equals_mlxtend_fpgrowth_with_all_metrics(seed: int) -> None:
    rng = np.random.default_rng(seed)
    n = 600
    table = pd.DataFrame(rng.random((n, 12)) < rng.uniform(0.05, 0.5, 12), columns=[f"c{i}" for i in range(12)])
    classes = pd.Series(np.where(table["c1"] & table["c2"] & (rng.random(n) < 0.7), "x", rng.choice(["y", "z", "w"], n)))
    ours = mine_rules(table, classes, min_support=0.01, max_len=3, min_lift=0.0)
    ref = mine_rules(table, classes, min_support=0.01, max_len=3, min_lift=0.0, engine="mlxtend")
    key = ["class", "concepts"]
    a, b = ours.rules.set_index(key).sort_index(), ref.rules.set_index(key).sort_index()
    assert a.index.equals(b.index) and (a["size"] == 3).sum() > 5
    pd.testing.assert_frame_equal(a.drop(columns=["rank"]), b.drop(columns=["rank"]))
    # Every metric against mlxtend's own association_rules on the one-hot table.
    onehot = pd.concat([table, pd.get_dummies(classes).add_prefix("k=")], axis=1).astype(bool)
    with np.errstate(divide="ignore", invalid="ignore"):
        assoc = association_rules(fpgrowth(onehot, min_support=0.01, use_colnames=True, max_len=4), num_itemsets=n, metric="confidence", min_threshold=0.0)
    assoc = assoc[assoc["consequents"].map(lambda s: len(s) == 1 and next(iter(s)).startswith("k=")) & assoc["antecedents"].map(lambda s: not any(i.startswith("k=") for i in s))]
    for r in assoc.itertuples():
        mine = a.loc[(next(iter(r.consequents))[2:], " & ".join(sorted(r.antecedents)))]
        assert (mine["support"], mine["confidence"], mine["lift"], mine["leverage"]) == pytest.approx((r.support, r.confidence, r.lift, r.leverage))
        assert mine["conviction"] == pytest.approx(r.conviction) if np.isfinite(r.conviction) else np.isinf(mine["conviction"])


def test_fisher_and_benjamini_hochberg_match_scipy_and_statsmodels() -> None:
    from scipy.stats import fisher_exact
    from statsmodels.stats.multitest import multipletests

    from analysis.rules import benjamini_hochberg, fisher_greater

    rng = np.random.default_rng(4)
    for trial in range(80):
        n = int(rng.integers(20, 400)) if trial < 50 else int(rng.integers(10_000, 1_000_000))
        n_y, n_x = int(rng.integers(1, n)), int(rng.integers(1, n))
        lo, hi = max(0, n_x + n_y - n), min(n_x, n_y)
        n_xy = int(rng.integers(lo, hi + 1))
        table = [[n_xy, n_x - n_xy], [n_y - n_xy, n - n_x - n_y + n_xy]]
        assert fisher_greater([n_xy], [n_x], [n_y], n)[0] == pytest.approx(fisher_exact(table, alternative="greater")[1], rel=1e-9, abs=1e-300)
    p = rng.random(200) ** 3
    np.testing.assert_allclose(benjamini_hochberg(p), multipletests(p, method="fdr_bh")[1])
    # Benjamini & Hochberg (1995), the worked example of 15 p-values (recalled from memory): at
    # q = 0.05 the step-up procedure rejects the four smallest, where Bonferroni rejects three.
    bh95 = [0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344, 0.0459, 0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.000]
    assert int((benjamini_hochberg(bh95) <= 0.05).sum()) == 4
    assert int((np.array(bh95) * 15 <= 0.05).sum()) == 3


def test_pruning_drops_sets_that_add_no_confidence() -> None:
    # "tag" alone already means "can"; "tag & belt" adds nothing and goes; "rim & tab" beats both parts and stays.
    rows = [("can", {"tag", "belt"})] * 10 + [("can", {"tag"})] * 10 + [("bottle", {"belt"})] * 20 + [("can", {"rim", "tab"})] * 8
    rows += [("bottle", {"rim"})] * 8 + [("carton", {"tab"})] * 8
    concepts = ["tag", "belt", "rim", "tab"]
    table = pd.DataFrame([[c in s for c in concepts] for _, s in rows], columns=concepts)
    classes = pd.Series([k for k, _ in rows])
    full = mine_rules(table, classes, min_support=0.05, max_len=2, min_lift=0.0)
    pruned = mine_rules(table, classes, min_support=0.05, max_len=2, min_lift=0.0, prune=True)
    gone = set(zip(full.rules["class"], full.rules["concepts"])) - set(zip(pruned.rules["class"], pruned.rules["concepts"]))
    assert ("can", "belt & tag") in gone and ("can", "rim & tab") not in gone
    assert pruned.pruned == len(gone) and pruned.n_tested == full.n_tested


def test_pruning_keeps_no_combination_whose_gain_is_within_its_own_interval() -> None:
    # "tag" => can holds in 99 of 100 images; "tag & belt" in 50 of 50: a point estimate above the subset's (1.0 > 0.99),
    # but the lower end of its 95% Wilson interval (about 0.93) is not, so it shows no gain with its own evidence and goes.
    # "rim & tab" => can, 30 of 30, against 30 of 60 for each part alone: its interval's lower end (about 0.89) is far above.
    rows = [("can", {"tag", "belt"})] * 50 + [("can", {"tag"})] * 49 + [("bottle", {"tag"})] + [("bottle", {"belt"})] * 50
    rows += [("can", {"rim", "tab"})] * 30 + [("bottle", {"rim"})] * 30 + [("carton", {"tab"})] * 30
    concepts = ["tag", "belt", "rim", "tab"]
    table = pd.DataFrame([[c in s for c in concepts] for _, s in rows], columns=concepts)
    classes = pd.Series([k for k, _ in rows])
    pruned = mine_rules(table, classes, min_support=0.05, max_len=2, min_lift=0.0, prune=True).rules
    kept = set(zip(pruned["class"], pruned["concepts"]))
    assert ("can", "belt & tag") not in kept and ("can", "tag") in kept
    assert ("can", "rim & tab") in kept
    low = pruned.set_index(["class", "concepts"]).loc[("can", "rim & tab"), "confidence_low"]
    assert low == pytest.approx(proportion_confint(30, 30, method="wilson")[0])


def test_saliency_share_is_the_mass_on_regions_carrying_the_set() -> None:
    from scipy import sparse

    from analysis.rules import RegionMass

    table = pd.DataFrame({"tag": [True, True, False], "cap": [True, False, True]})
    classes = pd.Series(["can", "can", "bottle"])
    # Image 0: tag region 0.6 and cap region 0.3; image 1: tag region 0.8; image 2: cap region 0.5.
    mass = RegionMass(np.array([0, 0, 1, 2]), np.array([0.6, 0.3, 0.8, 0.5]), sparse.csc_matrix(np.array([[1, 0], [0, 1], [1, 0], [0, 1]], dtype=bool)))
    rules = mine_rules(table, classes, min_support=0.1, max_len=2, min_lift=0.0, saliency=mass).rules.set_index(["class", "concepts"])
    assert rules.loc[("can", "tag"), "saliency_share"] == pytest.approx((0.6 + 0.8) / 2)
    assert rules.loc[("can", "cap & tag"), "saliency_share"] == pytest.approx(0.9)


def test_wilson_lower_bound_matches_statsmodels() -> None:
    from statsmodels.stats.proportion import proportion_confint

    from analysis.rules import wilson_lower

    for k, n in [(50, 50), (6, 6), (68, 74), (0, 10), (3, 1000)]:
        assert wilson_lower([k], [n])[0] == pytest.approx(proportion_confint(k, n, alpha=0.05, method="wilson")[0])


def _family_table() -> tuple[pd.DataFrame, pd.Series]:
    """Cans: 12 with a yellow tag, 4 with a plain tag, 4 with a rim; bottles: 2 yellow tags, 8 rims, 10 with red bodies;
    one can has a red body. "red body" refines "body", which every image shows."""
    rows = [("can", {"tag", "yellow tag"})] * 12 + [("can", {"tag"})] * 4 + [("can", {"rim"})] * 3 + [("can", {"rim", "red body"})]
    rows += [("bottle", {"tag", "yellow tag"})] * 2 + [("bottle", {"rim"})] * 8 + [("bottle", {"red body"})] * 10
    concepts = ["tag", "yellow tag", "rim", "body", "red body"]
    table = pd.DataFrame([[c in s or (c == "body") for c in concepts] for _, s in rows], columns=concepts)
    return table, pd.Series([k for k, _ in rows])


def test_refinements_are_nested_under_their_entity_with_their_typicality() -> None:
    table, classes = _family_table()
    families = {"yellow tag": "tag", "red body": "body"}
    plain = mine_rules(table, classes, min_support=0.02, max_len=2, min_lift=0.0)
    nested = mine_rules(table, classes, min_support=0.02, max_len=2, min_lift=0.0, families=families)
    can = nested.rules[nested.rules["class"] == "can"].reset_index(drop=True)
    # The tag family comes first: "tag" and then "yellow tag" nested under it, sharing rank 1.
    assert can.loc[0, ["rank", "concepts", "parent", "family"]].tolist() == [1, "tag", "", "tag"]
    assert can.loc[1, ["rank", "concepts", "parent", "family"]].tolist() == [1, "yellow tag", "tag", "tag"]
    # Typicality: of the 16 cans showing a tag, 12 show a yellow one (counted with pandas, not our counter).
    tagged_cans = table[(classes == "can") & table["tag"]]
    assert can.loc[1, "typicality"] == pytest.approx(tagged_cans["yellow tag"].mean()) == pytest.approx(12 / 16)
    assert np.isnan(can.loc[0, "typicality"])
    # No rule pairs a refinement with its own entity; those sets are not tested either.
    assert not nested.rules["concepts"].str.contains("tag & yellow tag").any()
    assert "tag & yellow tag" in set(plain.rules["concepts"])
    assert nested.n_tested == plain.n_tested - int(((plain.rules["concepts"] == "tag & yellow tag") | (plain.rules["concepts"] == "body & red body")).sum())
    # The figures of every rule are those of the plain table.
    both = nested.rules.merge(plain.rules, on=["class", "concepts"], suffixes=("", "_plain"))
    assert len(both) == len(nested.rules)
    for col in ("n_images", "confidence", "confidence_low", "lift", "p_value"):
        np.testing.assert_allclose(both[col].astype(float), both[col + "_plain"].astype(float))
    # A refinement whose entity is no rule of the class keeps its family name but no parent row.
    red = nested.rules[(nested.rules["class"] == "bottle") & (nested.rules["concepts"] == "red body")].iloc[0]
    assert red["family"] == "body" and red["typicality"] == pytest.approx(10 / 20)
    assert red["parent"] == ("body" if ((nested.rules["class"] == "bottle") & (nested.rules["concepts"] == "body")).any() else "")


def test_a_refinement_never_stands_above_its_entity_and_one_family_takes_one_rank() -> None:
    table, classes = _family_table()
    rules = mine_rules(table, classes, min_support=0.02, max_len=2, min_lift=1.0, families={"yellow tag": "tag", "red body": "body"}).rules
    for _cls, group in rules.groupby("class"):
        ranks = group["rank"].tolist()
        assert ranks == sorted(ranks) and set(ranks) == set(range(1, max(ranks) + 1))
        position = {c: i for i, c in enumerate(group["concepts"])}
        for c, parent in zip(group["concepts"], group["parent"]):
            if parent:
                assert position[parent] < position[c]
        assert group.groupby("family")["rank"].nunique().max() == 1
    # Without families the order is the one it always was: by Wilson low, then images.
    flat = mine_rules(table, classes, min_support=0.02, max_len=2, min_lift=1.0).rules
    for _cls, group in flat.groupby("class"):
        assert group["rank"].tolist() == list(range(1, len(group) + 1))
        assert group["confidence_low"].is_monotonic_decreasing


def test_top_rules_take_one_rule_per_family() -> None:
    from analysis.rules import top_rules

    table, classes = _family_table()
    rules = mine_rules(table, classes, min_support=0.02, max_len=1, min_lift=0.0, families={"yellow tag": "tag", "red body": "body"}).rules
    top = top_rules(rules, 2)
    for _cls, group in top.groupby("class"):
        assert group["family"].is_unique and len(group) <= 2
    can = top[top["class"] == "can"]["concepts"].tolist()
    assert can[0] == "tag" and "yellow tag" not in can  # the entity stands for its family


def test_sparse_columns_and_class_codes_read_like_the_dense_table_and_numpy_unique() -> None:
    # Sparse columns are read from their stored positions (an explicitly stored 0 is not a concept
    # shown), and class names are what np.unique(classes.astype(str)) gives for mixed types: the
    # rules equal those of the same table held dense.
    rng = np.random.default_rng(4)
    dense = pd.DataFrame(rng.random((400, 6)) < 0.3, columns=[f"c{i}" for i in range(6)])
    classes = pd.Series(rng.choice(np.array([1, "1", "b", 2.5], dtype=object), 400))
    table = dense.astype(pd.SparseDtype(bool, False))
    values = dense["c5"].to_numpy().astype(np.int64)
    at = np.arange(0, 400, 2)  # every other row stored, zeros included
    at = np.union1d(at, np.nonzero(values)[0]).astype(np.int32)
    table["c5"] = pd.arrays.SparseArray.from_indices(values[at], at, 400, fill_value=0)
    assert (table["c5"].array.sp_values == 0).any()
    a = mine_rules(dense, classes, min_support=0.01, max_len=2, min_lift=0.0).rules
    b = mine_rules(table, classes, min_support=0.01, max_len=2, min_lift=0.0).rules
    pd.testing.assert_frame_equal(a, b)
    assert sorted(set(a["class"])) == np.unique(classes.astype(str).to_numpy()).tolist() == ["1", "2.5", "b"]
