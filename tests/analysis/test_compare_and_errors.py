from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import fisher_exact
from statsmodels.stats.proportion import proportions_ztest

from analysis.compare import compare_classes
from analysis.confident_errors import confident_errors
from analysis.errors import InvalidInputError

from .tables import random_rows, table_from_rows


def test_class_comparison_matches_statsmodels_two_proportion_test() -> None:
    table = table_from_rows(random_rows(7, n=400))
    cmp = compare_classes(table, "can", "bottle")
    pred = table.meta["predicted_class"]
    for c in cmp.all:
        k = [int(table.presence.loc[pred == x, c.concept].sum()) for x in ("can", "bottle")]
        z, p = proportions_ztest(k, [cmp.n_a, cmp.n_b])
        assert (c.z, c.p_value) == pytest.approx((z, p))
    assert cmp.distinct_a[0].concept == "tag"
    assert all(c.concept != "tag" for c in cmp.shared)
    with pytest.raises(InvalidInputError, match="'glass'"):
        compare_classes(table, "can", "glass")


def test_confident_errors_point_at_the_concept_that_misleads() -> None:
    rows = random_rows(9, n=500)
    table = table_from_rows(rows)
    got = confident_errors(table, threshold=0.7)
    assert got.n_confident == int((~table.meta["correct"] & (table.meta["confidence"] >= 0.7)).sum())
    to_can = [g for g in got.groups if g.predicted_class == "can"]
    assert to_can and all(g.suspects[0].concept == "tag" for g in to_can if len(g.images) >= 10)
    g = max(to_can, key=lambda g: len(g.images))
    s = g.suspects[0]
    ref = (table.meta["true_class"] == g.true_class) & table.meta["correct"]
    in_ref = int(table.presence.loc[ref, s.concept].sum())
    expected = fisher_exact([[s.in_errors, len(g.images) - s.in_errors], [in_ref, int(ref.sum()) - in_ref]], alternative="greater")[1]
    assert s.p_value == pytest.approx(expected)
    confs = table.meta.loc[g.images, "confidence"].to_numpy()
    assert np.all(np.diff(confs) <= 0) and confs.min() >= 0.7
