"""Interventions on a model whose reliance is known by construction: it reads only one corner."""

from __future__ import annotations

import numpy as np
import pytest
import torch
from torch import nn

from analysis.errors import InvalidInputError
from analysis.interventions import (
    FILLS,
    NotTestableError,
    ablation_test,
    controllable,
    deletion_curve,
    fill_images,
    insertion_test,
    matched_masks,
    plan_regions,
)
from analysis.model_io import Sidecar, prepare_model

SIDECAR = Sidecar(classes=("corner", "other"), input_size=(32, 32), mean=(0.0, 0.0, 0.0), std=(1.0, 1.0, 1.0), target_layer="features")


class Corner(nn.Module):
    """P(corner) rises with how bright the top-left 8 x 8 corner is; nothing else matters."""

    def __init__(self) -> None:
        super().__init__()
        self.features = nn.Identity()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        f = self.features(x)
        corner = f[:, :, :8, :8].mean(dim=(1, 2, 3))
        return torch.stack([4 * corner - 1, torch.zeros_like(corner)], dim=1)


def _data(n: int = 40, seed: int = 0) -> tuple[torch.Tensor, np.ndarray, np.ndarray]:
    g = torch.Generator().manual_seed(seed)
    x = torch.randn(n, 3, 32, 32, generator=g) * 0.2
    x[:, :, :8, :8] += 1.0  # a bright corner: the model says "corner"
    corner = np.zeros((n, 32, 32), dtype=bool)
    corner[:, :8, :8] = True
    elsewhere = np.zeros((n, 32, 32), dtype=bool)
    elsewhere[:, 20:28, 20:28] = True  # same shape, a place the model ignores
    return x, corner, elsewhere


@pytest.fixture(scope="module")
def model():  # type: ignore[no-untyped-def]
    return prepare_model(Corner(), SIDECAR)


def test_matched_masks_keep_shape_and_pixel_count_and_are_seeded() -> None:
    _, corner, _ = _data()
    rng_masks = [matched_masks(corner, np.random.default_rng(s)) for s in (1, 1, 2)]
    for m in rng_masks:
        assert (m.reshape(len(m), -1).sum(1) == corner.reshape(len(corner), -1).sum(1)).all()
        assert ((m & corner).reshape(len(m), -1).sum(1) <= 0.1 * 64).all()  # moved off the concept
    np.testing.assert_array_equal(rng_masks[0], rng_masks[1])
    assert not np.array_equal(rng_masks[0], rng_masks[2])


@pytest.mark.parametrize("fill", FILLS)
def test_fills_touch_only_masked_pixels(fill: str) -> None:
    x, corner, _ = _data(4)
    out = fill_images(x, torch.from_numpy(corner), fill)  # type: ignore[arg-type]
    keep = ~torch.from_numpy(corner)[:, None].expand_as(x)
    torch.testing.assert_close(out[keep], x[keep])
    assert not torch.allclose(out[~keep], x[~keep])


def test_ring_fill_restores_a_flat_surrounding_exactly() -> None:
    x = torch.zeros(2, 3, 32, 32)
    x[0, :] = torch.tensor([0.3, -0.2, 0.5])[:, None, None]  # one flat colour around a bright square
    x[1, :, :, :16] = 0.7
    x[1, :, :, 16:] = -0.7  # two halves: each part takes its own surroundings' colour
    masks = torch.zeros(2, 32, 32, dtype=torch.bool)
    masks[0, 10:16, 10:16] = True
    masks[1, 4:8, 2:6] = True
    masks[1, 20:24, 24:28] = True
    covered = x.clone()
    covered[masks[:, None].expand_as(x)] = 5.0
    torch.testing.assert_close(fill_images(covered, masks, "ring"), x)


def test_ablating_what_the_model_reads_is_an_effect_and_elsewhere_is_not(model) -> None:  # type: ignore[no-untyped-def]
    x, corner, elsewhere = _data()
    real = ablation_test(model, x, corner, 0, concept="corner", fill="mean", seed=3)
    assert real.mean_change > 0.3 and real.control_mean_change < 0.05 and real.p_value < 0.001 and real.interval[0] > 0.2
    assert real.flip_rate == 1.0
    null = ablation_test(model, x, elsewhere, 0, concept="elsewhere", fill="mean", seed=3)
    assert abs(null.effect) < 0.05 and null.p_value > 0.05
    again = ablation_test(model, x, corner, 0, concept="corner", fill="mean", seed=3)
    assert again.per_image == real.per_image  # seeded


