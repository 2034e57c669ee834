"""Labelling a sample instead of everything: strata, allocation, the draw, and design-based estimates.

A campaign with a judgment budget labels a stratified simple random sample of images drawn without
replacement: strata are the predicted class crossed with how the prediction went (a confident
error, a confident correct prediction, the rest). Every image of a stratum is drawn with the same
inclusion probability n_h / N_h; every region of a drawn image is labelled.

Rates are then estimated with the sampling weights: totals by Horvitz-Thompson, rates as ratios of
two such totals (the Hajek estimator), and their variances by linearisation (a first-order Taylor
expansion of the ratio, then the stratified without-replacement variance of the linearised values,
finite population correction included).

References: Horvitz & Thompson (1952), "A generalization of sampling without replacement from a
finite universe", JASA 47, 663-685 (the estimator of a total and its unbiasedness); Cochran (1977),
Sampling Techniques, 3rd ed., sections 5.3 (variance of a stratified total) and 6.11 (ratio
estimates in stratified sampling: the combined ratio and its linearised variance); Korn & Graubard
(1998) for a confidence interval of a proportion from its effective sample size.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
import numpy.typing as npt
from scipy import sparse
from scipy.stats import norm

from .errors import InvalidInputError

FloatArray = npt.NDArray[np.float64]
Kind = Literal["confident error", "confident correct", "other"]
KINDS: tuple[Kind, ...] = ("confident error", "confident correct", "other")
Z95 = 1.959963984540054


def stratum_kinds(predicted: Sequence[str], true: Sequence[str], confidence: npt.ArrayLike, *, confident_at: float) -> list[Kind]:
    """How each prediction went: a confident error, a confident correct prediction, or the rest.

    An image whose true class is unknown (empty) counts as "other": nobody can tell whether it was an error.
    """
    if not 0 < confident_at < 1:
        raise InvalidInputError(f"confident_at must be a confidence in (0, 1); got {confident_at}. Give e.g. 0.8.")
    conf = np.asarray(confidence, dtype=np.float64)
    out: list[Kind] = []
    for p, t, c in zip(predicted, true, conf.tolist()):
        if not t or c < confident_at:
            out.append("other")
        else:
            out.append("confident correct" if str(p) == str(t) else "confident error")
    return out


@dataclass(frozen=True)
class Stratum:
    """One stratum of the population: a predicted class and a kind, with its images and their regions."""

    cls: str
    kind: Kind
    images: int
    regions: int

    @property
    def name(self) -> str:
        return f"{self.cls} / {self.kind}"


def allocate(strata: Sequence[Stratum], *, regions_per_class: int, error_share: float = 0.25, min_per_stratum: int = 2) -> dict[str, int]:
    """Images to draw from each stratum so that each class gets about ``regions_per_class`` regions.

    Every class gets the same number of regions (rules are per class, so each class needs its own
    evidence), or all it has. Within a class, every non-empty stratum gets at least
    ``min_per_stratum`` images (all it has if fewer), confident errors at least ``error_share`` of the
    class's images (they are rare, and they are where a model's shortcuts show); the rest goes in
    proportion to the strata's sizes. The sampling weights undo this oversampling in every estimate.

    Parameters
    ----------
    strata
        The population's strata (images and regions in each).
    regions_per_class
        Regions to label per predicted class.
    error_share
        The least share of a class's sampled images that go to its confident errors (when it has them).
    min_per_stratum
        Fewest images drawn from any non-empty stratum (2 lets each stratum's variance be estimated).

    Returns
    -------
    dict
        Stratum name -> images to draw (0..images in the stratum).
    """
    if regions_per_class < 1:
        raise InvalidInputError(f"regions per class must be at least 1; got {regions_per_class}.")
    if not 0 <= error_share < 1:
        raise InvalidInputError(f"error_share must be in [0, 1); got {error_share}.")
    out: dict[str, int] = {}
    by_class: dict[str, list[Stratum]] = {}
    for st in strata:
        by_class.setdefault(st.cls, []).append(st)
        out[st.name] = 0
    for group in by_class.values():
        images = sum(st.images for st in group)
        regions = sum(st.regions for st in group)
        if images == 0:
            continue
        per_image = max(regions / images, 1e-9)
        want = min(images, max(1, math.ceil(regions_per_class / per_image)))
        take = {st.name: min(st.images, min_per_stratum) for st in group}
        for st in group:
            if st.kind == "confident error":
                take[st.name] = max(take[st.name], min(st.images, math.ceil(error_share * want)))
        # The rest in proportion to the strata's images not yet taken, largest remainders first.
        left = want - sum(take.values())
        while left > 0:
            room = {st.name: st.images - take[st.name] for st in group if st.images > take[st.name]}
            if not room:
                break
            total = sum(room.values())
            shares = {k: left * v / total for k, v in room.items()}
            given = {k: min(room[k], math.floor(v)) for k, v in shares.items()}
            if sum(given.values()) == 0:  # fewer images left than strata: one each, largest remainder first
                for k in sorted(room, key=lambda k: (-(shares[k] - math.floor(shares[k])), k))[:left]:
                    given[k] = 1
            for k, v in given.items():
                take[k] += v
            left = want - sum(take.values())
        out.update(take)
    return out


def regions_per_class_for_budget(budget: int, *, classes: int, judgments_per_region: float) -> int:
    """Regions per class that a judgment budget pays for, at an expected number of judgments per region."""
    if budget < 1:
        raise InvalidInputError(f"the judgment budget must be at least 1; got {budget}.")
    if classes < 1:
        raise InvalidInputError("there is no class to sample from.")
    return max(1, int(budget / judgments_per_region / classes))


def draw_sample(units: Mapping[str, Sequence[int]], sizes: Mapping[str, int], *, seed: int) -> dict[int, tuple[str, float]]:
    """A stratified simple random sample without replacement: drawn unit -> (its stratum, its inclusion probability).

    ``units`` lists each stratum's units (ids); ``sizes`` says how many to draw from each. The draw
    is seeded, so the same call gives the same sample.
    """
    rng = np.random.default_rng(seed)
    out: dict[int, tuple[str, float]] = {}
    for name in sorted(units):
        ids = sorted(int(u) for u in units[name])
        n = int(sizes.get(name, 0))
        if n < 0 or n > len(ids):
            raise InvalidInputError(f"cannot draw {n} units from stratum {name!r}, which has {len(ids)}.")
        if n == 0:
            continue
        picked = rng.choice(len(ids), size=n, replace=False)
        for i in picked.tolist():
            out[ids[i]] = (name, n / len(ids))
    return out


@dataclass(frozen=True)
class Design:
    """A stratified simple random sample without replacement, as the estimators need it.

    ``strata`` is each sampled unit's stratum code (0..H-1), ``population`` the number of units of
    each stratum in the population (N_h). The sample size of a stratum (n_h) is counted from
    ``strata``; a unit's weight is N_h / n_h, its inclusion probability n_h / N_h.
    """

    strata: npt.NDArray[np.int64]  # (n,) stratum code per sampled unit
    population: FloatArray  # (H,) N_h

    def __post_init__(self) -> None:
        if len(self.strata) and (self.strata.min() < 0 or self.strata.max() >= len(self.population)):
            raise InvalidInputError("every stratum code must index population (one size per stratum).")
        if np.any(self.sizes > self.population):
            raise InvalidInputError("a stratum has more sampled units than its population; check the population sizes.")

    @property
    def sizes(self) -> FloatArray:
        return np.bincount(self.strata, minlength=len(self.population)).astype(np.float64)

    @property
    def weights(self) -> FloatArray:
        """Each sampled unit's weight N_h / n_h (the inverse of its inclusion probability)."""
        return (self.population / np.maximum(self.sizes, 1))[self.strata]

    @property
    def represented(self) -> float:
        """Units of the population the sample stands for: the strata with at least one sampled unit."""
        return float(self.population[self.sizes > 0].sum())

    def __len__(self) -> int:
        return len(self.strata)


@dataclass(frozen=True)
class Estimate:
    """Estimates with their standard errors, of the shape of the columns given."""

    value: FloatArray
    se: FloatArray


def _columns(y: npt.ArrayLike, n: int) -> FloatArray:
    a = np.asarray(y, dtype=np.float64)
    if a.ndim == 1:
        a = a[:, None]
    if a.ndim != 2 or a.shape[0] != n:
        raise InvalidInputError(f"values must have one row per sampled unit ({n}); got shape {a.shape}.")
    return a


def total_variance(z: npt.ArrayLike, design: Design, *, fpc: bool = True) -> FloatArray:
    """Variance of the Horvitz-Thompson total of ``z`` under stratified sampling without replacement (per column).

    sum_h N_h^2 (1 - n_h/N_h) s_h^2 / n_h, s_h^2 the sample variance of z in stratum h (Cochran
    1977, eq. 5.7 with 5.9). ``fpc=False`` leaves out the finite population correction (1 - n_h/N_h),
    for questions about the process that made the images rather than about these images. A stratum
    with a single sampled unit (and more in the population) has no variance of its own; it borrows
    the sample variance of z over all units, a stated fallback.
    """
    n_units = len(design)
    zc = _columns(z, n_units)
    h = len(design.population)
    n_h = design.sizes
    if n_units == 0:
        return np.zeros(zc.shape[1])
    pick = sparse.csr_matrix((np.ones(n_units), (design.strata, np.arange(n_units))), shape=(h, n_units))
    means = (pick @ zc) / np.maximum(n_h, 1)[:, None]
    dev = zc - means[design.strata]
    s2 = (pick @ (dev * dev)) / np.maximum(n_h - 1, 1)[:, None]
    single = (n_h == 1) & (design.population > 1)
    if single.any():
        overall = zc.var(axis=0, ddof=1) if n_units > 1 else np.zeros(zc.shape[1])
        s2[single] = overall
    f = np.where(design.population > 0, n_h / np.maximum(design.population, 1), 1.0) if fpc else np.zeros(h)
    per = np.where(n_h[:, None] > 0, design.population[:, None] ** 2 * (1 - f)[:, None] * s2 / np.maximum(n_h, 1)[:, None], 0.0)
    out: FloatArray = per.sum(axis=0)
    return out


def ht_total(y: npt.ArrayLike, design: Design) -> Estimate:
    """Horvitz-Thompson estimate of the population total of ``y`` (per column), with its standard error.

    Example: strata of 4 and 6 units, sampled (1, 3) and (2, 2, 5): the total is 4 * 2 + 6 * 3 = 26.
    """
    yc = _columns(y, len(design))
    return Estimate(design.weights @ yc, np.sqrt(total_variance(yc, design)))


def ratio(y: npt.ArrayLike, x: npt.ArrayLike, design: Design, *, fpc: bool = True) -> Estimate:
    """Hajek ratio estimate t_y / t_x of two population totals (per column), with its linearised standard error.

    The linearised value of unit i is (y_i - R x_i) / t_x, so Var(R) ~ Var(HT total of it) (Cochran
    1977, section 6.11, the combined ratio estimate). Where t_x is 0 the ratio is 0 with error 0.
    """
    yc, xc = _columns(y, len(design)), _columns(x, len(design))
    w = design.weights
    ty, tx = w @ yc, w @ xc
    r = np.divide(ty, tx, out=np.zeros_like(ty), where=tx > 0)
    z = np.divide(yc - r * xc, tx, out=np.zeros_like(yc), where=tx > 0)
    return Estimate(r, np.sqrt(total_variance(z, design, fpc=fpc)))


def effective_size(p: npt.ArrayLike, se: npt.ArrayLike, n: npt.ArrayLike) -> FloatArray:
    """The sample size a simple random sample would need for a proportion ``p`` to have standard error ``se``.

    p (1 - p) / se^2 (Korn & Graubard 1998); where p is 0 or 1, or se is 0, the units counted (``n``) are used.
    """
    pa, sa, na = (np.asarray(v, dtype=np.float64) for v in (p, se, n))
    var = sa * sa
    inner = (pa > 0) & (pa < 1) & (var > 0)
    eff = np.divide(pa * (1 - pa), var, out=np.array(na, dtype=np.float64), where=inner)
    out: FloatArray = np.maximum(eff, 1.0)
    return out


def wilson(p: npt.ArrayLike, n: npt.ArrayLike, *, z: float = Z95) -> tuple[FloatArray, FloatArray]:
    """The Wilson score interval (95% by default) of a proportion ``p`` from ``n`` (effective) units."""
    pa, na = np.asarray(p, dtype=np.float64), np.maximum(np.asarray(n, dtype=np.float64), 1e-12)
    centre = pa + z * z / (2 * na)
    spread = z * np.sqrt(np.clip(pa * (1 - pa), 0, None) / na + z * z / (4 * na * na))
    d = 1 + z * z / na
    return ((centre - spread) / d).clip(0, 1), ((centre + spread) / d).clip(0, 1)


def one_sided_p(value: npt.ArrayLike, se: npt.ArrayLike) -> FloatArray:
    """One-sided Wald p that ``value`` exceeds 0; with no spread, 0 for a positive value and 1 otherwise."""
    v, s = np.asarray(value, dtype=np.float64), np.asarray(se, dtype=np.float64)
    zs = np.divide(v, s, out=np.where(v > 0, np.inf, -np.inf), where=s > 0)
    out: FloatArray = norm.sf(zs)
    return out
