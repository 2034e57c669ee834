"""Annotator reliability and label aggregation: majority vote and Dawid-Skene EM (full or one-coin).

Judgments come as three equal-length code arrays (item, annotator, label). Everything is
vectorised over judgments with a sparse item-by-(annotator, label) matrix, so a million
judgments take seconds, not minutes.
"""

from __future__ import annotations

import math
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
class ConfusionPrior:
    """The Dirichlet prior Dawid-Skene puts on what it learns, stated as pseudo-counts.

    Each annotator's row of the confusion matrix for one true label starts with ``strength``
    imaginary judgments, ``accuracy`` of them correct and the rest spread evenly over the other
    labels; each class share starts with ``class_count`` imaginary items. The estimates are the
    posterior mode (MAP) under Dirichlet(1 + pseudo-counts). ``strength=0, class_count=0`` is the
    unsmoothed maximum-likelihood model of Dawid & Skene (1979).
    """

    strength: float = 2.0
    accuracy: float = 0.7
    class_count: float = 1.0

    def describe(self) -> str:
        if self.strength == 0 and self.class_count == 0:
            return "no prior (maximum likelihood)"
        return (f"Dirichlet prior: {self.strength:g} pseudo-judgments per annotator and true label, {self.accuracy:.0%} of them correct; "
                f"{self.class_count:g} pseudo-item per class")

    def to_dict(self) -> dict[str, float | str]:
        return {"kind": "dirichlet", "strength": self.strength, "accuracy": self.accuracy, "class_count": self.class_count}

    def pseudo_counts(self, k: int) -> FloatArray:
        """(true, given) pseudo-counts of one confusion row set."""
        off = self.strength * (1 - self.accuracy) / (k - 1)
        out = np.full((k, k), off)
        np.fill_diagonal(out, self.strength * self.accuracy)
        return out


DEFAULT_PRIOR = ConfusionPrior()
NO_PRIOR = ConfusionPrior(0.0, 0.7, 0.0)


@dataclass(frozen=True)
class Aggregation:
    """Posterior class probabilities per item and what the method learned about each annotator.

    ``confusion_counts`` are the expected judgments behind each confusion cell (annotator, true
    class, given label), without the prior's pseudo-counts: how much evidence each estimate rests on.
    """

    method: Method
    posterior: FloatArray  # (items, classes), rows sum to 1
    annotator_accuracy: FloatArray  # (annotators,) estimated probability of a correct label
    confusion: FloatArray | None  # (annotators, true class, given label); None for majority vote
    prior: FloatArray  # (classes,)
    log_likelihood: float | None  # marginal log-likelihood of the judgments; None for majority vote
    iterations: int
    converged: bool
    confusion_counts: FloatArray | None = None  # (annotators, true class, given label) expected judgments
    confusion_prior: ConfusionPrior | None = None  # None for majority vote

    @property
    def labels(self) -> IntArray:
        """Most probable class per item (ties go to the lowest code)."""
        labels: IntArray = self.posterior.argmax(axis=1)
        return labels


@dataclass(frozen=True)
class Rate:
    """An estimated proportion with the evidence behind it: ``n`` (expected) items and a 95% interval."""

    estimate: float
    n: float
    low: float
    high: float

    def __str__(self) -> str:
        return f"{self.estimate:.3f} (n={self.n:.0f}, 95% {self.low:.2f} to {self.high:.2f})"

    def to_dict(self) -> dict[str, float]:
        return {"estimate": self.estimate, "n": self.n, "low": self.low, "high": self.high}


def beta_interval(successes: float, trials: float, *, prior_successes: float = 1.0, prior_failures: float = 1.0,
                  level: float = 0.95) -> tuple[float, float]:
    """Equal-tailed interval of the Beta(prior_successes + k, prior_failures + n - k) posterior of a proportion.

    With a Beta(1/2, 1/2) prior it is the Jeffreys interval (Brown, Cai & DasGupta, 2001).
    """
    from scipy.stats import beta

    a = prior_successes + successes
    b = prior_failures + max(trials - successes, 0.0)
    tail = (1 - level) / 2
    return float(beta.ppf(tail, a, b)), float(beta.ppf(1 - tail, a, b))


def cell_rate(counts: FloatArray, pseudo: FloatArray, cell: int) -> Rate:
    """The MAP estimate of one cell of a confusion row under Dirichlet(1 + pseudo), with its marginal Beta interval.

    ``counts`` and ``pseudo`` are one row's (expected) judgments and pseudo-counts per given label.
    """
    n = float(counts.sum())
    total = n + float(pseudo.sum())
    k = float(counts[cell])
    estimate = (k + float(pseudo[cell])) / total if total > 0 else float("nan")
    low, high = beta_interval(k, n, prior_successes=1 + float(pseudo[cell]), prior_failures=1 + float(pseudo.sum() - pseudo[cell]))
    if not math.isnan(estimate):
        low, high = min(low, estimate), max(high, estimate)
    return Rate(estimate, n, low, high)


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