def test_pasting_what_the_model_reads_steers_it(model) -> None:  # type: ignore[no-untyped-def]
    x, corner, elsewhere = _data()
    targets = torch.randn(30, 3, 32, 32, generator=torch.Generator().manual_seed(9)) * 0.2 - 0.5  # dark corners: "other"
    same = insertion_test(model, targets, x, corner, 0, concept="corner", position="same", seed=4)
    assert same.effect > 0.3 and same.p_value < 0.001 and same.flip_rate > 0.9
    moved = insertion_test(model, targets, x, corner, 0, concept="corner", position="random", seed=4)
    assert moved.effect < same.effect  # pasted elsewhere, the corner no longer lands where the model looks
    with pytest.raises(InvalidInputError, match="non-empty"):
        ablation_test(model, x, np.zeros_like(corner), 0)


def test_deletion_of_salient_pixels_first_drops_faster_than_random(model) -> None:  # type: ignore[no-untyped-def]
    # Petsiuk et al. (2018): with a map that is high on the corner, deleting in saliency order lowers
    # the score sooner (smaller area under the curve) than deleting in random order.
    x, corner, _ = _data(20)
    maps = corner.astype(float) + 0.01 * np.random.default_rng(0).random(corner.shape)
    by_map = deletion_curve(model, x, maps, np.zeros(20, dtype=int), steps=8)
    by_chance = deletion_curve(model, x, maps, np.zeros(20, dtype=int), steps=8, order="random")
    assert by_map[0] == pytest.approx(by_chance[0]) and np.trapezoid(by_map) < np.trapezoid(by_chance) - 0.5


def test_a_mask_over_most_of_the_image_is_not_testable(model) -> None:  # type: ignore[no-untyped-def]
    # A mask over three quarters of the image has no matched control: the same shape moved anywhere
    # still covers most of it (and the corner). The test refuses, saying how much the mask covers.
    x, corner, _ = _data()
    most = np.ones_like(corner)
    most[:, 16:, 16:] = False  # 75% of the image, the corner included
    with pytest.raises(NotTestableError, match=r"covers 75% of the image.*under 50%"):
        ablation_test(model, x, most, 0, concept="most", fill="mean", seed=3)
    with pytest.raises(NotTestableError, match="pasting is not testable"):
        insertion_test(model, x, x, most, 0, concept="most", seed=3)
    # Images whose mask covers too much are left out and counted; the rest is tested as before.
    mixed = np.where(np.arange(len(x))[:, None, None] % 2 == 0, most, corner)
    found = ablation_test(model, x, mixed, 0, concept="corner", fill="mean", seed=3)
    assert found.left_out == 20 and found.n_images == 20 and found.effect > 0.3 and "20 left out" in found.summary()
    assert controllable(corner).all() and not controllable(mixed).all()


def test_regions_showing_the_concept_alone_are_covered_when_enough_images_have_them() -> None:
    # Invented region labels (an invariant, not a published figure): image i has regions with these concepts.
    shared = [[{"paper scrap", "rim"}], [{"paper scrap", "body"}, {"cap"}]]
    alone = [[{"paper scrap"}, {"body", "paper scrap"}], [{"paper scrap", "belt"}, {"paper scrap"}]]
    plan = plan_regions(alone * 5 + shared * 5, ["paper scrap"])
    assert plan.alone and plan.note == ""
    assert plan.regions[:2] == ((0,), (1,)) and plan.regions[10:] == ((),) * 10 and plan.n_images == 10
    # Too few images with a region of its own: every region showing it is covered, and the plan says so.
    few = plan_regions(alone + shared * 5, ["paper scrap"])
    assert not few.alone and few.note == "in regions shared with other concepts" and few.n_images == 12
    assert few.regions[0] == (0, 1) and few.regions[3] == (0,)
    # A refinement and its entity are one family: "yellow tag" beside "tag" is still the tag alone.
    tags = [[{"tag", "yellow tag"}], [{"tag"}], [{"tag", "body"}]]
    assert plan_regions(tags, ["tag"], families={"yellow tag": "tag"}, min_alone=2).regions == ((0,), (0,), ())
    assert plan_regions(tags, ["yellow tag"], families={"yellow tag": "tag"}, min_alone=1).regions == ((0,), (), ())


