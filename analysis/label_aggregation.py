"""Aggregate long-form judgments with a named method and describe the result as plain data."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from .errors import InvalidInputError
from .long_labels import LongLabels
from .reliability import Aggregation, Method, Rate, aggregate, cell_rate


def known_codes(labels: LongLabels, known: Mapping[str, str]) -> dict[int, int]:
    """Check-item answers by name -> codes; names the item or label that does not occur."""
    items = {v: i for i, v in enumerate(labels.items)}
    classes = {v: i for i, v in enumerate(labels.classes)}
    out = {}
    for item, answer in known.items():
        if item not in items:
            raise InvalidInputError(f"check item {item!r} does not occur in the labels; fix its name or drop it.")
        if answer not in classes:
            raise InvalidInputError(f"the known answer {answer!r} for item {item!r} is not a label anyone used; known answers must be among {list(labels.classes)}.")
        out[items[item]] = classes[answer]
    return out


def accuracy_rate(agg: Aggregation, labels: LongLabels, annotator: int) -> Rate:
    """How often one annotator gives the right label, with the (expected) judgments behind it and a 95% interval.

    Dawid-Skene: expected right and wrong judgments under the posterior, with its prior's pseudo-counts
    (MAP estimate, Beta posterior interval); majority vote: agreement with the winning label, uniform prior.
    """
    if agg.confusion_counts is not None and agg.confusion_prior is not None:
        counts = agg.confusion_counts[annotator] if annotator < len(agg.confusion_counts) else np.zeros((1, 1))
        right = float(np.trace(counts))
        row = np.array([float(counts.sum()) - right, right])
        p = agg.confusion_prior
        return cell_rate(row, np.array([p.strength * (1 - p.accuracy), p.strength * p.accuracy]), 1)
    mine = labels.annotator_codes == annotator
    hits = float((agg.labels[labels.item_codes[mine]] == labels.label_codes[mine]).sum())
    return cell_rate(np.array([float(mine.sum()) - hits, hits]), np.zeros(2), 1)


def aggregate_labels(labels: LongLabels, *, method: Method, known: Mapping[str, str] | None = None, threshold: float = 0.0) -> tuple[Aggregation, dict[str, Any]]:
    """Run ``method`` and return the result with a JSON-ready summary (items, annotators, model)."""
    if len(labels.classes) < 2:
        raise InvalidInputError(f"everybody used the single label {labels.classes[0]!r}; aggregation needs at least two labels.")
    # Items nobody judged still get a row (posterior = prior), so codes cover every item.
    agg = aggregate(labels.item_codes, labels.annotator_codes, labels.label_codes, n_classes=len(labels.classes), method=method, known=known_codes(labels, known or {}))
    n_items = len(labels.items)
    post = np.vstack([agg.posterior, np.tile(agg.prior, (n_items - len(agg.posterior), 1))]) if len(agg.posterior) < n_items else agg.posterior
    ratings = np.bincount(labels.item_codes, minlength=n_items)
    per_ann = np.bincount(labels.annotator_codes, minlength=len(labels.annotators))
    best = post.argmax(axis=1)
    items = [
        {
            "item": name,
            "ratings": int(ratings[u]),
            "label": labels.classes[best[u]] if ratings[u] and post[u, best[u]] >= threshold else None,
            "probability": float(post[u, best[u]]),
            "posterior": {c: float(p) for c, p in zip(labels.classes, post[u])},
        }
        for u, name in enumerate(labels.items)
    ]
    annotators = []
    for k, name in enumerate(labels.annotators):
        acc = accuracy_rate(agg, labels, k)
        row: dict[str, Any] = {"annotator": name, "judgments": int(per_ann[k]), "accuracy": acc.estimate, "accuracy_n": acc.n,
                               "accuracy_interval": [acc.low, acc.high]}
        if agg.confusion is not None:
            row["confusion"] = {t: {g: float(agg.confusion[k, ti, gi]) for gi, g in enumerate(labels.classes)} for ti, t in enumerate(labels.classes)}
        annotators.append(row)
    summary = {
        "method": agg.method,
        "classes": list(labels.classes),
        "prior": {c: float(p) for c, p in zip(labels.classes, agg.prior)},
        "confusion_prior": {**agg.confusion_prior.to_dict(), "description": agg.confusion_prior.describe()} if agg.confusion_prior else None,
        "iterations": agg.iterations,
        "converged": agg.converged,
        "log_likelihood": agg.log_likelihood,
        "check_items": len(known or {}),
        "threshold": threshold,
        "items": items,
        "annotators": annotators,
    }
    return agg, summary
