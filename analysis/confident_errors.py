"""Confident errors: wrong predictions made with high confidence, grouped by what went wrong
(true class -> predicted class), with the concepts found in them far more often than in images of
the true class the model gets right. Those are the concepts that lead the model astray."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .association import associate
from .concept_table import ConceptTable
from .errors import InvalidInputError


@dataclass(frozen=True)
class SuspectConcept:
    concept: str
    in_errors: int  # confident errors of the group that show it
    error_rate: float  # in_errors / group size
    correct_rate: float  # among correctly predicted images of the true class
    p_value: float  # one-sided Fisher: more common in the errors than in the correct images
    q_value: float


@dataclass(frozen=True)
class ErrorGroup:
    true_class: str
    predicted_class: str
    images: list[int]  # most confident first
    mean_confidence: float
    correct_reference: int  # correctly predicted images of the true class, the comparison group
    suspects: list[SuspectConcept]  # most telling first


@dataclass(frozen=True)
class ConfidentErrors:
    threshold: float
    n_images: int
    n_errors: int
    n_confident: int
    groups: list[ErrorGroup]  # largest first


def confident_errors(table: ConceptTable, *, threshold: float = 0.8, top: int = 8) -> ConfidentErrors:
    """Wrong predictions at or above ``threshold`` confidence, grouped, with their suspect concepts.

    Within a group, each concept's rate among its errors is compared with its rate among the
    correctly predicted images of the same true class (one-sided Fisher's exact test);
    q-values adjust over every concept and group tested.
    """
    if not 0 <= threshold <= 1:
        raise InvalidInputError(f"threshold must be a confidence between 0 and 1, e.g. 0.8; got {threshold}.")
    meta, presence = table.meta, table.presence.to_numpy(dtype=bool)
    wrong = ~meta["correct"].to_numpy()
    sure = wrong & (meta["confidence"].to_numpy() >= threshold)
    truth = meta["true_class"].astype(str).to_numpy()
    pred = meta["predicted_class"].astype(str).to_numpy()
    cells = sorted({(t, p) for t, p in zip(truth[sure], pred[sure])})
    tests = []  # (group index, concept index, in_errors, error_rate, correct_rate, p)
    groups = []
    for g, (t, p) in enumerate(cells):
        members = sure & (truth == t) & (pred == p)
        ref = (~wrong) & (truth == t)
        n_e, n_r = int(members.sum()), int(ref.sum())
        e_counts = presence[members].sum(axis=0)
        r_counts = presence[ref].sum(axis=0)
        for c in np.nonzero(e_counts)[0]:
            # Among images that are errors of this group or correct images of t: do images with the concept hold the errors more?
            tests.append((g, int(c), int(e_counts[c]), e_counts[c] / n_e, r_counts[c] / n_r if n_r else float("nan"),
                          (e_counts[c], e_counts[c] + r_counts[c], n_e, n_e + n_r)))
        order = np.argsort(-meta["confidence"].to_numpy()[members], kind="stable")
        groups.append((t, p, [int(i) for i in meta.index[members][order]], float(meta["confidence"].to_numpy()[members].mean()), n_r))
    counts = np.array([x[5] for x in tests], dtype=np.float64).reshape(len(tests), 4)
    found = associate(counts[:, 0], counts[:, 1], counts[:, 2], counts[:, 3])
    suspects: dict[int, list[SuspectConcept]] = {g: [] for g in range(len(cells))}
    for (g, ci, k, er, cr, _), pv, qv in zip(tests, found.p_value, found.q_value):
        suspects[g].append(SuspectConcept(table.concepts[ci], k, float(er), float(cr), float(pv), float(qv)))
    out = [
        ErrorGroup(t, p, images, conf, n_r, sorted(suspects[g], key=lambda s: (s.p_value, -s.error_rate, s.concept))[:top])
        for g, (t, p, images, conf, n_r) in enumerate(groups)
    ]
    out.sort(key=lambda e: (-len(e.images), e.true_class, e.predicted_class))
    return ConfidentErrors(threshold, len(meta), int(wrong.sum()), int(sure.sum()), out)
