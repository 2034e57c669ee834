"""Annotator reliability and label aggregation: majority vote and Dawid-Skene EM (full or one-coin).

Judgments come as three equal-length code arrays (item, annotator, label). Everything is
vectorised over judgments with a sparse item-by-(annotator, label) matrix, so a million
judgments take seconds, not minutes.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Literal

import numpy as np
import numpy.typing as npt
from scipy import sparse

from .errors import InvalidInputError

Method = Literal["majority", "dawid-skene", "one-coin"]
METHODS: tuple[Method, ...] = ("majority", "dawid-skene", "one-coin")

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]


@dataclass(frozen=True)
class Aggregation:
    """Posterior class probabilities per item and what the method learned about each annotator."""

    method: Method
    posterior: FloatArray  # (items, classes), rows sum to 1
    annotator_accuracy: FloatArray  # (annotators,) estimated probability of a correct label
    confusion: FloatArray | None  # (annotators, true class, given label); None for majority vote
    prior: FloatArray  # (classes,)
    log_likelihood: float | None  # marginal log-likelihood of the judgments; None for majority vote
    iterations: int
    converged: bool

    @property
    def labels(self) -> IntArray:
        """Most probable class per item (ties go to the lowest code)."""
        return self.posterior.argmax(axis=1)


def _check(items: npt.ArrayLike, annotators: npt.ArrayLike, labels: npt.ArrayLike, n_classes: int) -> tuple[IntArray, IntArray, IntArray]:
    i, a, y = (np.asarray(v, dtype=np.int64) for v in (items, annotators, labels))
    if not (i.shape == a.shape == y.shape) or i.ndim != 1 or len(i) == 0:
        raise InvalidInputError("items, annotators and labels must be equal-length, non-empty 1-D code arrays.")
    if n_classes < 2:
        raise InvalidInputError(f"aggregation needs at least two classes; got {n_classes}.")
    if y.min() < 0 or y.max() >= n_classes:
        raise InvalidInputError(f"labels must be codes 0..{n_classes - 1}; got {y.min()}..{y.max()}.")
    if i.min() < 0 or a.min() < 0:
        raise InvalidInputError("item and annotator codes must be non-negative.")
    return i, a, y


def _known_array(known: Mapping[int, int] | None, n_items: int, n_classes: int) -> IntArray:
    out = np.full(n_items, -1, dtype=np.int64)
    for item, cls in (known or {}).items():
        if not (0 <= item < n_items and 0 <= cls < n_classes):
            raise InvalidInputError(f"known answer {cls} for item {item} is out of range (items 0..{n_items - 1}, classes 0..{n_classes - 1}).")
        out[item] = cls
    return out


def _clamp(post: FloatArray, known: IntArray) -> FloatArray:
    """Items with a known answer (check items) get all their probability on it."""
    rows = np.nonzero(known >= 0)[0]
    if len(rows):
        post[rows] = 0.0
        post[rows, known[rows]] = 1.0
    return post


def _votes(i: IntArray, y: IntArray, n_items: int, n_classes: int) -> FloatArray:
    return np.bincount(i * n_classes + y, minlength=n_items * n_classes).reshape(n_items, n_classes).astype(np.float64)


def _normalise_rows(m: FloatArray, prior: FloatArray | None = None) -> FloatArray:
    s = m.sum(axis=1, keepdims=True)
    empty = s[:, 0] == 0
    out = m / np.where(s == 0, 1.0, s)
    if empty.any():
        out[empty] = prior if prior is not None else 1.0 / m.shape[1]
    return out


def majority_vote(items: npt.ArrayLike, annotators: npt.ArrayLike, labels: npt.ArrayLike, *, n_classes: int, known: Mapping[int, int] | None = None) -> Aggregation:
    """Vote shares as the posterior; an annotator's accuracy is how often they side with the winning label."""
    i, a, y = _check(items, annotators, labels, n_classes)
    n_items, n_ann = int(i.max()) + 1, int(a.max()) + 1
    post = _clamp(_normalise_rows(_votes(i, y, n_items, n_classes)), _known_array(known, n_items, n_classes))
    hit = (post.argmax(axis=1)[i] == y).astype(np.float64)
    acc = np.bincount(a, weights=hit, minlength=n_ann) / np.maximum(np.bincount(a, minlength=n_ann), 1)
    return Aggregation("majority", post, acc, None, post.mean(axis=0), None, 0, True)


