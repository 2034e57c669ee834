"""Concept rules of a sampled campaign: every rate estimated with the sampling weights, intervals with the sampling error.

Rules are found on the labelled sample (at a support low enough that no rule whose weighted
support reaches the minimum is missed), then every rate is re-estimated for the population the
sample stands for (see :mod:`analysis.sampling`): support, confidence, presence share (the share of
the class's images showing the set), lift, leverage and conviction are ratios of Horvitz-Thompson
totals (Hajek). Intervals are 95%: Wilson on the effective sample size for confidence and presence
share, a Wald interval on the log scale for lift, each from the linearised variance with the finite
population correction (they describe the audited image set). The p-value is a one-sided Wald test
that leverage exceeds 0 from the linearised variance without the finite population correction (a
question about the process that made the images), adjusted by Benjamini-Hochberg over every rule
tested. Rules are ranked as the unweighted ones are, by the lower end of their confidence interval.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

from .association import benjamini_hochberg
from .errors import InvalidInputError
from .rules import RULE_COLUMNS, RegionMass, RuleTable, _rank_by_family, mine_rules
from .sampling import Z95, Design, effective_size, one_sided_p, ratio, total_variance, wilson

# Columns a weighted rule table adds after RULE_COLUMNS; "n_images", "class_images" and "concept_images" stay counts in the sample.
SAMPLED_COLUMNS = [
    "images_estimated", "class_images_estimated", "confidence_high", "presence_share", "presence_share_low", "presence_share_high",
    "lift_low", "lift_high", "support_se",
]


def weighted_rules(
    table: pd.DataFrame,
    classes: pd.Series,
    design: Design,
    *,
    min_support: float = 0.02,
    max_len: int = 2,
    min_lift: float = 1.0,
    min_count: int = 1,
    prune: bool = False,
    saliency: RegionMass | None = None,
    families: dict[str, str] | None = None,
) -> RuleTable:
    """Rules ``concept set => class`` on a stratified sample, with weighted rates and design-based intervals.

    Parameters are those of :func:`analysis.rules.mine_rules`, plus ``design``: the stratum of each
    row of ``table`` and each stratum's size in the population. ``min_support`` and ``min_lift``
    apply to the weighted estimates. Pruning compares confidences in the sample.

    Returns
    -------
    RuleTable
        RULE_COLUMNS then SAMPLED_COLUMNS; ``n_images`` is the sample's count and
        ``images_estimated`` the population's.
    """
    if len(design) != len(table):
        raise InvalidInputError(f"the design has {len(design)} units but the table {len(table)} rows; give one stratum per image.")
    w = design.weights
    if len(w) == 0:
        raise InvalidInputError("the concept table has no rows; label some regions first.")
    # A rule with weighted support s holds in at least s * mean(w) / max(w) of the sample's images.
    sample_support = max(min_support * float(w.mean() / w.max()), 1.0 / len(w))
    found = mine_rules(table, classes, min_support=min(1.0, sample_support), max_len=max_len, min_lift=-np.inf, min_count=min_count,
                       prune=prune, saliency=saliency, families=families)
    if found.rules.empty:
        return replace(found, rules=pd.DataFrame(columns=RULE_COLUMNS + SAMPLED_COLUMNS), min_support=min_support)
    rules = found.rules
    x = _holds(table, rules["concepts"].tolist())
    y = (classes.astype(str).to_numpy()[:, None] == rules["class"].astype(str).to_numpy()[None, :]).astype(np.float64)
    xy = x * y
    ones = np.ones((len(w), 1))
    n_hat = float(w.sum())
    support = ratio(xy, ones, design)
    share_x = ratio(x, ones, design)
    share_y = ratio(y, ones, design)
    conf = ratio(xy, x, design)
    presence = ratio(xy, y, design)
    t_xy, t_x, t_y = w @ xy, w @ x, w @ y
    lift = np.divide(conf.value, share_y.value, out=np.zeros_like(conf.value), where=share_y.value > 0)
    # log lift = log t_xy - log t_x - log t_y + log N: its linearised value per unit.
    with np.errstate(divide="ignore", invalid="ignore"):
        z_lift = xy / t_xy - x / t_x - y / t_y + 1.0 / n_hat
    z_lift = np.nan_to_num(z_lift, nan=0.0, posinf=0.0, neginf=0.0)
    se_log_lift = np.sqrt(total_variance(z_lift, design))
    positive = lift > 0
    lift_low = np.where(positive, lift * np.exp(-Z95 * se_log_lift), 0.0)
    lift_high = np.where(positive, lift * np.exp(Z95 * se_log_lift), 0.0)
    leverage = support.value - share_x.value * share_y.value
    z_lev = (xy - support.value - share_y.value * (x - share_x.value) - share_x.value * (y - share_y.value)) / n_hat
    p = one_sided_p(leverage, np.sqrt(total_variance(z_lev, design, fpc=False)))
    n_x = x.sum(axis=0)
    n_y = y.sum(axis=0)
    conf_low, conf_high = wilson(conf.value, effective_size(conf.value, conf.se, n_x))
    pres_low, pres_high = wilson(presence.value, effective_size(presence.value, presence.se, n_y))
    with np.errstate(divide="ignore"):
        conviction = np.where(conf.value < 1, (1 - share_y.value) / np.maximum(1 - conf.value, 1e-300), np.inf)
    out = rules.assign(
        support=support.value, confidence=conf.value, confidence_low=conf_low, lift=lift, leverage=leverage, conviction=conviction,
        p_value=p, images_estimated=t_xy, class_images_estimated=t_y, confidence_high=conf_high, presence_share=presence.value,
        presence_share_low=pres_low, presence_share_high=pres_high, lift_low=lift_low, lift_high=lift_high, support_se=support.se,
    )
    keep = (out["support"].to_numpy() >= min_support - 1e-12) & (out["lift"].to_numpy() > min_lift)
    # Benjamini-Hochberg over every rule tested: with ranks among the rules kept and m = all tested, each q is at
    # least the one from the whole family (a rule's rank among those kept is at most its rank among all), so never smaller.
    m = max(found.n_tested, len(out))
    p_all = out["p_value"].to_numpy(dtype=np.float64)
    out = out.assign(q_value=_bh_of_family(p_all, m))
    out = out[keep].drop(columns=["rank"])
    out = _rank_by_family(out)
    return RuleTable(out.reset_index(drop=True)[RULE_COLUMNS + SAMPLED_COLUMNS], len(table), min_support, max_len, found.min_count,
                     found.n_tested, found.pruned)


def _bh_of_family(p: np.ndarray, m: int) -> np.ndarray:
    """Benjamini-Hochberg q-values of ``p`` as members of a family of ``m`` tests (m >= len(p))."""
    if len(p) == 0:
        return p.copy()
    q: np.ndarray = benjamini_hochberg(p) * (m / len(p))
    return q.clip(max=1.0)


def _holds(table: pd.DataFrame, sets: list[str]) -> np.ndarray:
    """(images, rules) 1.0 where the image shows every concept of the rule's set (sets as the rule table writes them)."""
    names = [str(c) for c in table.columns]
    index = {c: i for i, c in enumerate(names)}
    x = table.to_numpy(dtype=bool)
    out = np.ones((len(table), len(sets)), dtype=bool)
    for j, s in enumerate(sets):
        cols = _split(s, index)
        out[:, j] = x[:, cols].all(axis=1)
    return out.astype(np.float64)


def _split(concepts: str, index: dict[str, int]) -> list[int]:
    """Column positions of a set written "a & b" (a concept whose own name holds " & " is found whole first)."""
    if concepts in index:
        return [index[concepts]]
    parts = concepts.split(" & ")
    out: list[int] = []
    i = 0
    while i < len(parts):
        for k in range(len(parts), i, -1):
            name = " & ".join(parts[i:k])
            if name in index:
                out.append(index[name])
                i = k
                break
        else:
            raise InvalidInputError(f"rule set {concepts!r} names a concept not in the table.")
    return out


def design_presence_share(table: pd.DataFrame, classes: pd.Series, design: Design) -> pd.DataFrame:
    """Weighted share of each class's images showing each concept (classes x concepts)."""
    names = sorted(classes.astype(str).unique())
    y = (classes.astype(str).to_numpy()[:, None] == np.array(names)[None, :]).astype(np.float64)
    x = table.to_numpy(dtype=np.float64)
    w = design.weights
    t_y = w @ y
    t_xy = (y * w[:, None]).T @ x
    share = np.divide(t_xy, t_y[:, None], out=np.zeros_like(t_xy), where=t_y[:, None] > 0)
    return pd.DataFrame(share, index=names, columns=table.columns)