GREEN, GREY = torch.tensor([-0.4, 0.5, -0.3]), torch.tensor([0.0, 0.0, 0.05])  # a green belt and a plain one, model input space
BELT_SIDECAR = Sidecar(classes=("green", "other"), input_size=(32, 32), mean=(0.5, 0.5, 0.5), std=(0.25, 0.25, 0.25), target_layer="features")


class Greenness(nn.Module):
    """P(green) follows how green the whole image is (G minus the mean of R and B), in a gentle (near-linear) range."""

    def __init__(self) -> None:
        super().__init__()
        self.features = nn.Identity()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        f = self.features(x)
        g = (f[:, 1] - (f[:, 0] + f[:, 2]) / 2).mean(dim=(1, 2))
        return torch.stack([2 * g - 0.3, torch.zeros_like(g)], dim=1)


class ObjectOnly(nn.Module):
    """P(green) follows the brightness of the central object only; the belt around it never matters."""

    def __init__(self) -> None:
        super().__init__()
        self.features = nn.Identity()

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        f = self.features(x)[:, :, 12:20, 12:20].mean(dim=(1, 2, 3))
        return torch.stack([3 * f, torch.zeros_like(f)], dim=1)


def _belts(n: int = 40, seed: int = 0) -> tuple[torch.Tensor, torch.Tensor, np.ndarray]:
    """Scenes with a belt over 94% of the image (green, or the same scene with a plain belt: same noise,
    same object) and the belt's mask. The pair gives the true effect of removing the attribute."""
    g = torch.Generator().manual_seed(seed)
    noise = torch.randn(n, 3, 32, 32, generator=g) * 0.15
    belt = np.ones((n, 32, 32), dtype=bool)
    belt[:, 12:20, 12:20] = False  # the object
    obj = torch.rand(n, 3, 1, 1, generator=g) - 0.5
    m = torch.from_numpy(belt)[:, None]

    def scene(colour: torch.Tensor) -> torch.Tensor:
        return torch.where(m, colour[None, :, None, None] + noise, obj + noise)

    return scene(GREEN), scene(GREY), belt


def test_recolouring_an_attribute_over_most_of_the_image_tracks_the_truth() -> None:
    # Ground truth by construction: the same scenes with a plain belt. Covering refuses a mask over 94%
    # of the image; recolouring to the plain look (donors: plain belts of other scenes) estimates the
    # fall in P(green) within 25% of the true mean fall, and is significant.
    from analysis.interventions import needs_recolour, plain_colours, recolour_test

    model = prepare_model(Greenness(), BELT_SIDECAR)
    x, x_plain, belt = _belts()
    assert needs_recolour(belt) and not needs_recolour(~belt)
    _, other_plain, other_belt = _belts(20, seed=1)
    plain = plain_colours(other_plain, other_belt)
    assert plain.shape == (20, 3)
    torch.testing.assert_close(plain.mean(dim=0), GREY, atol=0.02, rtol=0)
    with torch.inference_mode():
        true = float((torch.softmax(model.module(x), 1)[:, 0] - torch.softmax(model.module(x_plain), 1)[:, 0]).mean())
    with pytest.raises(NotTestableError):
        ablation_test(model, x, belt, 0, concept="green belt", fill="ring")
    found = recolour_test(model, x, belt, 0, plain=plain, concept="green belt", seed=2)
    assert true > 0.2 and abs(found.effect - true) <= 0.25 * true, (found.effect, true)
    assert found.p_value < 0.001 and found.fill == "recolour" and found.left_out == 0
    # The sham (another image's green) keeps the attribute: it moves P(green) by little.
    assert abs(found.control_mean_change) < 0.1 * true
    assert "recolouring of green belt" in found.summary() and "sham" in found.summary()
    again = recolour_test(model, x, belt, 0, plain=plain, concept="green belt", seed=2)
    assert again.per_image == found.per_image  # seeded
    with pytest.raises(InvalidInputError, match="plain must be K x 3"):
        recolour_test(model, x, belt, 0, plain=torch.zeros(0, 3))