def _log_norm(log_post: FloatArray) -> tuple[FloatArray, FloatArray]:
    top = log_post.max(axis=1, keepdims=True)
    norm = top[:, 0] + np.log(np.exp(log_post - top).sum(axis=1))
    return np.exp(log_post - norm[:, None]), norm


def dawid_skene(
    items: npt.ArrayLike,
    annotators: npt.ArrayLike,
    labels: npt.ArrayLike,
    *,
    n_classes: int,
    one_coin: bool = False,
    known: Mapping[int, int] | None = None,
    tol: float = 1e-6,
    max_iter: int = 1000,
    smoothing: float = 0.01,
) -> Aggregation:
    """Dawid & Skene (1979) EM, from majority-vote shares until the log-likelihood gains less than ``tol``.

    The full model learns a confusion matrix per annotator; ``one_coin`` learns one accuracy per
    annotator (errors spread evenly over the other labels), which needs far fewer judgments per
    person. ``known`` fixes check items to their known answer throughout. ``smoothing`` is a
    pseudo-count per confusion cell (or per right/wrong count) so no label gets probability 0.
    Iterations stop at ``max_iter``; ``converged`` says whether the tolerance was met.
    """
    i, a, y = _check(items, annotators, labels, n_classes)
    k = n_classes
    n_items, n_ann = int(i.max()) + 1, int(a.max()) + 1
    fixed = _known_array(known, n_items, k)
    # S[(annotator, label), item] = number of such judgments; M-step and E-step are products with it.
    s = sparse.csr_matrix((np.ones(len(i)), (a * k + y, i)), shape=(n_ann * k, n_items))
    st = s.T.tocsr()
    per_ann = np.bincount(a, minlength=n_ann).astype(np.float64)
    post = _clamp(_normalise_rows(_votes(i, y, n_items, k)), fixed)
    ll_old = -np.inf
    converged = False
    it = 0
    for it in range(1, max_iter + 1):
        prior = post.mean(axis=0).clip(min=1e-12)
        prior /= prior.sum()
        if one_coin:
            right = np.bincount(a, weights=post[i, y], minlength=n_ann)
            p = (right + smoothing) / (per_ann + 2 * smoothing)
            log_right, log_wrong = np.log(p), np.log((1 - p) / (k - 1))
            log_post = np.log(prior) + np.bincount(i, weights=log_wrong[a], minlength=n_items)[:, None]
            log_post += np.bincount(i * k + y, weights=(log_right - log_wrong)[a], minlength=n_items * k).reshape(n_items, k)
        else:
            counts = np.asarray(s @ post).reshape(n_ann, k, k).transpose(0, 2, 1) + smoothing  # (ann, true, given)
            confusion = counts / counts.sum(axis=2, keepdims=True)
            log_conf = np.log(confusion).transpose(0, 2, 1).reshape(n_ann * k, k)  # rows (ann, given)
            log_post = np.log(prior) + np.asarray(st @ log_conf)
        post, norm = _log_norm(log_post)
        post = _clamp(post, fixed)
        ll = float(norm.sum())
        if abs(ll - ll_old) < tol:
            converged = True
            break
        ll_old = ll
    if one_coin:
        confusion = np.broadcast_to(((1 - p) / (k - 1))[:, None, None], (n_ann, k, k)).copy()
        confusion[:, np.arange(k), np.arange(k)] = p[:, None]
        accuracy = p
    else:
        accuracy = np.einsum("k,akk->a", prior, confusion)
    return Aggregation("one-coin" if one_coin else "dawid-skene", post, accuracy, confusion, prior, ll, it, converged)


def aggregate(items: npt.ArrayLike, annotators: npt.ArrayLike, labels: npt.ArrayLike, *, n_classes: int, method: Method, known: Mapping[int, int] | None = None, **options: float) -> Aggregation:
    """Run the named method: ``majority``, ``dawid-skene`` (full confusion matrices) or ``one-coin``."""
    if method == "majority":
        return majority_vote(items, annotators, labels, n_classes=n_classes, known=known)
    if method in ("dawid-skene", "one-coin"):
        return dawid_skene(items, annotators, labels, n_classes=n_classes, one_coin=method == "one-coin", known=known, **options)  # type: ignore[arg-type]
    raise InvalidInputError(f"unknown aggregation method {method!r}; choose one of {', '.join(METHODS)}.")
