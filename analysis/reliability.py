"""Annotator reliability and label aggregation by Dawid-Skene EM over per-annotator confusion matrices."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from .errors import InvalidInputError


@dataclass(frozen=True)
class DawidSkeneResult:
    """Posterior class probabilities per item and each annotator's estimated confusion matrix."""

    posterior: npt.NDArray[np.float64]  # (items, classes)
    confusion: npt.NDArray[np.float64]  # (annotators, true class, given label), rows sum to 1
    prior: npt.NDArray[np.float64]  # (classes,)
    log_likelihood: float
    iterations: int
    converged: bool

    @property
    def accuracy_score(self) -> npt.NDArray[np.float64]:
        """Each annotator's estimated accuracy: sum_k prior_k * confusion[a, k, k]."""
        return np.einsum("k,akk->a", self.prior, self.confusion)


def dawid_skene(
    items: npt.NDArray[np.int64],
    annotators: npt.NDArray[np.int64],
    labels: npt.NDArray[np.int64],
    *,
    n_classes: int,
    tol: float = 1e-6,
    max_iter: int = 500,
    smoothing: float = 0.01,
) -> DawidSkeneResult:
    """Dawid & Skene (1979) EM on judgments given as three equal-length code arrays.

    Starts from the majority-vote shares and iterates until the log-likelihood gains less
    than ``tol`` (reported as ``converged``) or ``max_iter`` is reached. ``smoothing`` adds
    a small pseudo-count to each confusion cell so an unseen label never gets probability 0.
    """
    items, annotators, labels = (np.asarray(v, dtype=np.int64) for v in (items, annotators, labels))
    if not (items.shape == annotators.shape == labels.shape) or items.ndim != 1 or len(items) == 0:
        raise InvalidInputError("items, annotators and labels must be equal-length, non-empty 1-D code arrays.")
    if labels.min() < 0 or labels.max() >= n_classes:
        raise InvalidInputError(f"labels must be codes 0..{n_classes - 1}; got {labels.min()}..{labels.max()}.")
    n_items, n_ann = int(items.max()) + 1, int(annotators.max()) + 1
    post = np.zeros((n_items, n_classes))
    np.add.at(post, (items, labels), 1.0)
    post /= post.sum(axis=1, keepdims=True).clip(min=1e-12)
    ll_old = -np.inf
    converged = False
    it = 0
    for it in range(1, max_iter + 1):
        prior = post.mean(axis=0).clip(min=1e-12)
        prior /= prior.sum()
        counts = np.full((n_ann, n_classes, n_classes), smoothing)
        np.add.at(counts, (annotators, slice(None), labels), post[items])
        confusion = counts / counts.sum(axis=2, keepdims=True)
        log_post = np.tile(np.log(prior), (n_items, 1))
        np.add.at(log_post, items, np.log(confusion[annotators, :, labels]))
        top = log_post.max(axis=1, keepdims=True)
        norm = top[:, 0] + np.log(np.exp(log_post - top).sum(axis=1))
        post = np.exp(log_post - norm[:, None])
        ll = float(norm.sum())
        if abs(ll - ll_old) < tol:
            converged = True
            break
        ll_old = ll
    return DawidSkeneResult(post, confusion, prior, ll, it, converged)