def test_recolouring_what_the_model_ignores_has_no_effect() -> None:
    from analysis.interventions import recolour_test

    model = prepare_model(ObjectOnly(), BELT_SIDECAR)
    x, _, belt = _belts()
    found = recolour_test(model, x, belt, 0, plain=GREY[None], concept="green belt", seed=2)
    assert abs(found.effect) < 1e-6 and abs(found.mean_change) < 1e-6 and found.p_value > 0.5


def test_recolouring_touches_only_masked_pixels_and_stays_in_range() -> None:
    from analysis.interventions import recolour_images

    x, _, belt = _belts(3)
    low, high = torch.full((3,), -2.0), torch.full((3,), 2.0)
    out = recolour_images(x, torch.from_numpy(belt), torch.tensor([[5.0, 0.0, -5.0]] * 3), low, high)
    keep = ~torch.from_numpy(belt)[:, None].expand_as(x)
    torch.testing.assert_close(out[keep], x[keep])  # the object is untouched
    assert out.max() <= 2.0 and out.min() >= -2.0
    shift = torch.tensor([[0.1, -0.2, 0.3]] * 3)
    moved = recolour_images(x, torch.from_numpy(belt), shift, torch.full((3,), -9.0), torch.full((3,), 9.0))
    torch.testing.assert_close(moved[~keep].view(-1), (x + shift[:, :, None, None])[~keep].view(-1))  # texture kept: one shift for all


def test_an_attribute_region_grows_by_colour_to_the_rest_of_its_entity() -> None:
    # A few salient pieces of a green belt stand for the whole belt: grown by colour, the mask reaches every
    # connected pixel of the belt (noise and all) and stops at the object, whose colour differs.
    from analysis.interventions import grow_by_colour, needs_recolour

    x, _, belt = _belts(6)
    pieces = np.zeros_like(belt)
    pieces[:, 2:6, 2:6] = True  # 16 pixels of the belt, 1.6% of the image
    grown = grow_by_colour(x, pieces)
    assert not needs_recolour(pieces) and needs_recolour(grown)
    # The object (a random colour, at times near the green within the noise) is mostly not reached.
    assert (grown & ~belt).sum() <= 0.1 * (~belt).sum()
    assert (grown & belt).sum() / belt.sum() > 0.85  # most of the belt (pixels of extreme noise stay out)
    assert not grow_by_colour(x, np.zeros_like(belt)).any()


def test_donors_carrying_the_attribute_s_colour_are_dropped_and_the_estimate_recovers() -> None:
    # Grouped labelling names a crop "belt" without its colour, so some plain-look donors are green belts. By
    # construction (same scenes with a plain belt) the truth is known: with half the donors green the estimate
    # falls well short of it; dropping donors inside the tested regions' colour spread brings it back within 25%.
    from analysis.interventions import plain_colours, recolour_test, unlike_attribute

    model = prepare_model(Greenness(), BELT_SIDECAR)
    x, x_plain, belt = _belts()
    green_x, _, green_belt = _belts(20, seed=3)  # mislabelled donors: green belts called "belt"
    _, grey_x, grey_belt = _belts(20, seed=4)
    donors = torch.cat([plain_colours(green_x, green_belt), plain_colours(grey_x, grey_belt)])
    tested = plain_colours(x, belt)
    keep = unlike_attribute(donors, tested)
    assert keep.tolist() == [False] * 20 + [True] * 20
    with torch.inference_mode():
        true = float((torch.softmax(model.module(x), 1)[:, 0] - torch.softmax(model.module(x_plain), 1)[:, 0]).mean())
    mixed = recolour_test(model, x, belt, 0, plain=donors, concept="green belt", seed=2)
    screened = recolour_test(model, x, belt, 0, plain=donors[torch.from_numpy(keep)], concept="green belt", seed=2)
    assert mixed.effect < 0.75 * true, (mixed.effect, true)
    assert abs(screened.effect - true) <= 0.25 * true, (screened.effect, true)
    with pytest.raises(InvalidInputError, match="N x 3"):
        unlike_attribute(donors, torch.zeros(0, 3))


