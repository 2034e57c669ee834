"""Region embeddings against a direct computation, k-means against scikit-learn, and what grouping promises."""

from __future__ import annotations

from collections import Counter

import numpy as np
import pytest
import torch
from sklearn.cluster import KMeans
from sklearn.datasets import load_digits
from torch import nn

from analysis.architectures import SorterCNN
from analysis.errors import InvalidInputError
from analysis.grouping import group_regions, kmeans
from analysis.model_io import Sidecar, prepare_model
from analysis.region_embeddings import box_masks, embed_regions, region_weights

SIDECAR = Sidecar(classes=("a", "b", "c"), input_size=(32, 32), mean=(0.0, 0.0, 0.0), std=(1.0, 1.0, 1.0), target_layer="features")


def _model() -> nn.Module:
    torch.manual_seed(0)
    return SorterCNN(num_classes=3, width=8).eval()


def test_region_embedding_is_the_masked_mean_of_the_layer() -> None:
    """Direct computation: the target layer's output (read straight from the module), each cell weighted by the share of it inside the region."""
    model = _model()
    x = torch.randn(2, 3, 32, 32, generator=torch.Generator().manual_seed(1))
    masks = [box_masks([(0, 0, 8, 8), (10, 16, 30, 32)], (32, 32)), np.zeros((1, 32, 32), dtype=bool)]
    masks[1][0, 3:5, 20:31] = True  # thinner than a cell of the 8x8 grid, and not a box
    ours = embed_regions(prepare_model(model, SIDECAR), x, masks)
    with torch.no_grad():
        feats = model.features(x)  # N x C x 8 x 8 for 32 px input
    h, w = feats.shape[2:]
    expected = []
    for i in range(2):
        for m in masks[i]:
            mask = torch.from_numpy(m.astype(np.float32))
            cells = mask.reshape(h, 32 // h, w, 32 // w).mean(dim=(1, 3))  # share of each cell inside the region
            expected.append(((feats[i] * cells).sum(dim=(1, 2)) / cells.sum()).numpy())
    np.testing.assert_allclose(ours, np.stack(expected), rtol=1e-5, atol=1e-6)
    assert ours.shape == (3, feats.shape[1])


def test_region_weights_refuse_a_region_without_pixels() -> None:
    with pytest.raises(InvalidInputError, match="no pixel"):
        region_weights(box_masks([(40, 40, 50, 50)], (8, 8)), (4, 4))


def test_kmeans_matches_scikit_learn_inertia_on_digits() -> None:
    """scikit-learn's KMeans (k-means++, 10 starts) on the digits data it ships: ours reaches the same inertia within 2%."""
    x = load_digits().data.astype(np.float64)
    ours = kmeans(x, 10, seed=0, n_init=4)
    ref = KMeans(n_clusters=10, n_init=10, random_state=0).fit(x)
    assert ours.inertia <= ref.inertia_ * 1.02
    # Each row is with its nearest centre.
    d = ((x[:, None, :] - ours.centers[None]) ** 2).sum(-1)
    assert (d.argmin(axis=1) == ours.labels).all()


def test_groups_put_similar_regions_together() -> None:
    """Digits as stand-in embeddings: a group's most common digit is far above what random groups of 12 give."""
    digits = load_digits()
    n = len(digits.target)
    g = group_regions(digits.data, ["x"] * n, list(range(n)), size=12, max_class_share=1.0)
    purity = np.mean([Counter(digits.target[list(grp)]).most_common(1)[0][1] / len(grp) for grp in g.groups])
    rng = np.random.default_rng(0)
    shuffled = rng.permutation(n)
    chance = np.mean([Counter(digits.target[shuffled[i : i + 12]]).most_common(1)[0][1] / 12 for i in range(0, n - 11, 12)])
    assert purity > 0.75 and chance < 0.3, (purity, chance)


def test_groups_cover_every_region_once_mix_classes_and_images() -> None:
    digits = load_digits()
    x = digits.data
    n = len(x)
    # A class that is exactly the similar regions (digit 0 only ever "can"), as a cue beside one class would be.
    classes = ["can" if t == 0 else ("bottle" if t % 2 else "carton") for t in digits.target]
    images = [i // 3 for i in range(n)]  # three regions per image
    g = group_regions(x, classes, images, size=12, max_class_share=0.5, seed=1)
    seen = sorted(i for grp in g.groups for i in grp)
    assert seen == list(range(n))
    assert all(6 <= len(grp) <= 13 for grp in g.groups), sorted({len(grp) for grp in g.groups})
    shares = [max(Counter(classes[i] for i in grp).values()) / len(grp) for grp in g.groups]
    assert sum(s > 0.5 + 1e-9 for s in shares) == g.over_share
    assert g.over_share <= 2
    assert all(max(Counter(images[i] for i in grp).values()) == 1 for grp in g.groups[:-3])
    # The zeros ("can" crops that look alike) still share groups: at most 6 in any, but gathered, not scattered.
    zero_groups = [grp for grp in g.groups if sum(digits.target[i] == 0 for i in grp) >= 4]
    assert sum(sum(digits.target[i] == 0 for i in grp) for grp in zero_groups) >= 0.8 * (digits.target == 0).sum()
    assert group_regions(x, classes, images, size=12, max_class_share=0.5, seed=1) == g  # seeded: the same again


def test_group_regions_checks_its_input() -> None:
    with pytest.raises(InvalidInputError, match="size"):
        group_regions(np.zeros((4, 2)), ["a"] * 4, [0, 1, 2, 3], size=1)
    with pytest.raises(InvalidInputError, match="max_class_share"):
        group_regions(np.zeros((4, 2)), ["a"] * 4, [0, 1, 2, 3], max_class_share=0)
    with pytest.raises(InvalidInputError, match="one class"):
        group_regions(np.zeros((4, 2)), ["a"] * 3, [0, 1, 2, 3])
    assert group_regions(np.zeros((0, 2)), [], []).groups == ()
