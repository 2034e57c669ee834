"""A class's rules as a ranking of families with their confidence intervals, and whether two rankings agree.

Two rankings of a class's rules (say from a sample and from labelling everything) are compared on the
reference's top ``top`` families: the same ``head`` families on top (as a set) and a Spearman rank
correlation of at least ``min_rho``. The comparison is tie-aware: two families of the reference whose
95% confidence intervals overlap are a tie, because the reference itself cannot tell which is ahead
(the next labelling of the same images may swap them). Only the reference's separated pairs (one
interval wholly above the other) fix an order. Among the orders the reference allows (every linear
extension of that interval order) the comparison takes the one closest to the ranking under test:
repeatedly, of the reference's families that no remaining family lies wholly above, the one the
tested ranking puts first. With no overlapping intervals this is the reference's own order and the
comparison is the plain one.

Overlapping 95% intervals is a cautious reading of "cannot be told apart": two intervals can overlap
while the difference is still significant (Schenker & Gentleman 2001, The American Statistician 55,
182-186; cited from memory), so this counts a few separable pairs as ties; it never counts an inseparable pair as ordered.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy.stats import spearmanr

from .errors import InvalidInputError
from .sampling import wilson


@dataclass(frozen=True)
class RankedFamily:
    """One family of a class's rules (a rule with its refinements) at its place, with the 95% confidence
    interval of its strongest rule."""

    name: str
    low: float
    high: float


@dataclass(frozen=True)
class RankingMatch:
    """How a ranking compares with a reference on the reference's top families."""

    top: tuple[str, ...]  # the reference's top families in the order used (ties broken towards the tested ranking)
    same_head: bool  # the same first ``head`` families, as a set
    rho: float  # Spearman rank correlation over ``top`` (NaN with fewer than two families)
    min_rho: float
    ties: int  # pairs among ``top`` that the reference cannot order (overlapping intervals)

    @property
    def matches(self) -> bool:
        return self.same_head and math.isfinite(self.rho) and self.rho >= self.min_rho


def confidence_intervals(rules: pd.DataFrame) -> tuple[np.ndarray, np.ndarray]:
    """The 95% interval of each rule's confidence: the table's own ends (a sample's weighted rules carry
    ``confidence_high``), else Wilson on the images showing the set."""
    low = rules["confidence_low"].to_numpy(dtype=np.float64)
    if "confidence_high" in rules.columns:
        high = rules["confidence_high"].to_numpy(dtype=np.float64)
    else:
        high = wilson(rules["confidence"].to_numpy(dtype=np.float64), rules["concept_images"].to_numpy(dtype=np.float64))[1]
    return low, high


def family_ranking(rules: pd.DataFrame, cls: str) -> list[RankedFamily]:
    """The class's rules as the results page ranks them, one entry per family ("tag" with "yellow tag"), best first,
    each with the interval of the family's strongest rule (rule tables as :func:`analysis.rules.mine_rules` makes them)."""
    mine = rules[rules["class"].astype(str) == cls]
    if mine.empty:
        return []
    mine = mine.sort_values(["rank", "confidence_low"], ascending=[True, False], kind="stable")
    family = mine["family"].where(mine["family"].astype(bool), mine["concepts"]) if "family" in mine else mine["concepts"]
    low, high = confidence_intervals(mine)
    out: dict[str, RankedFamily] = {}
    for name, lo, hi in zip(family.astype(str), low.tolist(), high.tolist()):
        if name not in out:  # the first row of a family in rank order is its strongest rule
            out[name] = RankedFamily(name, float(lo), float(hi))
    return list(out.values())


def _allowed_order(reference: Sequence[RankedFamily], found: Sequence[str]) -> list[RankedFamily]:
    """The reference's order with its ties broken towards ``found``: a linear extension of the interval order."""
    place = {name: i for i, name in enumerate(found)}
    left = list(reference)
    out: list[RankedFamily] = []
    while left:
        # Families no remaining one lies wholly above (the first left always qualifies: no one's low end is above its own).
        free = [f for f in left if not any(g.low > f.high for g in left)]
        pick = min(free, key=lambda f: (place.get(f.name, len(found)), left.index(f)))
        out.append(pick)
        left.remove(pick)
    return out


def match_ranking(reference: Sequence[RankedFamily], found: Sequence[str], *, top: int = 10, head: int = 3, min_rho: float = 0.9,
                  ties: bool = True) -> RankingMatch:
    """Whether ``found`` (family names, best first) matches the reference's top ``top`` families.

    Parameters
    ----------
    reference
        The reference ranking with intervals (:func:`family_ranking`).
    found
        The ranking under test, best first.
    top, head, min_rho
        Compare the reference's first ``top`` families: the same first ``head`` (as a set) and a Spearman
        correlation of at least ``min_rho`` between their places in the two rankings (a family missing from
        ``found`` is placed after its end).
    ties
        Read overlapping intervals of the reference as ties (the module's rule); False compares with the
        reference's order as it stands.
    """
    if not 1 <= head <= top:
        raise InvalidInputError(f"head must be between 1 and top ({top}); got {head}.")
    if not -1 <= min_rho <= 1:
        raise InvalidInputError(f"min_rho is a rank correlation in [-1, 1]; got {min_rho}.")
    order = _allowed_order(reference, found) if ties else list(reference)
    chosen = order[:top]
    names = tuple(f.name for f in chosen)
    n_ties = sum(1 for i, a in enumerate(chosen) for b in chosen[i + 1:] if not (a.low > b.high or b.low > a.high))
    if len(names) < head:
        return RankingMatch(names, False, float("nan"), min_rho, n_ties)
    same_head = set(names[:head]) == set(list(found)[:head])
    where = {c: i for i, c in enumerate(found)}
    positions = [where.get(c, len(found) + 1) for c in names]
    rho = float(spearmanr(range(len(names)), positions).statistic) if len(set(positions)) > 1 else float("nan")
    return RankingMatch(names, same_head, rho, min_rho, n_ties)
