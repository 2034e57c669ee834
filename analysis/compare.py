"""Two classes side by side: concepts distinctive to each (two-proportion z-test, lift) and shared ones."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.stats import norm

from .association import benjamini_hochberg
from .concept_table import ConceptTable, Target
from .errors import InvalidInputError
from .sampling import Design, ratio, total_variance


@dataclass(frozen=True)
class ConceptContrast:
    concept: str
    rate_a: float  # share of class a images showing it
    rate_b: float
    count_a: int
    count_b: int
    ratio: float  # rate_a / rate_b (inf when b never shows it)
    z: float
    p_value: float  # two-sided, pooled two-proportion z-test
    q_value: float
    share_a: float  # mean saliency share on it, among class a images showing it (NaN if none)
    share_b: float


@dataclass(frozen=True)
class ClassComparison:
    a: str
    b: str
    target: Target
    n_a: int
    n_b: int
    distinct_a: list[ConceptContrast]  # significantly more common in a, strongest first
    distinct_b: list[ConceptContrast]
    shared: list[ConceptContrast]  # common in both (>= shared_rate) without a significant difference
    all: list[ConceptContrast]


def two_proportion_z(k1: np.ndarray, n1: int, k2: np.ndarray, n2: int) -> tuple[np.ndarray, np.ndarray]:
    """Pooled two-proportion z statistic and two-sided p-value, vectorised; z = 0 when both are 0 or 1."""
    k1, k2 = np.asarray(k1, float), np.asarray(k2, float)
    p = (k1 + k2) / (n1 + n2)
    se = np.sqrt(p * (1 - p) * (1 / n1 + 1 / n2))
    with np.errstate(divide="ignore", invalid="ignore"):
        z = np.where(se > 0, (k1 / n1 - k2 / n2) / se, 0.0)
    return z, 2 * norm.sf(np.abs(z))


def compare_classes(table: ConceptTable, a: str, b: str, *, target: Target = "predicted", alpha: float = 0.05, shared_rate: float = 0.1) -> ClassComparison:
    """Concepts that set class ``a`` apart from ``b`` and the ones they share, with test statistics."""
    if a == b:
        raise InvalidInputError("choose two different classes to compare.")
    classes = table.targets(target).to_numpy()
    for c in (a, b):
        if not (classes == c).any():
            raise InvalidInputError(f"no image has {target} class {c!r}; the classes are {sorted(set(classes))}.")
    in_a, in_b = classes == a, classes == b
    pres = table.presence.to_numpy(dtype=bool)
    share = table.share.to_numpy(dtype=float)
    n_a, n_b = int(in_a.sum()), int(in_b.sum())
    k_a, k_b = pres[in_a].sum(axis=0), pres[in_b].sum(axis=0)
    if table.design is not None:  # a sample: weighted rates and a design-based test of their difference
        rate_a, rate_b, z, p = _weighted_contrast(pres, in_a, in_b, table.design)
    else:
        rate_a, rate_b = k_a / n_a, k_b / n_b
        z, p = two_proportion_z(k_a, n_a, k_b, n_b)
    q = benjamini_hochberg(p)

    def mean_share(mask: np.ndarray, j: int) -> float:
        rows = mask & pres[:, j]
        return float(share[rows, j].mean()) if rows.any() else float("nan")

    rows = []
    for j, name in enumerate(table.concepts):
        if k_a[j] == 0 and k_b[j] == 0:
            continue
        ra, rb = rate_a[j], rate_b[j]
        rows.append(ConceptContrast(name, float(ra), float(rb), int(k_a[j]), int(k_b[j]), float(ra / rb) if rb else float("inf"),
                                    float(z[j]), float(p[j]), float(q[j]), mean_share(in_a, j), mean_share(in_b, j)))
    distinct_a = sorted([r for r in rows if r.q_value <= alpha and r.rate_a > r.rate_b], key=lambda r: (r.p_value, -r.rate_a))
    distinct_b = sorted([r for r in rows if r.q_value <= alpha and r.rate_b > r.rate_a], key=lambda r: (r.p_value, -r.rate_b))
    shared = sorted([r for r in rows if r.q_value > alpha and min(r.rate_a, r.rate_b) >= shared_rate], key=lambda r: -min(r.rate_a, r.rate_b))
    return ClassComparison(a, b, target, n_a, n_b, distinct_a, distinct_b, shared, rows)


def _weighted_contrast(pres: np.ndarray, in_a: np.ndarray, in_b: np.ndarray, design: Design) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Weighted shares of class a's and b's images showing each concept, and a two-sided Wald test of their difference.

    The difference R_a - R_b of two Hajek ratios is linearised as a whole (unit i: (x_i - R_a) a_i / t_a -
    (x_i - R_b) b_i / t_b), so strata shared by both classes are accounted for; no finite population
    correction (a question about the process, as for the rules' p-values).
    """
    x = pres.astype(np.float64)
    a, b = in_a.astype(np.float64), in_b.astype(np.float64)
    ra = ratio(x * a[:, None], np.repeat(a[:, None], x.shape[1], axis=1), design).value
    rb = ratio(x * b[:, None], np.repeat(b[:, None], x.shape[1], axis=1), design).value
    w = design.weights
    t_a, t_b = float(w @ a), float(w @ b)
    lin = (x - ra) * a[:, None] / t_a - (x - rb) * b[:, None] / t_b
    se = np.sqrt(total_variance(lin, design, fpc=False))
    diff = ra - rb
    z = np.divide(diff, se, out=np.zeros_like(diff), where=se > 0)
    return ra, rb, z, 2 * norm.sf(np.abs(z))
