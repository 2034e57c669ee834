"""Comparing two rankings of a class's rules, ties read from the reference's intervals.

External references: scipy's spearmanr (the plain rank correlation, where the reference has no ties) and
statsmodels' Wilson interval (the interval each family carries). The tie rule itself is checked by its
invariants: the order used never contradicts a separated pair of the reference, and with no overlap it is
the reference's own order.
"""

from __future__ import annotations

import itertools

import numpy as np
import pandas as pd
import pytest
from scipy.stats import spearmanr
from statsmodels.stats.proportion import proportion_confint

from analysis.errors import InvalidInputError
from analysis.rule_ranking import RankedFamily, _allowed_order, family_ranking, match_ranking
from analysis.rules import mine_rules


def _apart(names: str) -> list[RankedFamily]:
    """Families whose intervals are all separated, best first."""
    return [RankedFamily(n, 0.9 - 0.05 * i, 0.92 - 0.05 * i) for i, n in enumerate(names)]


def test_with_separated_intervals_the_comparison_is_the_plain_spearman_one() -> None:
    reference = _apart("abcdefghij")
    found = list("abcedfhgxij")  # two neighbours swapped, a newcomer at 9th place
    got = match_ranking(reference, found)
    positions = [found.index(c) for c in "abcdefghij"]
    assert got.top == tuple("abcdefghij") and got.ties == 0
    assert got.rho == pytest.approx(spearmanr(range(10), positions).statistic)
    assert got.same_head and got.matches
    # The head compared as a set, and a separated pair out of order is not forgiven.
    assert not match_ranking(reference, list("abdcefghij")).same_head
    assert match_ranking(reference, list("jihgfedcba")).rho == pytest.approx(-1.0)


def test_overlapping_intervals_are_ties_in_any_order_and_only_those() -> None:
    # a, b, c overlap one another; d, e lie well below them and overlap each other.
    reference = [RankedFamily("a", 0.95, 0.99), RankedFamily("b", 0.94, 0.985), RankedFamily("c", 0.93, 0.98),
                 RankedFamily("d", 0.6, 0.7), RankedFamily("e", 0.58, 0.69)]
    for perm in itertools.permutations("abc"):
        for tail in itertools.permutations("de"):
            got = match_ranking(reference, [*perm, *tail], top=5, head=3)
            assert got.matches and got.rho == pytest.approx(1.0) and got.ties == 4
    # Read without ties, the same reordering falls short of 0.9.
    plain = match_ranking(reference, list("cbaed"), top=5, head=3, ties=False)
    assert plain.rho == pytest.approx(spearmanr(range(5), [2, 1, 0, 4, 3]).statistic) and not plain.matches
    # A family from below the gap placed on top is a real difference, ties or not.
    assert not match_ranking(reference, list("dabce"), top=5, head=3).matches


def test_the_order_used_never_contradicts_a_separated_pair() -> None:
    rng = np.random.default_rng(3)
    for _ in range(200):
        n = int(rng.integers(2, 12))
        centre = np.sort(rng.uniform(0.3, 1.0, n))[::-1]
        half = rng.uniform(0.0, 0.08, n)
        reference = [RankedFamily(f"f{i}", float(c - h), float(c + h)) for i, (c, h) in enumerate(zip(centre, half))]
        reference.sort(key=lambda f: -f.low)
        found = [f.name for f in reference]
        rng.shuffle(found)
        order = _allowed_order(reference, found)
        assert sorted(f.name for f in order) == sorted(f.name for f in reference)
        for i, a in enumerate(order):
            for b in order[i + 1:]:
                assert not b.low > a.high, "a family placed below one it lies wholly above"
        # The reference compared with itself keeps its own order.
        assert [f.name for f in _allowed_order(reference, [f.name for f in reference])] == [f.name for f in reference]


def test_family_ranking_carries_each_familys_strongest_rule_and_its_wilson_interval() -> None:
    rng = np.random.default_rng(0)
    n = 400
    cls = np.where(rng.random(n) < 0.5, "can", "bottle")
    tag = np.where(cls == "can", rng.random(n) < 0.9, rng.random(n) < 0.1)
    yellow = tag & (rng.random(n) < 0.5)
    cap = np.where(cls == "can", rng.random(n) < 0.3, rng.random(n) < 0.8)
    table = pd.DataFrame({"tag": tag, "yellow tag": yellow, "cap": cap})
    rules = mine_rules(table, pd.Series(cls), min_support=0.01, max_len=1, families={"yellow tag": "tag"}).rules
    ranked = family_ranking(rules, "can")
    assert [f.name for f in ranked][0] == "tag"
    assert len({f.name for f in ranked}) == len(ranked)  # one entry per family
    row = rules[(rules["class"] == "can") & (rules["concepts"] == "tag")].iloc[0]
    lo, hi = proportion_confint(int(row["n_images"]), int(row["concept_images"]), method="wilson")
    assert ranked[0].low == pytest.approx(lo) and ranked[0].high == pytest.approx(hi)
    assert family_ranking(rules, "carton") == []


def test_bad_options_say_what_to_give() -> None:
    with pytest.raises(InvalidInputError, match="head"):
        match_ranking(_apart("abc"), list("abc"), top=2, head=3)
    with pytest.raises(InvalidInputError, match="min_rho"):
        match_ranking(_apart("abc"), list("abc"), min_rho=2.0)
    assert not match_ranking(_apart("ab"), list("ab"), top=10, head=3).matches  # too few families to have a top 3
