"""Aggregate long-form judgments with a named method and describe the result as plain data."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from .errors import InvalidInputError
from .long_labels import LongLabels
from .reliability import Aggregation, Method, aggregate


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
        row: dict[str, Any] = {"annotator": name, "judgments": int(per_ann[k]), "accuracy": float(agg.annotator_accuracy[k])}
        if agg.confusion is not None:
            row["confusion"] = {t: {g: float(agg.confusion[k, ti, gi]) for gi, g in enumerate(labels.classes)} for ti, t in enumerate(labels.classes)}
        annotators.append(row)
    summary = {
        "method": agg.method,
        "classes": list(labels.classes),
        "prior": {c: float(p) for c, p in zip(labels.classes, agg.prior)},
        "iterations": agg.iterations,
        "converged": agg.converged,
        "log_likelihood": agg.log_likelihood,
        "check_items": len(known or {}),
        "threshold": threshold,
        "items": items,
        "annotators": annotators,
    }
    return agg, summary
