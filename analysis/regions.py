"""Turn a saliency map into its top regions: threshold, connected components, crops."""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Literal

import numpy as np
import numpy.typing as npt
from PIL import Image, ImageDraw
from scipy import ndimage

from .errors import InvalidInputError

PolicyName = Literal["fraction_of_max", "mass"]
OUTLINE_COLOUR = (255, 0, 170)
_EIGHT = np.ones((3, 3), dtype=int)  # 8-connectivity


@dataclass(frozen=True)
class ThresholdPolicy:
    """How salient pixels are chosen; recorded with every run.

    ``fraction_of_max``: pixels at or above ``value`` x the map's maximum.
    ``mass``: the fewest highest pixels that together hold ``value`` of the map's total.
    """

    name: PolicyName = "fraction_of_max"
    value: float = 0.5

    def __post_init__(self) -> None:
        if self.name not in ("fraction_of_max", "mass"):
            raise InvalidInputError(f"threshold policy must be 'fraction_of_max' or 'mass'; got {self.name!r}.")
        if not 0 < self.value <= 1:
            raise InvalidInputError(f"threshold policy value must be in (0, 1]; got {self.value}. E.g. 0.5.")

    def to_json(self) -> dict[str, object]:
        return {"policy": self.name, "value": self.value}


@dataclass(frozen=True)
class Region:
    """A connected salient area in model-input pixels; box is [x0, x1) x [y0, y1)."""

    rank: int  # 0 = most saliency mass
    x0: int
    y0: int
    x1: int
    y1: int
    area: int  # pixels in the component
    mass_share: float  # share of the whole map's saliency inside the component
    peak_x: int
    peak_y: int

    def to_json(self) -> dict[str, object]:
        return asdict(self)


def threshold_mask(saliency: npt.NDArray[np.float32], policy: ThresholdPolicy) -> npt.NDArray[np.bool_]:
    """Boolean mask of the salient pixels of one H x W map under ``policy``."""
    peak = float(saliency.max())
    if peak <= 0:
        return np.zeros(saliency.shape, dtype=bool)
    if policy.name == "fraction_of_max":
        return saliency >= policy.value * peak
    flat = np.sort(saliency.ravel())[::-1]
    cumulative = np.cumsum(flat, dtype=np.float64)
    k = int(np.searchsorted(cumulative, policy.value * cumulative[-1]))
    cut = flat[min(k, flat.size - 1)]
    inside: npt.NDArray[np.bool_] = saliency >= cut
    return inside


def extract_regions(
    saliency: npt.NDArray[np.float32],
    *,
    policy: ThresholdPolicy = ThresholdPolicy(),
    max_regions: int = 3,
    min_area: int = 4,
) -> tuple[list[Region], npt.NDArray[np.int32]]:
    """Top connected components (8-connected) of one map, by saliency mass.

    Returns the regions, best first, and an H x W label image where pixel value r + 1
    marks region rank r (0 elsewhere). An all-zero map gives no regions.
    """
    if saliency.ndim != 2:
        raise InvalidInputError(f"saliency must be one H x W map; got shape {saliency.shape}.")
    if max_regions < 1:
        raise InvalidInputError(f"max_regions must be at least 1; got {max_regions}.")
    mask = threshold_mask(saliency, policy)
    labels = np.zeros(saliency.shape, dtype=np.int32)
    total = float(saliency.sum(dtype=np.float64))
    if total <= 0 or not mask.any():
        return [], labels
    components, n = ndimage.label(mask, structure=_EIGHT)
    flat = components.ravel()
    masses = np.bincount(flat, weights=saliency.ravel(), minlength=n + 1)[1:]
    areas = np.bincount(flat, minlength=n + 1)[1:]
    order = [i for i in np.argsort(-masses, kind="stable") if areas[i] >= min_area][:max_regions]
    slices = ndimage.find_objects(components)
    regions = []
    for rank, i in enumerate(order):
        sl = slices[i]
        comp = components[sl] == i + 1  # only within the component's box
        local = np.unravel_index(int(np.argmax(np.where(comp, saliency[sl], -1.0))), comp.shape)
        labels[sl][comp] = rank + 1
        regions.append(
            Region(
                rank=rank,
                x0=int(sl[1].start),
                y0=int(sl[0].start),
                x1=int(sl[1].stop),
                y1=int(sl[0].stop),
                area=int(areas[i]),
                mass_share=float(masses[i] / total),
                peak_x=int(sl[1].start + local[1]),
                peak_y=int(sl[0].start + local[0]),
            )
        )
    return regions, labels


