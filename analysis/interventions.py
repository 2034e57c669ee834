"""Does the model rely on a concept, or do they only co-occur? Interventions that measure it.

Ablation: cover the concept's regions with a neutral fill and see how far the class's
probability falls, against a matched control: masks of the same shape and pixel count moved
elsewhere in the same image. Insertion: paste the concept's regions into images of other classes
and see how far they move toward the class, against pasting same-shaped patches cut from
elsewhere in the same source images. The effect is the mean per-image difference between the
concept and its control, with a bootstrap interval and a one-sided sign-flip permutation p-value.
Forward passes only, batched, no gradients.

A concept spread over most of the image (a green belt under every object) leaves no room for a
moved mask, so covering cannot test it. When such a concept is an attribute of an entity whose
plain look is known ("green" of the belt, the belt's colour where it is not green), recolouring
removes the attribute instead: the masked pixels' mean colour moves to the plain look, texture kept,
against a sham recolouring of the same pixels to another image's attribute colour (:func:`recolour_test`).
"""

from __future__ import annotations

from collections.abc import Callable, Collection, Mapping, Sequence
from dataclasses import asdict, dataclass, field
from typing import Literal

import numpy as np
import numpy.typing as npt
import torch
import torch.nn.functional as F
from scipy import ndimage

from .errors import InvalidInputError
from .model_io import LoadedModel

Fill = Literal["blur", "mean", "inpaint", "ring"]
FILLS: tuple[Fill, ...] = ("blur", "mean", "inpaint", "ring")
# The covering test's default fill policy, chosen from measurements against re-rendered scenes
# (benchmarks/intervention_truth.py); with several fills the most conservative verdict stands.
DEFAULT_FILLS: tuple[Fill, ...] = ("ring",)
# A mask covering more than this share of an image has no matched control: the same shape moved
# elsewhere overlaps itself, so "beyond matched controls" means nothing. Such images are left out,
# and a test with fewer than two images left is not testable (common practice: a control needs room).
MAX_COVER_SHARE = 0.5
RECOLOUR = "recolour"  # the fill name a recolouring test records
Position = Literal["same", "random"]
Progress = Callable[[int, int], None]
BoolMaps = npt.NDArray[np.bool_]


class NotTestableError(InvalidInputError):
    """The masks leave no room for a matched control (they cover most of each image)."""


@dataclass(frozen=True)
class InterventionResult:
    """One intervention on one class and concept, with its matched control."""

    kind: Literal["ablation", "insertion"]
    cls: str
    concept: str
    fill: str  # ablation: the fill; insertion: "paste"
    position: str  # insertion: "same" or "random"; ablation: "in place"
    n_images: int
    draws: int  # control draws per image
    mean_change: float  # ablation: fall of the class probability; insertion: its rise
    flip_rate: float  # ablation: share no longer predicted as the class; insertion: share now predicted as it
    control_mean_change: float
    control_flip_rate: float
    effect: float  # mean per-image (change - control change)
    interval: tuple[float, float]  # bootstrap 95% interval of the effect
    p_value: float  # one-sided sign-flip permutation test that the effect is above 0
    seed: int
    per_image: list[float] = field(default_factory=list, repr=False)  # change - control change, per image
    left_out: int = 0  # images left out because their mask covers more than MAX_COVER_SHARE of the image
    # The covered regions also show other concepts (CoverPlan.alone was False): the effect is the concept's
    # together with its neighbours', so it can rule reliance out but never confirm it (analysis.reliance.judge_test).
    shared: bool = False

    def to_json(self) -> dict[str, object]:
        return asdict(self)

    def summary(self) -> str:
        verb = "falls" if self.kind == "ablation" else "rises"
        left = f", {self.left_out} left out: mask over {MAX_COVER_SHARE:.0%} of the image" if self.left_out else ""
        left += ", in regions that also show other concepts" if self.shared else ""
        what, control = (("recolouring", "sham recolourings that keep it") if self.fill == RECOLOUR else (self.kind, "matched random masks"))
        return (f"{what} of {self.concept} ({self.n_images} images{left}): P({self.cls}) {verb} by {self.mean_change:.3f} against "
                f"{self.control_mean_change:.3f} for {control}; effect {self.effect:.3f} "
                f"[{self.interval[0]:.3f}, {self.interval[1]:.3f}], p {self.p_value:.3g}")


def _probs(model: LoadedModel, x: torch.Tensor, batch_size: int) -> torch.Tensor:
    with torch.inference_mode():
        return torch.cat([torch.softmax(model.module(x[i : i + batch_size]).float(), dim=1) for i in range(0, len(x), batch_size)])


def _gaussian(x: torch.Tensor, sigma: float) -> torch.Tensor:
    """Separable Gaussian blur of N x C x H x W images, edges replicated."""
    radius = int(3 * sigma)
    t = torch.arange(-radius, radius + 1, dtype=x.dtype)
    k = torch.exp(-(t**2) / (2 * sigma**2))
    k = k / k.sum()
    c = x.shape[1]
    padded = F.pad(x, (radius, radius, radius, radius), mode="replicate")
    return F.conv2d(F.conv2d(padded, k.view(1, 1, 1, -1).repeat(c, 1, 1, 1), groups=c), k.view(1, 1, -1, 1).repeat(c, 1, 1, 1), groups=c)


