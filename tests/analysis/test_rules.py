from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from mlxtend.frequent_patterns import apriori, association_rules

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