def _item_groups(i: IntArray, code: IntArray, n_items: int, fixed: IntArray) -> tuple[IntArray, IntArray]:
    """Items with the same judgments (the same multiset of (annotator, label) codes) and the same known answer, grouped.

    Returns each item's group (0..G-1) and one item of each group. Items alike in this way get the same
    posterior at every EM step (from the same start), so EM over one item per group, weighted by the
    group's total weight, is the same EM with the same sums; with binary presence votes from a few
    annotators there are a few hundred groups among hundreds of thousands of items. Where they fit in 62
    bits, each item's count, known answer and sorted codes are the digits of one integer, grouped in one pass;
    otherwise the grouping refines position by position through the sorted codes.
    """
    order = np.lexsort((code, i))
    codes = code[order]
    per_item = np.bincount(i, minlength=n_items)
    start = np.concatenate([[0], np.cumsum(per_item)[:-1]])
    longest = int(per_item.max(initial=0))
    n_codes = int(code.max()) + 1
    first_key = per_item * (int(fixed.max(initial=-1)) + 2) + fixed + 1
    if math.log2(float(first_key.max(initial=0)) + 1) + longest * math.log2(n_codes + 1) < 62:
        key = first_key.astype(np.int64)
        for p in range(longest):  # digit p: the item's p-th code + 1, or 0 past its last (every key has the same digits)
            at = np.nonzero(per_item > p)[0]
            key *= n_codes + 1
            key[at] += codes[start[at] + p] + 1
        _, first, group = np.unique(key, return_index=True, return_inverse=True)
        return group.reshape(-1).astype(np.int64), first.astype(np.int64)
    group = np.unique(first_key, return_inverse=True)[1].reshape(-1).astype(np.int64)
    for p in range(longest):
        at = np.nonzero(per_item > p)[0]  # items of a group all have the same count: groups split, never merge
        _, again = np.unique(group[at] * n_codes + codes[start[at] + p], return_inverse=True)
        group[at] = again.reshape(-1) + int(group.max()) + 1
    _, first, group = np.unique(group, return_index=True, return_inverse=True)
    return group.reshape(-1).astype(np.int64), first.astype(np.int64)


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
    tol: float = 1e-8,
    max_iter: int = 1000,
    prior: ConfusionPrior = DEFAULT_PRIOR,
    item_weights: npt.ArrayLike | None = None,
    start: tuple[FloatArray, FloatArray] | None = None,
) -> Aggregation:
    """Dawid & Skene (1979) EM with a Dirichlet prior, started from majority vote (or from ``start``).

    The full model learns a confusion matrix per annotator; ``one_coin`` learns one accuracy per
    annotator (errors spread evenly over the other labels), which needs far fewer judgments per
    person. ``known`` fixes check items to their known answer throughout.

    ``prior`` (see :class:`ConfusionPrior`) keeps a label seen a few times from becoming a class
    of its own: without it, a typo ("strok" once among many "stroke") can take a region from a
    clear two-of-three majority, because the one annotator who typed it looks perfectly reliable
    on it and the other two perfectly wrong. The start is majority vote's shares; each EM step
    raises the log posterior, and iterations stop when it gains less than ``tol`` relative to its
    size (or at ``max_iter``; ``converged`` says which). ``item_weights`` lets one item stand for
    several identical ones (same judges, same labels), e.g. the many concepts nobody named in a region.
    ``start`` = (confusion (annotators, true, given), class shares) of an earlier fit on nearly the same
    judgments: the first posterior is its E-step instead of the vote shares, so after one more label EM
    needs a few iterations instead of many. ``tol`` only stops the loop when an iteration gains little: a
    warm start can stop at a point measurably apart from a cold one (3.5e-3 in posterior on a simulated
    crowd), so shown figures use the cold start. A start whose shapes do not fit these judgments is ignored.

    Reference: Dawid & Skene (1979), Applied Statistics 28(1):20-28; MAP-EM with Dirichlet priors
    as in Raykar et al. (2010), JMLR 11:1297-1322 (section 2.6, from memory).
    """
    i, a, y = _check(items, annotators, labels, n_classes)
    if prior.strength < 0 or prior.class_count < 0 or not 0 < prior.accuracy < 1:
        raise InvalidInputError(f"the prior needs strength >= 0, class_count >= 0 and 0 < accuracy < 1; got {prior}.")
    k = n_classes
    n_items, n_ann = int(i.max()) + 1, int(a.max()) + 1
    fixed = _known_array(known, n_items, k)
    w = np.ones(n_items) if item_weights is None else np.asarray(item_weights, dtype=np.float64)
    if w.shape != (n_items,) or not np.all(np.isfinite(w)) or w.min() < 0:
        raise InvalidInputError(f"item_weights must be {n_items} finite non-negative numbers, one per item.")
    # EM over one item per group of alike items (same judgments, same known answer), weighted: the same sums.
    group, one = _item_groups(i, a * k + y, n_items, fixed)
    if len(one) < n_items:
        is_one = np.zeros(n_items, dtype=bool)
        is_one[one] = True
        kept = is_one[i]
        i, a, y = group[i[kept]], a[kept], y[kept]
        w, fixed, n_items = np.bincount(group, weights=w, minlength=len(one)).astype(np.float64), fixed[one], len(one)
    # S[(annotator, label), item] = number of such judgments; M-step and E-step are products with it.
    s = sparse.csr_matrix((np.ones(len(i)), (a * k + y, i)), shape=(n_ann * k, n_items))
    st = s.T.tocsr()
    per_ann = np.bincount(a, weights=w[i], minlength=n_ann)
    pseudo = prior.pseudo_counts(k) + 1e-10  # the floor stands in for crowd-kit's clipping when there is no prior
    if start is not None and start[0].shape == (n_ann, k, k) and start[1].shape == (k,) and np.all(start[0] > 0) and np.all(start[1] > 0):
        log_start = np.log(start[1]) + np.asarray(st @ np.log(start[0]).transpose(0, 2, 1).reshape(n_ann * k, k))
        post = _clamp(_log_norm(log_start)[0], fixed)
    else:
        post = _clamp(_normalise_rows(_votes(i, y, n_items, k)), fixed)
    obj_old = -np.inf
    converged = False
    it = 0
    counts = np.zeros((n_ann, k, k))
    for it in range(1, max_iter + 1):  # noqa: B007  (the count is read after the loop)
        weighted = post * w[:, None]
        class_total = weighted.sum(axis=0) + prior.class_count
        pi = class_total.clip(min=1e-12) / class_total.clip(min=1e-12).sum()
        log_prior = prior.class_count * float(np.log(pi).sum())
        counts = np.asarray(s @ weighted).reshape(n_ann, k, k).transpose(0, 2, 1)  # (ann, true, given) expected judgments
        if one_coin:
            right = np.einsum("att->a", counts)
            p = (right + prior.strength * prior.accuracy + 1e-10) / (per_ann + prior.strength + 2e-10)
            log_right, log_wrong = np.log(p), np.log((1 - p) / (k - 1))
            log_prior += float((prior.strength * prior.accuracy * log_right + prior.strength * (1 - prior.accuracy) * log_wrong).sum())
            log_post = np.log(pi) + np.bincount(i, weights=log_wrong[a], minlength=n_items)[:, None]
            log_post += np.bincount(i * k + y, weights=(log_right - log_wrong)[a], minlength=n_items * k).reshape(n_items, k)
        else:
            smoothed = counts + pseudo
            confusion = smoothed / smoothed.sum(axis=2, keepdims=True)
            log_conf = np.log(confusion)
            log_prior += float((pseudo * log_conf).sum())
            log_post = np.log(pi) + np.asarray(st @ log_conf.transpose(0, 2, 1).reshape(n_ann * k, k))
        post, norm = _log_norm(log_post)
        post = _clamp(post, fixed)
        obj = float(norm @ w) + log_prior
        if abs(obj - obj_old) <= tol * max(1.0, abs(obj)):
            converged = True
            break
        obj_old = obj
    ll = float(norm @ w)
    if one_coin:
        confusion = np.broadcast_to(((1 - p) / (k - 1))[:, None, None], (n_ann, k, k)).copy()
        confusion[:, np.arange(k), np.arange(k)] = p[:, None]
        accuracy = p
    else:
        accuracy = np.einsum("k,akk->a", pi, confusion)
    return Aggregation("one-coin" if one_coin else "dawid-skene", post[group] if len(post) < len(group) else post, accuracy, confusion, pi, ll, it, converged, counts, prior)


def aggregate(items: npt.ArrayLike, annotators: npt.ArrayLike, labels: npt.ArrayLike, *, n_classes: int, method: Method, known: Mapping[int, int] | None = None,
              prior: ConfusionPrior = DEFAULT_PRIOR, tol: float = 1e-8, max_iter: int = 1000, item_weights: npt.ArrayLike | None = None,
              start: tuple[FloatArray, FloatArray] | None = None) -> Aggregation:
    """Run the named method: ``majority``, ``dawid-skene`` (full confusion matrices) or ``one-coin``.

    ``prior``, ``tol``, ``max_iter``, ``item_weights`` and ``start`` go to :func:`dawid_skene`; majority vote has none
    (and counts every item once).
    """
    if method == "majority":
        return majority_vote(items, annotators, labels, n_classes=n_classes, known=known)
    if method in ("dawid-skene", "one-coin"):
        return dawid_skene(items, annotators, labels, n_classes=n_classes, one_coin=method == "one-coin", known=known, prior=prior, tol=tol, max_iter=max_iter,
                           item_weights=item_weights, start=start)
    raise InvalidInputError(f"unknown aggregation method {method!r}; choose one of {', '.join(METHODS)}.")