def fill_source(x: torch.Tensor, fill: Fill) -> torch.Tensor | None:
    """What a fill puts under the mask when it does not depend on the mask: the blurred image
    (computed once, shared by the concept mask and every control draw), or None."""
    if fill == "blur":
        return _gaussian(x, max(2.0, x.shape[-1] / 10))
    if fill in ("mean", "inpaint", "ring"):
        return None
    raise InvalidInputError(f"fill must be one of {', '.join(FILLS)}; got {fill!r}.")


def fill_images(x: torch.Tensor, masks: torch.Tensor, fill: Fill, source: torch.Tensor | None = None) -> torch.Tensor:
    """Replace masked pixels (masks N x H x W, bool) of normalised images x (N x 3 x H x W) by the fill.

    ``mean``: the data set's mean colour (0 after normalisation). ``blur``: a strong Gaussian blur
    of the image (sigma a tenth of its size; pass ``source`` from :func:`fill_source` to reuse it).
    ``inpaint``: the masked pixels filled from their surroundings only, by normalised convolution
    (a Gaussian average of the unmasked pixels around each one; Knutsson & Westin, 1993).
    ``ring``: each connected part of the mask takes the mean colour of the ring of pixels just
    outside it (two pixels wide): what lies around the region, flat.
    """
    m = masks[:, None].to(x.dtype)
    if fill == "mean":
        return x * (1 - m)
    if fill == "blur":
        blurred = source if source is not None else fill_source(x, "blur")
        return x * (1 - m) + blurred * m  # type: ignore[operator]
    if fill == "inpaint":
        sigma = max(2.0, x.shape[-1] / 16)
        estimate = _gaussian(x * (1 - m), sigma) / _gaussian(1 - m, sigma).clamp_min(1e-6)
        return x * (1 - m) + estimate * m
    if fill == "ring":
        return x * (1 - m) + _ring_colours(x, masks) * m
    raise InvalidInputError(f"fill must be one of {', '.join(FILLS)}; got {fill!r}.")


def _ring_colours(x: torch.Tensor, masks: torch.Tensor, width: int = 2) -> torch.Tensor:
    """N x 3 x H x W: at each masked pixel, the mean colour of the ring around its connected part."""
    out = torch.zeros_like(x)
    grow = np.ones((2 * width + 1, 2 * width + 1), dtype=bool)
    m = masks.numpy().astype(bool)
    for i in range(len(m)):
        labels, n = ndimage.label(m[i], structure=np.ones((3, 3), dtype=bool))
        for k in range(1, n + 1):
            part = labels == k
            ring = ndimage.binary_dilation(part, structure=grow) & ~m[i]
            if not ring.any():  # the mask covers everything around it: the data set's mean colour (0)
                continue
            colour = x[i][:, torch.from_numpy(ring)].mean(dim=1)
            out[i][:, torch.from_numpy(part)] = colour[:, None]
    return out


def matched_masks(masks: BoolMaps, rng: np.random.Generator, *, max_overlap: float = 0.1, tries: int = 50) -> BoolMaps:
    """One control mask per image: the same mask shifted cyclically (same shape, same pixel count),
    to a place that overlaps the original by at most ``max_overlap`` of its area when one exists."""
    return matched_shifts(masks, rng, max_overlap=max_overlap, tries=tries)[0]


def matched_shifts(masks: BoolMaps, rng: np.random.Generator, *, max_overlap: float = 0.1, tries: int = 50) -> tuple[BoolMaps, npt.NDArray[np.int64]]:
    """The control masks of :func:`matched_masks` and the (dy, dx) cyclic shift that made each."""
    out = np.zeros_like(masks)
    offsets = np.zeros((len(masks), 2), dtype=np.int64)
    n, h, w = masks.shape
    for i in range(n):
        area = int(masks[i].sum())
        best, best_overlap, best_shift = masks[i], area + 1, (0, 0)
        for _ in range(tries):
            shift = (int(rng.integers(h)), int(rng.integers(w)))
            shifted = np.roll(masks[i], shift, axis=(0, 1))
            overlap = int((shifted & masks[i]).sum())
            if overlap < best_overlap:
                best, best_overlap, best_shift = shifted, overlap, shift
            if overlap <= max_overlap * area:
                break
        out[i] = best
        offsets[i] = best_shift
    return out, offsets


