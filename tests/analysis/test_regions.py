from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from analysis.errors import InvalidInputError
from analysis.regions import ThresholdPolicy, extract_regions, threshold_mask


def test_regions_are_components_ranked_by_mass() -> None:
    sal = np.zeros((20, 20), dtype=np.float32)
    sal[2:5, 2:5] = 1.0  # 9 px, mass 9
    sal[10:16, 10:16] = 0.8  # 36 px, mass 28.8
    sal[0, 19] = 0.9  # 1 px: below min_area
    regions, labels = extract_regions(sal, policy=ThresholdPolicy("fraction_of_max", 0.5), max_regions=3, min_area=4)
    assert [(r.x0, r.y0, r.x1, r.y1) for r in regions] == [(10, 10, 16, 16), (2, 2, 5, 5)]
    total = sal.sum()
    assert regions[0].mass_share == pytest.approx(28.8 / total)
    assert regions[1].mass_share == pytest.approx(9 / total)
    assert (labels == 1).sum() == 36 and (labels == 2).sum() == 9


def test_component_count_matches_scipy_and_k_limits() -> None:
    rng = np.random.default_rng(0)
    sal = ndimage.gaussian_filter(rng.random((64, 64)), 2).astype(np.float32)
    mask = threshold_mask(sal, ThresholdPolicy("fraction_of_max", 0.7))
    n = ndimage.label(mask, structure=np.ones((3, 3)))[1]
    regions, _ = extract_regions(sal, policy=ThresholdPolicy("fraction_of_max", 0.7), max_regions=100, min_area=1)
    assert len(regions) == n
    assert len(extract_regions(sal, policy=ThresholdPolicy("fraction_of_max", 0.7), max_regions=2, min_area=1)[0]) == min(2, n)
    assert sum(r.mass_share for r in regions) <= 1 + 1e-9


def test_mass_policy_holds_the_asked_share() -> None:
    sal = np.arange(100, dtype=np.float32).reshape(10, 10)
    mask = threshold_mask(sal, ThresholdPolicy("mass", 0.5))
    assert sal[mask].sum() >= 0.5 * sal.sum()
    assert sal[mask].sum() - sal[mask].min() < 0.5 * sal.sum()  # the fewest pixels


def test_empty_map_gives_no_regions_and_bad_policy_errors() -> None:
    assert extract_regions(np.zeros((8, 8), dtype=np.float32))[0] == []
    with pytest.raises(InvalidInputError, match="value"):
        ThresholdPolicy("fraction_of_max", 1.5)
