"""Checks of saliency maps against known truth: the pointing game (Zhang et al., 2016)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import ndimage

from .errors import InvalidInputError


@dataclass(frozen=True)
class PointingGame:
    hits: npt.NDArray[np.bool_]  # (N,) the map's maximum lies on the object (within the tolerance)
    chance: npt.NDArray[np.float64]  # (N,) share of the image a random point would hit

    @property
    def hit_rate(self) -> float:
        return float(self.hits.mean()) if len(self.hits) else float("nan")

    @property
    def chance_rate(self) -> float:
        return float(self.chance.mean()) if len(self.chance) else float("nan")


def pointing_game(maps: npt.NDArray[np.floating], masks: npt.NDArray[np.bool_], *, tolerance: int = 2) -> PointingGame:
    """Zhang et al. (2016): a hit when the map's maximum falls on the annotated object, dilated by ``tolerance`` pixels.

    Parameters
    ----------
    maps, masks
        N x H x W saliency maps and object masks of the same size.
    """
    maps, masks = np.asarray(maps), np.asarray(masks, dtype=bool)
    if maps.shape != masks.shape or maps.ndim != 3:
        raise InvalidInputError(f"maps and masks must both be N x H x W; got {maps.shape} and {masks.shape}.")
    hits, chance = [], []
    for m, mask in zip(maps, masks):
        near = ndimage.binary_dilation(mask, iterations=tolerance) if tolerance > 0 else mask
        y, x = np.unravel_index(int(np.argmax(m)), m.shape)
        hits.append(bool(near[y, x]))
        chance.append(float(near.mean()))
    return PointingGame(np.array(hits, dtype=bool), np.array(chance))