def effect_stats(diff: npt.NDArray[np.float64], rng: np.random.Generator, n_boot: int = 2000, n_perm: int = 5000) -> tuple[float, tuple[float, float], float]:
    """Mean of the per-image differences, its percentile bootstrap 95% interval, and a one-sided
    sign-flip permutation p-value that the mean is above 0.

    The p-value is exact (every sign pattern) when there are at most ``n_perm`` patterns, otherwise
    Monte Carlo with ``n_perm`` draws, counted as (1 + hits) / (1 + draws) so it is never 0
    (Phipson & Smyth, 2010). Checked against scipy.stats.bootstrap (percentile method) and
    scipy.stats.permutation_test (one sample: signs flipped).
    """
    diff = np.asarray(diff, dtype=np.float64)
    n = len(diff)
    effect = float(diff.mean())
    boots = diff[rng.integers(0, n, (n_boot, n))].mean(axis=1)
    lo, hi = np.quantile(boots, [0.025, 0.975])
    tol = 1e-12 * max(1.0, float(np.abs(diff).max()))
    if 2**n <= n_perm:
        patterns = ((np.arange(2**n)[:, None] >> np.arange(n)) & 1) * 2.0 - 1.0
        p = float(np.mean((patterns * diff).mean(axis=1) >= effect - tol))
    else:
        signs = rng.choice([-1.0, 1.0], size=(n_perm, n))
        null = (signs * diff).mean(axis=1)
        p = float((1 + np.sum(null >= effect - tol)) / (n_perm + 1))
    return effect, (float(lo), float(hi)), p


def _check(model: LoadedModel, x: torch.Tensor, masks: BoolMaps, class_index: int) -> None:
    h, w = model.sidecar.input_size
    if x.ndim != 4 or tuple(x.shape[1:]) != (3, h, w):
        raise InvalidInputError(f"images must be N x 3 x {h} x {w}; got {tuple(x.shape)}.")
    if masks.shape != (x.shape[0], h, w):
        raise InvalidInputError(f"masks must be {x.shape[0]} x {h} x {w}, one per image; got {masks.shape}.")
    if len(x) < 2:
        raise InvalidInputError("an intervention needs at least two images with the concept.")
    if not masks.reshape(len(masks), -1).any(axis=1).all():
        raise InvalidInputError("every image needs a non-empty concept mask.")
    if not 0 <= class_index < len(model.classes):
        raise InvalidInputError(f"class index must be 0..{len(model.classes) - 1}; got {class_index}.")


def controllable(masks: BoolMaps, *, max_share: float = MAX_COVER_SHARE, what: str = "covering") -> npt.NDArray[np.bool_]:
    """Which images' masks leave room for a matched control (cover at most ``max_share`` of the image).

    Raises NotTestableError, saying how much the masks cover, when fewer than two images are left.
    """
    if not 0 < max_share <= 1:
        raise InvalidInputError(f"max_share must be in (0, 1], e.g. {MAX_COVER_SHARE}; got {max_share!r}.")
    share = masks.reshape(len(masks), -1).mean(axis=1)
    keep: npt.NDArray[np.bool_] = share <= max_share
    if int(keep.sum()) < 2:
        raise NotTestableError(
            f"{what} is not testable: the region covers {float(np.median(share)):.0%} of the image (median over {len(masks)} images) and "
            f"matched controls (the same shape moved elsewhere in the image) need it under {max_share:.0%}. A concept spread over most "
            f"of the image (a background, a colour cast) cannot be told apart from the rest of the image by covering it.")
    return keep


@dataclass(frozen=True)
class CoverPlan:
    """Which regions of each image a covering or pasting test uses for a concept set.

    ``regions[i]`` are the indices of image i's regions to use (empty: the image is left out).
    ``alone``: the regions show the concepts and nothing else; otherwise every region showing any
    of them is used, and the estimate includes whatever shares those regions (``note`` says so).
    """

    regions: tuple[tuple[int, ...], ...]
    alone: bool

    @property
    def n_images(self) -> int:
        return sum(1 for r in self.regions if r)

    @property
    def note(self) -> str:
        return "" if self.alone else "in regions shared with other concepts"


MIN_ALONE_IMAGES = 10


def plan_regions(region_concepts: Sequence[Sequence[Collection[str]]], concepts: Collection[str], *, families: Mapping[str, str] | None = None,
                 min_alone: int = MIN_ALONE_IMAGES) -> CoverPlan:
    """Choose the regions to cover for ``concepts``, per image, from the concepts each region shows.

    A saliency region often holds the concept and a piece of its neighbour (a paper scrap and the
    can's rim beside it); covering it removes both, which overstated the effect of the scrap by a
    third to a half against scenes drawn again without it (benchmarks/intervention_truth.py). So the
    regions that show the concepts alone (their refinements and entities count as the same family)
    are used whenever at least ``min_alone`` images have one (or every image that has a region at
    all, when there are fewer); images with shared regions only are then left out. Otherwise every
    region showing any of the concepts is used, and the plan says so.
    """
    wanted = set(concepts)
    fam = dict(families or {})
    kin = set(wanted)
    kin |= {fam[c] for c in wanted if c in fam}
    kin |= {r for r, e in fam.items() if e in wanted}
    shown = [tuple(k for k, cs in enumerate(regions) if wanted & set(cs)) for regions in region_concepts]
    alone = [tuple(k for k in idx if set(region_concepts[i][k]) <= kin) for i, idx in enumerate(shown)]
    n_shown = sum(1 for r in shown if r)
    n_alone = sum(1 for r in alone if r)
    if n_alone >= 2 and n_alone >= min(min_alone, n_shown):
        return CoverPlan(tuple(alone), True)
    return CoverPlan(tuple(shown), False)