def test_the_donor_screen_drops_ordinary_draws_of_the_attribute_at_its_stated_level() -> None:
    # Under a normal model the squared Mahalanobis distance of a fresh draw follows chi-square with 3 degrees of
    # freedom (scipy.stats.chi2): about 1 - level of fresh draws lie outside and are kept, with correlated channels too.
    from analysis.interventions import DONOR_LEVEL, beyond_spread

    rng = np.random.default_rng(0)
    centre = np.array([-0.4, 0.5, -0.3])
    root = np.array([[0.3, 0.0, 0.0], [0.5, 0.2, 0.0], [0.3, 0.1, 0.25]])  # correlated: brighter in every channel at once
    tested = torch.from_numpy(centre + rng.normal(size=(4000, 3)) @ root.T)
    fresh = torch.from_numpy(centre + rng.normal(size=(40000, 3)) @ root.T)
    for level in (DONOR_LEVEL, 0.9):
        kept = float(beyond_spread(fresh, tested, level=level, min_scale=0.0).double().mean())
        assert abs(kept - (1 - level)) <= 0.2 * (1 - level) + 0.002, (level, kept)


def test_the_donor_screen_follows_the_colour_under_brighter_light_and_keeps_another_colour() -> None:
    # The demo's scenes vary the light by up to 15% either way, so a green belt's colour moves along one line.
    # A brightly lit green belt lies far from the centre in every channel but on that line: it is dropped. A grey
    # belt of the same brightness is kept.
    from analysis.interventions import beyond_spread, unlike_attribute

    rng = np.random.default_rng(1)
    green, grey = np.array([64.0, 124.0, 72.0]), np.array([88.0, 88.0, 94.0])
    mean, std = 0.5 * 255, 0.25 * 255

    def colours(base: np.ndarray, light: np.ndarray) -> torch.Tensor:
        return torch.from_numpy((light[:, None] * base + rng.normal(0, 1.0, (len(light), 3)) - mean) / std)

    tested = colours(green, rng.uniform(0.85, 1.15, 40))
    donors = torch.cat([colours(green, np.array([0.86, 1.0, 1.11, 1.15])), colours(grey, np.array([0.85, 0.95, 1.0, 1.15]))])
    assert unlike_attribute(donors, tested).tolist() == [False] * 4 + [True] * 4
    # A green belt's region holding a tenth of a red can lies beyond the tested colours' narrow spread, but nearer
    # green than grey: dropped too. A grey belt region holding the same piece of can is kept.
    red = np.array([190.0, 50.0, 50.0])
    mixed = torch.cat([colours(0.9 * green + 0.1 * red, np.array([0.9, 1.1])), colours(0.9 * grey + 0.1 * red, np.array([1.0]))])
    assert beyond_spread(mixed[:2], tested).all()
    assert unlike_attribute(torch.cat([donors, mixed]), tested).tolist() == [False] * 4 + [True] * 4 + [False, False, True]


def test_the_policy_recolours_an_attribute_over_most_of_the_image_and_covers_the_rest() -> None:
    from analysis.interventions import plan_removal

    x, _, belt = _belts(6)
    pieces = np.zeros_like(belt)
    pieces[:, 2:6, 2:6] = True  # salient pieces of a green belt
    families = {"green belt": "belt"}
    found = plan_removal(x, pieces, ["green belt"], families=families)
    assert found.test == "recolour" and found.masks.mean() > 0.8 and (found.masks >= pieces).all()
    # The same pieces named as a concept that is not an attribute of an entity: covered as they are.
    small = plan_removal(x, pieces, ["tag"], families=families)
    assert small.test == "cover" and (small.masks == pieces).all() and small.why_not_recolour == ""
    # Most of the image, but not an attribute: covering (which will find no room), and why recolouring cannot stand in.
    broad = plan_removal(x, belt, ["belt"], families=families)
    assert broad.test == "cover" and "attribute of an entity" in broad.why_not_recolour
    # Two concepts together are not one attribute.
    assert plan_removal(x, pieces, ["green belt", "tag"], families=families).test == "cover"


