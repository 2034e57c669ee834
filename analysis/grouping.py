"""Groups of similar regions for grouped labelling, mixed so that a group does not lead the annotator.

Regions are clustered on their embeddings (k-means, Lloyd's algorithm with k-means++ seeding,
Arthur and Vassilvitskii 2007; scikit-learn's KMeans is the reference a test compares with). The
clusters are chained nearest-first into one sequence in which similar regions sit side by side,
and the sequence is cut into groups of ``size``. While a group fills, a region that would push one
predicted class over ``max_class_share`` of the group, or bring a second crop of an image it already
holds, waits for the next group; the next group takes waiting regions first. So the crops of a
dominant class (a cue that sits only beside cans) spread over neighbouring groups, each also
holding similar-looking regions of other classes, and no group is all one class.
"""

from __future__ import annotations

import math
from collections import Counter, deque
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from .errors import InvalidInputError

MAX_DIMENSIONS = 32  # embeddings are projected on this many principal axes before clustering


@dataclass(frozen=True)
class KMeansResult:
    labels: npt.NDArray[np.int64]  # (n,) cluster of each row
    centers: npt.NDArray[np.float64]  # (k, d)
    inertia: float  # sum of squared distances to the assigned centre


@dataclass(frozen=True)
class Grouping:
    """Groups as tuples of row indices into the arrays given, in labelling order."""

    groups: tuple[tuple[int, ...], ...]
    size: int
    max_class_share: float
    over_share: int  # groups where the class share could not be held (the last ones of a class that is most of the data)

    def group_of(self) -> npt.NDArray[np.int64]:
        """Per row, the index of its group."""
        n = sum(len(g) for g in self.groups)
        out = np.full(n, -1, dtype=np.int64)
        for k, g in enumerate(self.groups):
            out[list(g)] = k
        return out