def ablation_test(
    model: LoadedModel, x: torch.Tensor, masks: BoolMaps, class_index: int, *, concept: str = "", fill: Fill = "blur", draws: int = 5,
    seed: int = 0, n_boot: int = 2000, n_perm: int = 5000, batch_size: int = 64, progress: Progress | None = None,
    max_share: float = MAX_COVER_SHARE,
) -> InterventionResult:
    """Cover each image's concept mask and, ``draws`` times, a matched random mask; compare the falls in P(class).

    Images whose mask covers more than ``max_share`` of the image are left out (``left_out`` counts
    them); NotTestableError when fewer than two are left.
    """
    masks = np.asarray(masks, dtype=bool)
    _check(model, x, masks, class_index)
    keep = controllable(masks, max_share=max_share)
    left_out = int((~keep).sum())
    if left_out:
        x, masks = x[torch.from_numpy(keep)], masks[keep]
    rng = np.random.default_rng(seed)
    total = len(x) * (2 + draws)
    base = _probs(model, x, batch_size)
    source = fill_source(x, fill)
    after = _probs(model, fill_images(x, torch.from_numpy(masks), fill, source), batch_size)
    if progress:
        progress(2 * len(x), total)
    control_drop = np.zeros(len(x))
    control_flip = np.zeros(len(x))
    for d in range(draws):
        ctrl = _probs(model, fill_images(x, torch.from_numpy(matched_masks(masks, rng)), fill, source), batch_size)
        control_drop += (base[:, class_index] - ctrl[:, class_index]).numpy() / draws
        control_flip += (ctrl.argmax(1) != class_index).numpy() / draws
        if progress:
            progress((3 + d) * len(x), total)
    drop = (base[:, class_index] - after[:, class_index]).numpy().astype(np.float64)
    flip = (after.argmax(1) != class_index).numpy()
    diff = drop - control_drop
    effect, interval, p = effect_stats(diff, rng, n_boot, n_perm)
    return InterventionResult("ablation", model.classes[class_index], concept, fill, "in place", len(x), draws, float(drop.mean()), float(flip.mean()),
                              float(control_drop.mean()), float(control_flip.mean()), effect, interval, p, seed, [float(v) for v in diff], left_out)


def insertion_test(
    model: LoadedModel, targets: torch.Tensor, sources: torch.Tensor, source_masks: BoolMaps, class_index: int, *, concept: str = "",
    position: Position = "same", draws: int = 5, seed: int = 0, n_boot: int = 2000, n_perm: int = 5000, batch_size: int = 64,
    progress: Progress | None = None, max_share: float = MAX_COVER_SHARE,
) -> InterventionResult:
    """Paste a concept patch (from a random source image) into each target; compare the rise in P(class)
    with pasting a same-shaped patch cut from elsewhere in the same source, ``draws`` times each.

    Sources whose mask covers more than ``max_share`` of the image are left out (pasting them is
    pasting most of another image); NotTestableError when fewer than two are left."""
    source_masks = np.asarray(source_masks, dtype=bool)
    _check(model, sources, source_masks, class_index)
    keep = controllable(source_masks, max_share=max_share, what="pasting")
    left_out = int((~keep).sum())
    if left_out:
        sources, source_masks = sources[torch.from_numpy(keep)], source_masks[keep]
    if targets.ndim != 4 or targets.shape[1:] != sources.shape[1:] or len(targets) < 2:
        raise InvalidInputError(f"targets must be at least two images shaped like the sources {tuple(sources.shape[1:])}; got {tuple(targets.shape)}.")
    if position not in ("same", "random"):
        raise InvalidInputError(f"position must be 'same' or 'random'; got {position!r}.")
    rng = np.random.default_rng(seed)
    n, (h, w) = len(targets), model.sidecar.input_size
    total = n * (1 + 2 * draws)
    base = _probs(model, targets, batch_size)

    def pastes() -> tuple[torch.Tensor, torch.Tensor]:
        pick = rng.integers(0, len(sources), n)
        mask = source_masks[pick].copy()
        patch = sources[pick].clone()
        # The control cuts a same-shaped patch from elsewhere in the same source: the source moved so
        # that what lies under a matched mask comes to sit under the concept's own mask.
        _, offsets = matched_shifts(mask, rng)
        control_patch = torch.stack([torch.roll(patch[i], (-int(offsets[i, 0]), -int(offsets[i, 1])), dims=(1, 2)) for i in range(n)])
        if position == "random":
            for i in range(n):
                shift = (int(rng.integers(h)), int(rng.integers(w)))
                mask[i] = np.roll(mask[i], shift, axis=(0, 1))
                patch[i] = torch.roll(patch[i], shift, dims=(1, 2))
                control_patch[i] = torch.roll(control_patch[i], shift, dims=(1, 2))
        m = torch.from_numpy(mask)[:, None].to(targets.dtype)
        return targets * (1 - m) + patch * m, targets * (1 - m) + control_patch * m

    rise, flip, control_rise, control_flip = _paired_draws(model, base, class_index, draws, pastes, toward=True, batch_size=batch_size,
                                                           progress=progress, total=total)
    diff = rise - control_rise
    effect, interval, p = effect_stats(diff, rng, n_boot, n_perm)
    return InterventionResult("insertion", model.classes[class_index], concept, "paste", position, n, draws, float(rise.mean()), float(flip.mean()),
                              float(control_rise.mean()), float(control_flip.mean()), effect, interval, p, seed, [float(v) for v in diff], left_out)