def test_a_matched_sham_moves_the_pixels_as_far_as_the_removal_keeps_the_hue_and_gives_the_same_estimate() -> None:
    # The default sham (another image's green) moves the pixels less than the removal does. The matched sham moves
    # them exactly as far (pixel space), brighter or darker along their own colour. Against the truth by
    # construction (the same scenes with a plain belt), both estimates lie within 25% of the true fall, so the
    # estimate does not rest on the sham's smaller shift.
    from analysis.interventions import brightness_shams, plain_colours, recolour_test

    mean, std = torch.tensor(BELT_SIDECAR.mean), torch.tensor(BELT_SIDECAR.std)
    own = torch.stack([GREEN, GREEN * 0.5])
    removal = torch.stack([GREY - GREEN, GREY - GREEN * 0.5])
    shams = brightness_shams(own, removal, torch.tensor([1.0, -1.0]), mean, std)
    torch.testing.assert_close((shams * std).norm(dim=1), (removal * std).norm(dim=1))
    after = own * std + mean + shams * std  # pixel space: the same colour scaled, hue kept
    ratio = after / (own * std + mean)
    torch.testing.assert_close(ratio, ratio[:, :1].expand_as(ratio))
    assert ratio[0, 0] > 1 > ratio[1, 0]
    model = prepare_model(Greenness(), BELT_SIDECAR)
    x, x_plain, belt = _belts()
    _, other_plain, other_belt = _belts(20, seed=1)
    plain = plain_colours(other_plain, other_belt)
    with torch.inference_mode():
        true = float((torch.softmax(model.module(x), 1)[:, 0] - torch.softmax(model.module(x_plain), 1)[:, 0]).mean())
    found = {s: recolour_test(model, x, belt, 0, plain=plain, concept="green belt", seed=2, sham=s) for s in ("attribute", "matched")}  # type: ignore[arg-type]
    for s, r in found.items():
        assert abs(r.effect - true) <= 0.25 * true, (s, r.effect, true)
    assert abs(found["matched"].control_mean_change) < 0.15 * true
    with pytest.raises(InvalidInputError, match="sham must be one of"):
        recolour_test(model, x, belt, 0, plain=plain, sham="louder")  # type: ignore[arg-type]


def test_with_few_tested_images_the_spread_of_their_pixels_keeps_lit_greens_out_of_the_donors() -> None:
    # Three tested images give no spread of mean colours; a green belt under brighter light then lies just beyond
    # it and, if most donors are such greens, the plain look would be green. The spread of the tested pixels
    # themselves (noise of 10 grey levels, as the demo draws it) says such a colour is one the attribute shows.
    from analysis.interventions import pixel_spread, unlike_attribute

    rng = np.random.default_rng(2)
    green, grey = np.array([64.0, 124.0, 72.0]), np.array([88.0, 88.0, 94.0])
    mean, std = 0.5 * 255, 0.25 * 255
    x = torch.from_numpy(np.stack([(light * green[:, None, None] + rng.normal(0, 10.0, (3, 16, 16)) - mean) / std for light in (0.9, 1.0, 1.05)]))
    masks = np.ones((3, 16, 16), dtype=bool)
    tested = x.mean(dim=(2, 3))
    donors = torch.from_numpy(np.stack([(light * c - mean) / std for c, light in [(green, 1.12), (green, 1.15), (green, 0.86), (green, 1.1), (grey, 1.0)]]))
    within = pixel_spread(x, masks)
    torch.testing.assert_close(within, torch.eye(3, dtype=torch.float64) * (10.0 / std) ** 2, atol=0.004, rtol=0.0)
    assert unlike_attribute(donors, tested).tolist() == [True, True, False, True, False]  # without it: greens stand in for the plain look
    assert unlike_attribute(donors, tested, within=within).tolist() == [False, False, False, False, True]