def _squared_distances(x: npt.NDArray[np.float64], centers: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    d: npt.NDArray[np.float64] = (x * x).sum(axis=1)[:, None] - 2.0 * x @ centers.T + (centers * centers).sum(axis=1)[None, :]
    return np.maximum(d, 0.0)


def _seed_centers(x: npt.NDArray[np.float64], k: int, rng: np.random.Generator) -> npt.NDArray[np.float64]:
    """k-means++: each next centre drawn with probability proportional to the squared distance to the nearest one so far."""
    centers = [x[int(rng.integers(len(x)))]]
    nearest = ((x - centers[0]) ** 2).sum(axis=1)
    for _ in range(1, k):
        total = nearest.sum()
        i = int(rng.choice(len(x), p=nearest / total)) if total > 0 else int(rng.integers(len(x)))
        centers.append(x[i])
        nearest = np.minimum(nearest, ((x - x[i]) ** 2).sum(axis=1))
    return np.stack(centers)


def kmeans(x: npt.NDArray[np.floating], n_clusters: int, *, seed: int = 0, n_init: int = 3, max_iter: int = 100) -> KMeansResult:
    """Lloyd's k-means from k-means++ starts; the best of ``n_init`` runs by inertia.

    Reference: Arthur and Vassilvitskii (2007), k-means++: the advantages of careful seeding.
    """
    data = np.asarray(x, dtype=np.float64)
    if data.ndim != 2 or len(data) == 0:
        raise InvalidInputError(f"k-means needs an n x d array with n >= 1; got shape {data.shape}.")
    if not 1 <= n_clusters <= len(data):
        raise InvalidInputError(f"n_clusters must be 1..{len(data)} (the number of rows); got {n_clusters}.")
    if not np.isfinite(data).all():
        raise InvalidInputError("k-means got NaN or infinite values; check the embeddings.")
    rng = np.random.default_rng(seed)
    runs = []
    for _ in range(max(1, n_init)):
        centers = _seed_centers(data, n_clusters, rng)
        labels = np.zeros(len(data), dtype=np.int64)
        for it in range(max_iter):
            new = _squared_distances(data, centers).argmin(axis=1)
            if it and np.array_equal(new, labels):
                break
            labels = new
            sums = np.zeros_like(centers)
            np.add.at(sums, labels, data)
            counts = np.bincount(labels, minlength=n_clusters)
            empty = counts == 0
            centers = np.where(empty[:, None], centers, sums / np.maximum(counts, 1)[:, None])
            if empty.any():  # an emptied cluster restarts at the row farthest from its centre
                far = _squared_distances(data, centers)[np.arange(len(data)), labels].argsort()[::-1]
                centers[np.flatnonzero(empty)] = data[far[: int(empty.sum())]]
        labels = _squared_distances(data, centers).argmin(axis=1)
        inertia = float(_squared_distances(data, centers)[np.arange(len(data)), labels].sum())
        runs.append(KMeansResult(labels.astype(np.int64), centers, inertia))
    return min(runs, key=lambda r: r.inertia)


def prepare_embeddings(embeddings: npt.NDArray[np.floating], *, dimensions: int = MAX_DIMENSIONS) -> npt.NDArray[np.float64]:
    """Centred, each row scaled to unit length (so the size of activations does not decide), then at most
    ``dimensions`` principal axes."""
    x: npt.NDArray[np.float64] = np.asarray(embeddings, dtype=np.float64)
    x = x - x.mean(axis=0)
    norms = np.linalg.norm(x, axis=1, keepdims=True)
    x = x / np.where(norms > 0, norms, 1.0)
    if x.shape[1] > dimensions and len(x) > dimensions:
        _, _, vt = np.linalg.svd(x - x.mean(axis=0), full_matrices=False)
        x = x @ vt[:dimensions].T
    return x


def _cluster_sequence(x: npt.NDArray[np.float64], result: KMeansResult) -> list[int]:
    """Rows ordered so that similar ones sit together: clusters chained nearest-first from the largest,
    each cluster's rows ordered along the way to the next cluster."""
    k = len(result.centers)
    sizes = np.bincount(result.labels, minlength=k)
    centers = result.centers
    order = [int(sizes.argmax())]
    left = set(range(k)) - {order[0]}
    while left:
        last = centers[order[-1]]
        nxt = min(left, key=lambda c: (float(((centers[c] - last) ** 2).sum()), c))
        order.append(nxt)
        left.remove(nxt)
    seq: list[int] = []
    for pos, c in enumerate(order):
        rows = np.flatnonzero(result.labels == c)
        if pos + 1 < len(order):
            direction = centers[order[pos + 1]] - centers[c]
        elif pos > 0:
            direction = centers[c] - centers[order[pos - 1]]
        else:
            direction = np.zeros(centers.shape[1])
        key = x[rows] @ direction
        seq += [int(r) for r in rows[np.lexsort((rows, key))]]
    return seq


def _place(i: int, group: list[int], per_class: Counter[str], per_image: Counter[int], cls: str, image: int, *, cap: int,
           max_per_image: int) -> bool:
    """Put region ``i`` in the group being filled if its class and its image still have room there; whether it was put."""
    if per_class[cls] >= cap or per_image[image] >= max_per_image:
        return False
    group.append(i)
    per_class[cls] += 1
    per_image[image] += 1
    return True


def _cut(sequence: list[int], classes: Sequence[str], images: Sequence[int], *, size: int, cap: int, max_per_image: int) -> list[list[int]]:
    """Cut the sequence into groups of ``size``; a region over its class's ``cap`` or its image's limit waits for the next group."""
    groups: list[list[int]] = []
    waiting: deque[int] = deque()
    stream = deque(sequence)
    while stream or waiting:
        group: list[int] = []
        per_class: Counter[str] = Counter()
        per_image: Counter[int] = Counter()
        for _ in range(len(waiting)):  # waiting regions first, oldest first
            if len(group) == size:
                break
            i = waiting.popleft()
            if not _place(i, group, per_class, per_image, classes[i], images[i], cap=cap, max_per_image=max_per_image):
                waiting.append(i)
        while len(group) < size and stream:
            i = stream.popleft()
            if not _place(i, group, per_class, per_image, classes[i], images[i], cap=cap, max_per_image=max_per_image):
                waiting.append(i)
        if not stream:
            # Only waiting regions are left and none fits: the rest of a dominant class fills groups on its own.
            while len(group) < size and waiting:
                group.append(waiting.popleft())
        groups.append(group)
    return groups


def group_regions(
    embeddings: npt.NDArray[np.floating],
    classes: Sequence[str],
    images: Sequence[int],
    *,
    size: int = 12,
    max_class_share: float = 0.5,
    max_per_image: int = 1,
    seed: int = 0,
) -> Grouping:
    """Cut regions into groups of about ``size`` similar ones, mixing images and predicted classes.

    Parameters
    ----------
    embeddings
        n x d region embeddings (:mod:`analysis.region_embeddings`).
    classes, images
        Per region, its predicted class and its image.
    size
        Crops per group, 2..32; every group has ``size`` crops, give or take one: a last group
        shorter than half of ``size`` is spread over the groups before it.
    max_class_share
        At most this share of a group's crops may come from one predicted class (0 < share <= 1).
        Where one class is so much of the data that this cannot hold, the last groups exceed it
        and ``over_share`` counts them.
    max_per_image
        At most this many crops of one image in a group (where it can hold).

    Raises
    ------
    InvalidInputError
        Mismatched lengths, a size or share out of range, NaN in the embeddings.
    """
    x = np.asarray(embeddings)
    n = len(x)
    if x.ndim != 2:
        raise InvalidInputError(f"embeddings must be n x d; got shape {x.shape}.")
    if len(classes) != n or len(images) != n:
        raise InvalidInputError(f"one class and one image per embedding are needed; got {len(classes)} classes, {len(images)} images for {n} rows.")
    if not 2 <= size <= 32:
        raise InvalidInputError(f"size must be 2..32 crops per group; got {size}. 8-16 suit a screen.")
    if not 0 < max_class_share <= 1:
        raise InvalidInputError(f"max_class_share must be in (0, 1]; got {max_class_share}. E.g. 0.5.")
    if max_per_image < 1:
        raise InvalidInputError(f"max_per_image must be at least 1; got {max_per_image}.")
    if n == 0:
        return Grouping((), size, max_class_share, 0)
    if not np.isfinite(x).all():
        raise InvalidInputError("the embeddings hold NaN or infinite values; embed the run again.")
    prepared = prepare_embeddings(x)
    clustered = kmeans(prepared, max(1, min(n, round(n / size))), seed=seed)
    sequence = _cluster_sequence(prepared, clustered)
    cap = max(1, math.floor(max_class_share * size + 1e-9))

    groups = _cut(sequence, classes, images, size=size, cap=cap, max_per_image=max_per_image)
    if len(groups) > 1 and len(groups[-1]) < (size + 1) // 2:
        tail = groups.pop()  # a short tail is spread over the groups before it, one crop each
        for k, i in enumerate(tail):
            groups[-1 - k % len(groups)].append(i)
    over = sum(1 for g in groups if max(Counter(classes[i] for i in g).values()) > max(cap, math.floor(max_class_share * len(g) + 1e-9)))
    return Grouping(tuple(tuple(g) for g in groups), size, max_class_share, over)
