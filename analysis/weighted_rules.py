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
tested. A rule's typicality (the share of its family's images of the class that show the refinement)
and its saliency share (the mean share of saliency on regions carrying its concepts, over the images
holding the set and the class) are weighted means too. Rules are ranked as the unweighted ones are,
by the lower end of their confidence interval. The entry point is :func:`analysis.rules.mine_rules`
with a ``design``; pruning there compares confidences in the sample.
"""

from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

from .association import benjamini_hochberg
from .errors import InvalidInputError
from .rules import RULE_COLUMNS, RegionMass, RuleTable, _rank_by_family, conviction, set_mass
from .sampling import Z95, Design, effective_size, one_sided_p, ratio, total_variance, wilson

# Columns a weighted rule table adds after RULE_COLUMNS; "n_images", "class_images" and "concept_images" stay counts in the sample.
SAMPLED_COLUMNS = [
    "images_estimated", "class_images_estimated", "confidence_high", "presence_share", "presence_share_low", "presence_share_high",
    "lift_low", "lift_high", "support_se",
]


def sample_support(min_support: float, design: Design, n_rows: int) -> float:
    """The support to mine the sample at so that no rule whose weighted support reaches ``min_support`` is missed:
    a rule with weighted support s holds in at least s * mean(w) / max(w) of the sample's images."""
    if len(design) != n_rows:
        raise InvalidInputError(f"the design has {len(design)} units but the table {n_rows} rows; give one stratum per image.")
    if n_rows == 0:
        raise InvalidInputError("the concept table has no rows; label some regions first.")
    w = design.weights
    return min(1.0, max(min_support * float(w.mean() / w.max()), 1.0 / n_rows))


def reweigh(found: RuleTable, table: pd.DataFrame, classes: pd.Series, design: Design, *, min_support: float, min_lift: float,
            saliency: RegionMass | None) -> RuleTable:
    """The rules ``found`` in a sample (by :func:`analysis.rules.mine_rules` at :func:`sample_support`) with every rate
    estimated for the population: RULE_COLUMNS then SAMPLED_COLUMNS, ``min_support`` and ``min_lift`` applied to the
    weighted estimates. ``n_images`` stays the sample's count and ``images_estimated`` is the population's.

    Called by :func:`analysis.rules.mine_rules` when it is given a design.
    """
    if found.rules.empty:
        return replace(found, rules=pd.DataFrame(columns=RULE_COLUMNS + SAMPLED_COLUMNS), min_support=min_support)
    w = design.weights
    rules = found.rules
    index = {str(c): i for i, c in enumerate(table.columns)}
    x = _holds(table, rules["concepts"].tolist(), index)
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
    conf_low, conf_high = wilson(conf.value, effective_size(conf.value, conf.se, x.sum(axis=0)))
    pres_low, pres_high = wilson(presence.value, effective_size(presence.value, presence.se, y.sum(axis=0)))
    out = rules.assign(
        support=support.value, confidence=conf.value, confidence_low=conf_low, lift=lift, leverage=leverage,
        conviction=conviction(conf.value, share_y.value), p_value=p, images_estimated=t_xy, class_images_estimated=t_y, confidence_high=conf_high,
        presence_share=presence.value, presence_share_low=pres_low, presence_share_high=pres_high, lift_low=lift_low, lift_high=lift_high,
        support_se=support.se, typicality=_typicality(table, rules, y, w, t_xy, index),
        saliency_share=_saliency_shares(saliency, rules, xy, w, index) if saliency is not None else np.nan,
    )
    keep = (out["support"].to_numpy() >= min_support - 1e-12) & (out["lift"].to_numpy() > min_lift)
    # Benjamini-Hochberg over every rule tested: with ranks among the rules kept and m = all tested, each q is at
    # least the one from the whole family (a rule's rank among those kept is at most its rank among all), so never smaller.
    m = max(found.n_tested, len(out))
    p_all = out["p_value"].to_numpy(dtype=np.float64)
    out = out.assign(q_value=_bh_of_family(p_all, m))
    out = out[keep].drop(columns=["rank"])
    out = _rank_by_family(out)
    return RuleTable(out.reset_index(drop=True)[RULE_COLUMNS + SAMPLED_COLUMNS], len(table), min_support, found.max_len, found.min_count,
                     found.n_tested, found.pruned)


def _typicality(table: pd.DataFrame, rules: pd.DataFrame, y: np.ndarray, w: np.ndarray, t_xy: np.ndarray, index: dict[str, int]) -> np.ndarray:
    """Weighted share of the family's images of the class that show the refinement, t(set & class) / t(family & class)
    (Hajek); NaN for a family's own rule, as unweighted, and where the family's concepts are not all columns."""
    present = table.to_numpy(dtype=bool)
    out = np.full(len(rules), np.nan)
    for j, (concepts, family) in enumerate(zip(rules["concepts"].astype(str), rules["family"].fillna("").astype(str))):
        if not family or family == concepts:
            continue
        try:
            cols = _split(family, index)
        except InvalidInputError:
            continue
        t_f = float((w * y[:, j]) @ present[:, cols].all(axis=1))
        if t_f > 0:
            out[j] = t_xy[j] / t_f
    return out


def _saliency_shares(saliency: RegionMass, rules: pd.DataFrame, xy: np.ndarray, w: np.ndarray, index: dict[str, int]) -> np.ndarray:
    """Weighted mean, over the images holding the set and the class, of the saliency share on regions carrying any of
    its concepts: sum w m / sum w over those images (Hajek; NaN where none)."""
    n = xy.shape[0]
    out = np.full(len(rules), np.nan)
    mass: dict[str, np.ndarray] = {}
    for j, concepts in enumerate(rules["concepts"].astype(str).tolist()):
        if concepts not in mass:
            mass[concepts] = set_mass(saliency, _split(concepts, index), n)
        held = w * xy[:, j]
        total = float(held.sum())
        if total > 0:
            out[j] = float(held @ mass[concepts]) / total
    return out


def _bh_of_family(p: np.ndarray, m: int) -> np.ndarray:
    """Benjamini-Hochberg q-values of ``p`` as members of a family of ``m`` tests (m >= len(p))."""
    if len(p) == 0:
        return p.copy()
    q: np.ndarray = benjamini_hochberg(p) * (m / len(p))
    return q.clip(max=1.0)


def _holds(table: pd.DataFrame, sets: list[str], index: dict[str, int]) -> np.ndarray:
    """(images, sets) 1.0 where the image shows every concept of the set (sets as the rule table writes them)."""
    x = table.to_numpy(dtype=bool)
    out = np.ones((len(table), len(sets)), dtype=bool)
    for j, s in enumerate(sets):
        out[:, j] = x[:, _split(s, index)].all(axis=1)
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