def _paired_draws(model: LoadedModel, base: torch.Tensor, class_index: int, draws: int, make: Callable[[], tuple[torch.Tensor, torch.Tensor]], *,
                  toward: bool, batch_size: int, progress: Progress | None, total: int) -> tuple[npt.NDArray[np.float64], ...]:
    """Per image, averaged over ``draws`` calls of ``make`` (each gives the intervened inputs and their control):
    the change in P(class) and the share predicted as the class (``toward``: pasting, a rise) or no longer
    predicted as it (a removal, a fall), for the intervention and for its control."""
    n = len(base)
    out = np.zeros((4, n))
    for k in range(draws):
        for row, inputs in zip((0, 2), make()):
            p = _probs(model, inputs, batch_size)
            change = p[:, class_index] - base[:, class_index]
            hit = p.argmax(1) == class_index
            out[row] += (change if toward else -change).numpy() / draws
            out[row + 1] += (hit if toward else ~hit).numpy() / draws
        if progress:
            progress(n * (1 + 2 * (k + 1)), total)
    return tuple(out)


def needs_recolour(masks: BoolMaps, *, max_share: float = MAX_COVER_SHARE) -> bool:
    """Whether the policy removes a concept by recolouring rather than covering: its masks cover more than
    ``max_share`` of the image in at least half the images (the median), so most images would be left
    out of a covering test. Decided from the masks alone, before any result is seen."""
    if len(masks) == 0:
        return False
    return float(np.median(np.asarray(masks, dtype=bool).reshape(len(masks), -1).mean(axis=1))) > max_share


def grow_by_colour(x: torch.Tensor, masks: BoolMaps, *, spread: float = 3.0) -> BoolMaps:
    """Each image's mask grown to the pixels connected to it whose colour lies within ``spread`` robust
    standard deviations (1.4826 x the median absolute deviation, per channel) of the masked pixels' median
    colour: the rest of the entity an attribute's regions belong to. Saliency regions often show a few
    pieces of a green belt; recolouring only those pieces leaves the rest of the belt green, which once
    read 0.00x the true effect of a plain belt (benchmarks/intervention_truth.py). x: N x 3 x H x W."""
    masks = np.asarray(masks, dtype=bool)
    out = masks.copy()
    for i in range(len(masks)):
        if not masks[i].any():
            continue
        px = x[i][:, torch.from_numpy(masks[i])]
        centre = px.median(dim=1).values
        scale = (1.4826 * (px - centre[:, None]).abs().median(dim=1).values).clamp_min(1e-3)
        close = ((x[i] - centre[:, None, None]).abs() <= spread * scale[:, None, None]).all(dim=0).numpy()
        labels, _ = ndimage.label(close | masks[i])
        seeds = np.unique(labels[masks[i]])
        out[i] = np.isin(labels, seeds[seeds > 0])
    return out


def plain_colours(x: torch.Tensor, masks: BoolMaps) -> torch.Tensor:
    """The plain look of an entity, one colour per image (K x 3, model input space): the mean colour of
    each image's masked pixels, for the images whose mask is not empty. ``masks`` mark regions that show
    the entity without the attribute under test (the belt where it is not green)."""
    masks = np.asarray(masks, dtype=bool)
    if x.ndim != 4 or x.shape[1] != 3 or masks.shape != (x.shape[0], *x.shape[2:]):
        raise InvalidInputError(f"images must be N x 3 x H x W with one N x H x W mask each; got {tuple(x.shape)} and {masks.shape}.")
    has = np.nonzero(masks.reshape(len(masks), -1).any(axis=1))[0]
    if len(has) == 0:
        raise NotTestableError("recolouring needs regions that show the entity without the attribute (its plain look); none were given.")
    return torch.stack([x[i][:, torch.from_numpy(masks[i])].mean(dim=1) for i in has])


# A donor of the plain look is dropped when its colour would be an ordinary draw from the tested regions' own
# colours: inside their 99% ellipsoid (chi-square, 3 degrees of freedom) under a normal model fitted robustly
# (common practice for outlier screening; the level is ours).
DONOR_LEVEL = 0.99
MIN_DONOR_SCALE = 0.05  # added to the colours' spread in every direction, model input units (about 3 grey levels at std 0.25)
_TRIM = 0.975  # the reweighting step keeps the tested colours inside this chi-square quantile


