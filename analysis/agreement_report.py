"""One agreement report over long-form judgments: alpha with its interval, Fleiss where it applies,
Cohen per annotator pair, each annotator's agreement with the others, and the most disputed items."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from itertools import combinations
from typing import Any

import numpy as np

from .agreement import alpha_with_interval, cohen_kappa, fleiss_kappa
from .errors import InvalidInputError
from .long_labels import LongLabels


@dataclass(frozen=True)
class PairKappa:
    first: str
    second: str
    n_common: int
    kappa: float | None
    note: str = ""


@dataclass(frozen=True)
class AnnotatorAgreement:
    annotator: str
    judgments: int
    agreement_with_others: float | None  # share of co-raters giving the same label, averaged over their judgments
    mean_kappa: float | None  # mean Cohen's kappa over the pairs where it is defined


@dataclass(frozen=True)
class DisputedItem:
    item: str
    ratings: int
    top_share: float
    labels: dict[str, int]


@dataclass(frozen=True)
class AgreementReport:
    n_items: int
    n_annotators: int
    n_judgments: int
    n_pairable: int  # items rated by two or more annotators; alpha uses only these
    alpha: float | None
    alpha_interval: tuple[float, float] | None
    alpha_note: str
    fleiss: float | None
    fleiss_note: str
    pairs: list[PairKappa] = field(default_factory=list)
    annotators: list[AnnotatorAgreement] = field(default_factory=list)
    disputed: list[DisputedItem] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def _fleiss(counts: np.ndarray) -> tuple[float | None, str]:
    m = counts.sum(axis=1)
    rated = m[m > 0]
    if rated.min() != rated.max():
        return None, f"not applicable: items have between {int(rated.min())} and {int(rated.max())} ratings, and Fleiss' kappa needs the same number for every item (use alpha)."
    if rated[0] < 2:
        return None, "not applicable: every item has a single rating."
    try:
        return fleiss_kappa(counts[m > 0]), ""
    except InvalidInputError as exc:
        return None, f"undefined: {exc}"


def _pairs(labels: LongLabels, min_common: int) -> list[PairKappa]:
    out = []
    by_ann: dict[int, dict[int, int]] = {a: {} for a in range(len(labels.annotators))}  # annotator -> {item: label}
    for i, a, y in zip(labels.item_codes.tolist(), labels.annotator_codes.tolist(), labels.label_codes.tolist()):
        by_ann[a][i] = y
    for a, b in combinations(range(len(labels.annotators)), 2):
        common = sorted(by_ann[a].keys() & by_ann[b].keys())
        name_a, name_b = labels.annotators[a], labels.annotators[b]
        if len(common) < min_common:
            out.append(PairKappa(name_a, name_b, len(common), None, f"fewer than {min_common} items in common"))
            continue
        try:
            k = cohen_kappa([by_ann[a][i] for i in common], [by_ann[b][i] for i in common])
            out.append(PairKappa(name_a, name_b, len(common), k))
        except InvalidInputError as exc:
            out.append(PairKappa(name_a, name_b, len(common), None, str(exc)))
    return out


def agreement_report(labels: LongLabels, *, n_boot: int = 1000, seed: int = 0, top_disputed: int = 20, min_common: int = 5, pairwise: bool = True) -> AgreementReport:
    """Everything the agreement table shows, computed once from the judgments."""
    counts = labels.counts().astype(float)
    m = counts.sum(axis=1)
    pairable = int((m >= 2).sum())
    alpha, interval, note = alpha_with_interval(counts, n_boot=n_boot, seed=seed)
    fleiss, fleiss_note = _fleiss(counts)
    pairs = _pairs(labels, min_common) if pairwise else []

    i, a, y = labels.item_codes, labels.annotator_codes, labels.label_codes
    n_ann = len(labels.annotators)
    co = m[i] >= 2
    same = (counts[i[co], y[co]] - 1) / (m[i[co]] - 1)
    per = np.bincount(a[co], weights=same, minlength=n_ann)
    n_co = np.bincount(a[co], minlength=n_ann)
    n_all = np.bincount(a, minlength=n_ann)
    kappas: dict[str, list[float]] = {name: [] for name in labels.annotators}
    for p in pairs:
        if p.kappa is not None:
            kappas[p.first].append(p.kappa)
            kappas[p.second].append(p.kappa)
    annotators = [
        AnnotatorAgreement(name, int(n_all[k]), float(per[k] / n_co[k]) if n_co[k] else None, float(np.mean(kappas[name])) if kappas[name] else None)
        for k, name in enumerate(labels.annotators)
    ]

    top_share = np.where(m > 0, counts.max(axis=1) / np.maximum(m, 1), 1.0)
    order = [int(u) for u in np.lexsort((-m, top_share)) if m[u] >= 2][:top_disputed]
    disputed = [
        DisputedItem(labels.items[u], int(m[u]), float(top_share[u]), {labels.classes[c]: int(counts[u, c]) for c in np.nonzero(counts[u])[0]})
        for u in order
        if top_share[u] < 1.0
    ]
    return AgreementReport(len(labels.items), n_ann, len(labels), pairable, alpha, interval, note, fleiss, fleiss_note, pairs, annotators, disputed)