_EIGHT_PER_MAP = np.zeros((3, 3, 3), dtype=int)
_EIGHT_PER_MAP[1] = 1  # 8-connected within a map, never across maps of a stack


def threshold_masks(maps: npt.NDArray[np.float32], policy: ThresholdPolicy) -> npt.NDArray[np.bool_]:
    """:func:`threshold_mask` of each map of an N x H x W stack, pixel for pixel the same."""
    if policy.name != "fraction_of_max":
        return np.stack([threshold_mask(m, policy) for m in maps]) if len(maps) else np.zeros(maps.shape, dtype=bool)
    peaks = maps.reshape(len(maps), -1).max(axis=1) if maps.size else np.zeros(len(maps), maps.dtype)
    # The cut as the one-map path makes it: value x peak in float64, compared in the map's dtype.
    cuts = (policy.value * peaks.astype(np.float64)).astype(maps.dtype)
    masks: npt.NDArray[np.bool_] = maps >= cuts[:, None, None]
    masks[peaks <= 0] = False
    return masks


def extract_regions_batch(
    maps: npt.NDArray[np.float32],
    *,
    policy: ThresholdPolicy = ThresholdPolicy(),
    max_regions: int = 3,
    min_area: int = 4,
) -> tuple[list[list[Region]], npt.NDArray[np.uint8]]:
    """:func:`extract_regions` of every map of an N x H x W stack at once, with the same regions and labels.

    One labelling of the whole stack (8-connected within each map, never across maps) and one
    count of every component's mass and area replace N of each, which is what a saliency job
    spends its region time on. Returns each map's regions, best first, and the N x H x W uint8
    label stack (r + 1 where region rank r is, 0 elsewhere). ``max_regions`` must be below 255.
    """
    if maps.ndim != 3:
        raise InvalidInputError(f"maps must be an N x H x W stack; got shape {maps.shape}.")
    if not 1 <= max_regions < 255:
        raise InvalidInputError(f"max_regions must be in 1..254 for a stack of maps; got {max_regions}.")
    n = len(maps)
    out_labels = np.zeros(maps.shape, dtype=np.uint8)
    found: list[list[Region]] = [[] for _ in range(n)]
    if n == 0:
        return found, out_labels
    masks = threshold_masks(maps, policy)
    if maps.flags.c_contiguous:  # each row summed pairwise in float64 as one contiguous map's sum is: the same totals
        totals = maps.reshape(n, -1).sum(axis=1, dtype=np.float64)
    else:
        totals = np.array([float(m.sum(dtype=np.float64)) for m in maps])  # per map, as the one-map path sums
    masks[totals <= 0] = False
    if not masks.any():
        return found, out_labels
    components = np.empty(maps.shape, dtype=np.intp)  # the index type, so counting below needs no converted copy
    count = int(ndimage.label(masks, structure=_EIGHT_PER_MAP, output=components))
    inside = masks.ravel()  # only masked pixels belong to a component: count those (the same sums, in the same order)
    flat = components.ravel()[inside]
    masses = np.bincount(flat, weights=maps.ravel()[inside], minlength=count + 1)[1:]
    areas = np.bincount(flat, minlength=count + 1)[1:]
    slices = ndimage.find_objects(components)
    owner = np.fromiter((sl[0].start for sl in slices), dtype=np.int64, count=count)  # the map each component is in
    big = np.flatnonzero(areas >= min_area)
    # Within each map, by mass, ties in component order (raster order within the map, as one map's labelling numbers them).
    order = big[np.lexsort((-masses[big], owner[big]))]
    lut = np.zeros(count + 1, dtype=np.uint8)
    rank_in_map = 0
    last = -1
    for i in order.tolist():
        k = int(owner[i])
        rank_in_map = rank_in_map + 1 if k == last else 0
        last = k
        if rank_in_map >= max_regions:
            continue
        sl = slices[i]
        ys, xs = sl[1], sl[2]
        comp = components[k, ys, xs] == i + 1
        local = np.unravel_index(int(np.argmax(np.where(comp, maps[k, ys, xs], -1.0))), comp.shape)
        lut[i + 1] = rank_in_map + 1
        found[k].append(Region(
            rank=rank_in_map, x0=int(xs.start), y0=int(ys.start), x1=int(xs.stop), y1=int(ys.stop), area=int(areas[i]),
            mass_share=float(masses[i] / totals[k]), peak_x=int(xs.start + local[1]), peak_y=int(ys.start + local[0]),
        ))
    out_labels = lut[components]
    return found, out_labels