def beyond_spread(donors: torch.Tensor, attribute: torch.Tensor, *, within: torch.Tensor | None = None, level: float = DONOR_LEVEL,
                  min_scale: float = MIN_DONOR_SCALE) -> torch.Tensor:
    """Which colours (K x 3) lie beyond the spread of ``attribute`` (N x 3): their squared Mahalanobis distance
    exceeds the chi-square ``level`` quantile with 3 degrees of freedom (scipy.stats.chi2); also the spread's centre.

    The spread is a full covariance, because the tested colours vary mostly along one direction (the same colour
    under brighter or dimmer light), so a per-channel spread would call a brightly lit green unlike them. It is
    fitted robustly: the median as a start, then two reweighting steps that keep the colours inside the ``_TRIM``
    quantile, with the consistency factor of a trimmed normal (Croux & Haesbroeck, 1999), plus ``min_scale``
    squared in every direction (a floor for colours that hardly vary), plus ``within`` when given (3 x 3: the
    spread of the pixels inside the tested masks, :func:`pixel_spread`). With few tested images the spread of
    their mean colours says little (three images give none at all), and a green belt's region then lies just
    beyond it; a colour inside the spread of the attribute's own pixels is a colour the attribute shows."""
    from scipy.stats import chi2

    donors = torch.as_tensor(donors, dtype=torch.float64)
    attribute = torch.as_tensor(attribute, dtype=torch.float64)
    if donors.ndim != 2 or donors.shape[1] != 3 or attribute.ndim != 2 or attribute.shape[1] != 3 or len(attribute) == 0:
        raise InvalidInputError(f"donors and attribute must be K x 3 and N x 3 colours (N >= 1); got {tuple(donors.shape)} and {tuple(attribute.shape)}.")
    if not 0 < level < 1:
        raise InvalidInputError(f"level must be in (0, 1), e.g. {DONOR_LEVEL}; got {level!r}.")
    floor = min_scale**2 * torch.eye(3, dtype=torch.float64)
    if within is not None:
        within = torch.as_tensor(within, dtype=torch.float64)
        if within.shape != (3, 3) or not torch.isfinite(within).all():
            raise InvalidInputError(f"within must be a finite 3 x 3 covariance; got {tuple(within.shape)}.")
        floor = floor + within
    cut = float(chi2.ppf(_TRIM, 3))
    consistency = _TRIM / float(chi2.cdf(cut, 5))

    def spread(points: torch.Tensor) -> torch.Tensor:
        return torch.cov(points.T) * consistency if len(points) >= 4 else torch.zeros((3, 3), dtype=torch.float64)

    def distance(points: torch.Tensor, centre: torch.Tensor, cov: torch.Tensor) -> torch.Tensor:
        d = points - centre
        inverse: torch.Tensor = torch.linalg.inv(cov + floor)
        return (d @ inverse * d).sum(dim=1)

    centre, cov = attribute.median(dim=0).values, spread(attribute) / consistency
    for _ in range(2):
        inside = attribute[distance(attribute, centre, cov) <= cut]
        if len(inside) == 0:
            break
        centre, cov = inside.mean(dim=0), spread(inside)
    outside: torch.Tensor = distance(donors, centre, cov) > float(chi2.ppf(level, 3))
    return outside


def pixel_spread(x: torch.Tensor, masks: BoolMaps) -> torch.Tensor:
    """The pooled covariance (3 x 3, model input space) of the pixels under each image's mask about that image's
    own mean colour: how much the attribute's colour varies within a region (noise, texture, seams)."""
    masks = np.asarray(masks, dtype=bool)
    parts = [x[i][:, torch.from_numpy(masks[i])].double() for i in range(len(x)) if masks[i].any()]
    if not parts:
        return torch.zeros((3, 3), dtype=torch.float64)
    centred = torch.cat([p - p.mean(dim=1, keepdim=True) for p in parts], dim=1)
    spread: torch.Tensor = centred @ centred.T / max(1, centred.shape[1] - len(parts))
    return spread


def unlike_attribute(donors: torch.Tensor, attribute: torch.Tensor, *, within: torch.Tensor | None = None, level: float = DONOR_LEVEL,
                     min_scale: float = MIN_DONOR_SCALE) -> npt.NDArray[np.bool_]:
    """Which plain-look donors (K x 3 colours, model input space) can stand for the entity without the attribute,
    judged by colour against the regions under test (``attribute``, N x 3: each tested image's mean colour under
    its masks).

    Donors are regions that show the entity without the attribute in their label, but a label can leave an
    attribute out: a grouped label "belt" over a crop of a green belt names no colour. Such a donor moves the
    tested pixels to another green, which is what the sham does, so it pulls the estimate toward zero (on the
    belt demo with grouped labelling, 19 of 21 bare "belt" donors were green and the estimate read 0.03x the
    truth). A donor is kept when both hold:

    - it lies beyond the tested colours' spread (:func:`beyond_spread`, chi-square ``level``; ``within``: the
      spread of the tested pixels, :func:`pixel_spread`, added to that of the images' mean colours);
    - it is nearer the plain look than the tested colours' centre. The spread is narrow across its main
      direction, so a green belt's region that holds a piece of the object lies beyond it yet is still green.
      The plain look is the median of the donors kept, found by alternating (two means, one of them fixed at
      the attribute's centre).
    """
    donors = torch.as_tensor(donors, dtype=torch.float64)
    outside = beyond_spread(donors, attribute, within=within, level=level, min_scale=min_scale)
    centre = torch.as_tensor(attribute, dtype=torch.float64).median(dim=0).values
    nearer = outside.clone()
    for _ in range(20):
        if not nearer.any():
            break
        plain = donors[nearer].median(dim=0).values
        again = outside & ((donors - plain).norm(dim=1) < (donors - centre).norm(dim=1))
        if torch.equal(again, nearer):
            break
        nearer = again
    keep: npt.NDArray[np.bool_] = nearer.numpy()
    return keep


