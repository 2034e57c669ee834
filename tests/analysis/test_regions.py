from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from analysis.errors import InvalidInputError
from analysis.regions import ThresholdPolicy, extract_regions, extract_regions_batch, threshold_mask


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


def _stack_of_maps(seed: int) -> np.ndarray:
    """Smooth random maps (as upsampled Grad-CAM is), flat plateaus (ties), all-zero and single-pixel maps."""
    rng = np.random.default_rng(seed)
    maps = [ndimage.gaussian_filter(rng.random((48, 40)), s).astype(np.float32) for s in (1, 2, 3, 1.5) * 6]
    plateau = np.zeros((48, 40), np.float32)
    plateau[5:9, 5:9] = 1.0  # two equal-mass components: the tie goes to the first in raster order
    plateau[30:34, 20:24] = 1.0
    plateau[40, 2] = 1.0  # below min_area
    dot = np.zeros((48, 40), np.float32)
    dot[10, 10] = 0.25
    maps += [np.zeros((48, 40), np.float32), plateau, dot, np.maximum(maps[0] - 0.5, 0).astype(np.float32)]
    return np.stack(maps)


@pytest.mark.parametrize("policy", [ThresholdPolicy("fraction_of_max", 0.5), ThresholdPolicy("fraction_of_max", 0.3),
                                    ThresholdPolicy("fraction_of_max", 0.7), ThresholdPolicy("mass", 0.4)])
@pytest.mark.parametrize(("max_regions", "min_area"), [(3, 4), (1, 1), (100, 1), (5, 9)])
def test_a_stack_gives_each_map_the_same_regions_and_labels_as_one_map_at_a_time(policy: ThresholdPolicy, max_regions: int, min_area: int) -> None:
    maps = _stack_of_maps(7)
    regions, labels = extract_regions_batch(maps, policy=policy, max_regions=max_regions, min_area=min_area)
    assert labels.dtype == np.uint8 and labels.shape == maps.shape
    for k, m in enumerate(maps):
        one, lab = extract_regions(m, policy=policy, max_regions=max_regions, min_area=min_area)
        assert regions[k] == one  # every field, mass share to the last bit
        np.testing.assert_array_equal(labels[k], lab)
    assert sum(len(r) > 0 for r in regions) >= 20  # not degenerate: most maps have regions


@pytest.mark.parametrize("dtype", [np.float32, np.float16, np.float64])
@pytest.mark.parametrize("layout", ["contiguous", "strided", "fortran"])
def test_large_stacks_in_any_layout_give_each_map_the_one_map_regions_to_the_last_bit(dtype: type, layout: str) -> None:
    # Maps of 224 x 224 (more pixels than numpy sums in one buffered chunk) and views that are not contiguous: the per-map
    # totals, and so every mass share, must equal the one-map path's.
    rng = np.random.default_rng(3)
    maps = np.stack([ndimage.gaussian_filter(rng.random((224, 230)), 4) ** 3 for _ in range(4)]).astype(dtype)
    if layout == "strided":
        maps = maps[:, :, ::2][::-1]
    elif layout == "fortran":
        maps = np.asfortranarray(maps)
    regions, labels = extract_regions_batch(maps, max_regions=3, min_area=4)
    for k, m in enumerate(maps):
        one, lab = extract_regions(m, max_regions=3, min_area=4)
        assert regions[k] == one
        np.testing.assert_array_equal(labels[k], lab)
    assert all(regions)


def test_a_stack_never_joins_components_across_maps() -> None:
    maps = np.ones((3, 6, 6), np.float32)  # the same full square in every map: one component each, not one in all
    regions, labels = extract_regions_batch(maps, max_regions=3, min_area=1)
    assert [len(r) for r in regions] == [1, 1, 1]
    assert all(r[0].area == 36 and r[0].mass_share == 1.0 for r in regions)
    assert (labels == 1).all()


def test_an_empty_stack_and_bad_shapes() -> None:
    regions, labels = extract_regions_batch(np.zeros((0, 4, 4), np.float32))
    assert regions == [] and labels.shape == (0, 4, 4)
    with pytest.raises(InvalidInputError, match="N x H x W"):
        extract_regions_batch(np.zeros((4, 4), np.float32))