def scaled_box(region: Region, *, map_size: tuple[int, int], image_size: tuple[int, int], margin: float) -> tuple[int, int, int, int]:
    """The region's box in the original image's pixels, grown by ``margin`` of its size on each side.

    ``map_size`` is (height, width) of the saliency map; ``image_size`` is (width, height), as Pillow gives it.
    """
    mh, mw = map_size
    iw, ih = image_size
    sx, sy = iw / mw, ih / mh
    bw, bh = region.x1 - region.x0, region.y1 - region.y0
    pad_x = max(2.0, margin * bw) if margin > 0 else 0.0
    pad_y = max(2.0, margin * bh) if margin > 0 else 0.0
    x0 = max(0, int(np.floor((region.x0 - pad_x) * sx)))
    y0 = max(0, int(np.floor((region.y0 - pad_y) * sy)))
    x1 = min(iw, int(np.ceil((region.x1 + pad_x) * sx)))
    y1 = min(ih, int(np.ceil((region.y1 + pad_y) * sy)))
    return x0, y0, x1, y1


def crop_region(image: Image.Image, region: Region, *, map_size: tuple[int, int], margin: float = 0.25) -> Image.Image:
    """The region cut from the original image with a margin around it."""
    return image.crop(scaled_box(region, map_size=map_size, image_size=image.size, margin=margin))


def outline_region(image: Image.Image, region: Region, *, map_size: tuple[int, int], min_side: int = 256) -> Image.Image:
    """The full image (enlarged to at least ``min_side``) with the region's box drawn on it."""
    scale = max(1, int(np.ceil(min_side / max(1, min(image.size)))))
    big = image.convert("RGB").resize((image.width * scale, image.height * scale), Image.Resampling.NEAREST)
    x0, y0, x1, y1 = scaled_box(region, map_size=map_size, image_size=image.size, margin=0.0)
    draw = ImageDraw.Draw(big)
    width = max(2, scale // 2)
    draw.rectangle([x0 * scale, y0 * scale, x1 * scale - 1, y1 * scale - 1], outline=OUTLINE_COLOUR, width=width)
    return big


def saliency_overlay(image: Image.Image, saliency: npt.NDArray[np.floating], region: Region | None = None, *, min_side: int = 256) -> Image.Image:
    """The image with its saliency map laid over it as heat (red to yellow, stronger where higher),
    enlarged to at least ``min_side``, and the region's box drawn when one is given."""
    if saliency.ndim != 2:
        raise InvalidInputError(f"saliency must be one H x W map; got shape {saliency.shape}.")
    rgb = image.convert("RGB")
    peak = float(np.max(saliency))
    norm = np.clip(np.asarray(saliency, dtype=np.float32) / peak, 0, 1) if peak > 0 else np.zeros(saliency.shape, np.float32)
    heat = np.asarray(Image.fromarray((norm * 255).astype(np.uint8), "L").resize(rgb.size, Image.Resampling.BILINEAR), dtype=np.float32) / 255.0
    colour = np.stack([np.full_like(heat, 255.0), 255.0 * heat, np.zeros_like(heat)], axis=-1)
    alpha = (0.65 * heat)[..., None]
    blended = Image.fromarray((np.asarray(rgb, dtype=np.float32) * (1 - alpha) + colour * alpha).astype(np.uint8), "RGB")
    scale = max(1, int(np.ceil(min_side / max(1, min(blended.size)))))
    big = blended.resize((blended.width * scale, blended.height * scale), Image.Resampling.NEAREST)
    if region is not None:
        x0, y0, x1, y1 = scaled_box(region, map_size=saliency.shape, image_size=rgb.size, margin=0.0)
        ImageDraw.Draw(big).rectangle([x0 * scale, y0 * scale, x1 * scale - 1, y1 * scale - 1], outline=OUTLINE_COLOUR, width=max(2, scale // 2))
    return big