@dataclass(frozen=True)
class RemovalPlan:
    """How the default policy removes a concept, decided from the masks alone before any result is seen.

    ``test``: "recolour" (an attribute of an entity whose masks, grown by colour to the rest of the entity,
    cover more than MAX_COVER_SHARE of the image in at least half the images) or "cover" (each fill of the
    policy on the masks as they are). ``masks``: the masks that test uses. ``grown``: the masks grown by
    colour (the masks themselves for a concept that is not an attribute). ``why_not_recolour``: for a
    covering plan whose masks cover most of each image, why recolouring cannot stand in ("" otherwise).
    """

    test: Literal["cover", "recolour"]
    masks: BoolMaps
    grown: BoolMaps
    why_not_recolour: str = ""


def plan_removal(x: torch.Tensor, masks: BoolMaps, concepts: Sequence[str], *, families: Mapping[str, str]) -> RemovalPlan:
    """The default policy for removing ``concepts`` from the images x (N x 3 x H x W) with masks (N x H x W).

    An attribute of an entity (one concept that refines an entity in ``families``, such as "green belt" of
    "belt") spans the entity, not only the salient pieces labelled: its masks are grown by colour
    (:func:`grow_by_colour`) before the policy looks at how much of the image they cover. Where they cover
    most of each image (:func:`needs_recolour`), covering has no room for a matched control and the
    attribute is recoloured to the entity's plain look; otherwise the concept is covered. The app and the
    ground-truth benchmark both run this."""
    masks = np.asarray(masks, dtype=bool)
    attribute = len(concepts) == 1 and concepts[0] in families
    grown = grow_by_colour(x, masks) if attribute else masks
    if not needs_recolour(grown):
        return RemovalPlan("cover", masks, grown)
    if attribute:
        return RemovalPlan("recolour", grown, grown)
    return RemovalPlan("cover", masks, grown, "recolouring needs one concept that is an attribute of an entity (label it '<entity>: <attribute>')")


def recolour_images(x: torch.Tensor, masks: torch.Tensor, shifts: torch.Tensor, low: torch.Tensor, high: torch.Tensor) -> torch.Tensor:
    """Add ``shifts`` (N x 3) to the masked pixels (masks N x H x W) of normalised images x (N x 3 x H x W),
    kept inside the valid input range [low, high] per channel (3 values each)."""
    m = masks[:, None].to(x.dtype)
    moved = torch.maximum(torch.minimum(x + shifts[:, :, None, None], high[None, :, None, None]), low[None, :, None, None])
    return x * (1 - m) + moved * m


Sham = Literal["attribute", "matched"]
SHAMS: tuple[Sham, ...] = ("attribute", "matched")


def brightness_shams(own: torch.Tensor, removal: torch.Tensor, signs: torch.Tensor, mean: torch.Tensor, std: torch.Tensor) -> torch.Tensor:
    """Sham shifts (N x 3, model input space) the same size as the removal's shifts in pixel space, along each image's
    own colour: the masked pixels made brighter (sign +1) or darker (-1) by as much as the removal moves them, hue kept.
    ``own``: each image's mean masked colour; ``removal``: the removal's shifts; both model input space."""
    colour = own * std + mean  # pixel space, 0..1
    size = (removal * std).norm(dim=1, keepdim=True)
    norm = colour.norm(dim=1, keepdim=True)
    direction = torch.where(norm > 1e-6, colour / norm.clamp_min(1e-6), torch.full_like(colour, 3 ** -0.5))
    shifts: torch.Tensor = signs[:, None] * size * direction / std
    return shifts


def recolour_test(
    model: LoadedModel, x: torch.Tensor, masks: BoolMaps, class_index: int, *, plain: torch.Tensor, concept: str = "", draws: int = 5,
    seed: int = 0, n_boot: int = 2000, n_perm: int = 5000, batch_size: int = 64, progress: Progress | None = None, sham: Sham = "attribute",
) -> InterventionResult:
    """Remove an attribute by recolouring, against a matched sham recolouring that keeps it.

    Each draw moves every image's masked pixels, texture kept (one colour vector added to all of them,
    clipped to the valid input range), from their own mean colour to a donor's colour:

    - removal: the donor is a random image of the entity's plain look (``plain``, K x 3, from
      :func:`plain_colours`: the belt where it is not green), so "green belt" becomes a plain belt with
      the same seams and noise;
    - control: the donor is another random image carrying the attribute (another of ``x``'s masked
      regions), so the pixels are recoloured the same way (same pixels, same texture, a donor drawn the
      same way, each image's own lighting replaced by the donor's) but the attribute stays.

    Only the donor's attribute differs between the two, which is what makes the sham a control: what
    recolouring does by itself is taken out, and the effect is what losing the attribute adds. This sham
    moves the pixels less than the removal does (another image's green is near this image's green).
    ``sham="matched"`` moves them exactly as far as the removal, in pixel space, along the image's own
    colour (brighter or darker at random, :func:`brightness_shams`): hue kept, so a hue attribute ("green")
    stays, but an attribute that is a brightness ("white", "dark") would be lost by it, which is why the
    default keeps the attribute-donor sham; the ground-truth benchmark sets both beside the truth. The
    effect is the mean per-image (fall - control fall), averaged over ``draws`` donors, with a bootstrap
    interval and a one-sided sign-flip permutation p (:func:`effect_stats`). Unlike covering, the mask
    may cover most of the image: nothing is moved elsewhere.
    """
    masks = np.asarray(masks, dtype=bool)
    _check(model, x, masks, class_index)
    plain = torch.as_tensor(plain, dtype=x.dtype)
    if plain.ndim != 2 or plain.shape[1] != 3 or len(plain) == 0 or not torch.isfinite(plain).all():
        raise InvalidInputError(f"plain must be K x 3 finite colours in model input space (K >= 1); got {tuple(plain.shape)}.")
    if draws < 1:
        raise InvalidInputError(f"draws must be at least 1; got {draws}.")
    if sham not in SHAMS:
        raise InvalidInputError(f"sham must be one of {', '.join(SHAMS)}; got {sham!r}.")
    mean = torch.tensor(model.sidecar.mean, dtype=x.dtype)
    std = torch.tensor(model.sidecar.std, dtype=x.dtype)
    low, high = (0 - mean) / std, (1 - mean) / std
    rng = np.random.default_rng(seed)
    n = len(x)
    m = torch.from_numpy(masks)
    own = torch.stack([x[i][:, m[i]].mean(dim=1) for i in range(n)])
    total = n * (1 + 2 * draws)
    base = _probs(model, x, batch_size)

    def recolourings() -> tuple[torch.Tensor, torch.Tensor]:
        donor_plain = plain[torch.from_numpy(rng.integers(0, len(plain), n))]
        donor_same = own[torch.from_numpy((np.arange(n) + rng.integers(1, n, n)) % n)]  # another image with the attribute
        if sham == "matched":
            signs = torch.from_numpy(rng.choice([-1.0, 1.0], size=n)).to(x.dtype)
            sham_shift = brightness_shams(own, donor_plain - own, signs, mean, std)
        else:
            sham_shift = donor_same - own
        return recolour_images(x, m, donor_plain - own, low, high), recolour_images(x, m, sham_shift, low, high)

    drop, flip, control_drop, control_flip = _paired_draws(model, base, class_index, draws, recolourings, toward=False, batch_size=batch_size,
                                                           progress=progress, total=total)
    diff = drop - control_drop
    effect, interval, p = effect_stats(diff, rng, n_boot, n_perm)
    return InterventionResult("ablation", model.classes[class_index], concept, RECOLOUR, "in place", n, draws, float(drop.mean()), float(flip.mean()),
                              float(control_drop.mean()), float(control_flip.mean()), effect, interval, p, seed, [float(v) for v in diff], 0)


def deletion_curve(model: LoadedModel, x: torch.Tensor, maps: npt.NDArray[np.floating], class_index: npt.ArrayLike, *, steps: int = 10,
                   order: Literal["saliency", "random"] = "saliency", fill: Fill = "mean", seed: int = 0, batch_size: int = 64) -> npt.NDArray[np.float64]:
    """Petsiuk et al. (2018): the class probability as ever more pixels are removed (step 0 = none, last = all),
    most salient first or in random order; returns steps + 1 values averaged over images."""
    maps = np.asarray(maps, dtype=np.float64)
    classes = np.asarray(class_index, dtype=np.int64)
    n, h, w = maps.shape
    rng = np.random.default_rng(seed)
    rank = np.empty((n, h * w), dtype=np.int64)
    for i in range(n):
        key = -maps[i].ravel() if order == "saliency" else rng.random(h * w)
        rank[i, np.argsort(key, kind="stable")] = np.arange(h * w)
    curve = []
    source = fill_source(x, fill)
    for k in range(steps + 1):
        removed = torch.from_numpy((rank < round(k * h * w / steps)).reshape(n, h, w))
        p = _probs(model, fill_images(x, removed, fill, source), batch_size)
        curve.append(float(p[torch.arange(n), torch.from_numpy(classes)].mean()))
    return np.array(curve)
