"""One agreement report over long-form judgments: alpha with its interval, Fleiss where it applies,
Cohen per annotator pair, each annotator's agreement with the others, and the most disputed items."""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from itertools import combinations
from typing import Any

import numpy as np
import numpy.typing as npt
from scipy import sparse

from .agreement import alpha_with_interval, cohen_kappa_codes, fleiss_kappa
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


def _fleiss(counts: sparse.csr_matrix, m: np.ndarray) -> tuple[float | None, str]:
    rated = m[m > 0]
    if rated.min() != rated.max():
        return None, f"not applicable: items have between {int(rated.min())} and {int(rated.max())} ratings, and Fleiss' kappa needs the same number for every item (use alpha)."
    if rated[0] < 2:
        return None, "not applicable: every item has a single rating."
    try:
        return fleiss_kappa(counts[m > 0]), ""
    except InvalidInputError as exc:
        return None, f"undefined: {exc}"


def _co_rated(labels: LongLabels) -> tuple[npt.NDArray[np.int64], npt.NDArray[np.int64], npt.NDArray[np.int64], npt.NDArray[np.int64]]:
    """Every item's pairs of annotators (first < second) with their two labels, from the judgments alone.

    One label per annotator and item (the last one given, as in a table of annotators by items): memory grows with
    the pairs of judgments on the same item, not with annotators x items.
    """
    i, a, y = labels.item_codes, labels.annotator_codes, labels.label_codes
    key = a.astype(np.int64) * max(len(labels.items), 1) + i
    _, last_first = np.unique(key[::-1], return_index=True)
    keep = len(key) - 1 - last_first
    order = keep[np.lexsort((a[keep], i[keep]))]
    i, a, y = i[order], a[order], y[order]
    firsts, seconds, first_labels, second_labels = [], [], [], []
    for gap in range(1, int(np.bincount(i).max(initial=0))):  # the j-th and (j + gap)-th rater of the same item
        same = np.nonzero(i[gap:] == i[:-gap])[0]
        firsts.append(a[same])
        seconds.append(a[same + gap])
        first_labels.append(y[same])
        second_labels.append(y[same + gap])
    empty = np.zeros(0, dtype=np.int64)
    return tuple(np.concatenate(v).astype(np.int64) if v else empty for v in (firsts, seconds, first_labels, second_labels))  # type: ignore[return-value]


def _pairs(labels: LongLabels, min_common: int) -> list[PairKappa]:
    out = []
    n_ann = len(labels.annotators)
    first, second, y_first, y_second = _co_rated(labels)
    pair = first * n_ann + second
    order = np.argsort(pair, kind="stable")
    pair, y_first, y_second = pair[order], y_first[order], y_second[order]
    found, start, n_of = np.unique(pair, return_index=True, return_counts=True)
    at = {int(p): (int(s), int(n)) for p, s, n in zip(found.tolist(), start.tolist(), n_of.tolist())}
    for a, b in combinations(range(n_ann), 2):
        s, n_common = at.get(a * n_ann + b, (0, 0))
        name_a, name_b = labels.annotators[a], labels.annotators[b]
        if n_common < min_common:
            out.append(PairKappa(name_a, name_b, n_common, None, f"fewer than {min_common} items in common"))
            continue
        try:
            k = cohen_kappa_codes(y_first[s : s + n_common], y_second[s : s + n_common])
            out.append(PairKappa(name_a, name_b, n_common, k))
        except InvalidInputError as exc:
            out.append(PairKappa(name_a, name_b, n_common, None, str(exc)))
    return out


def agreement_report(labels: LongLabels, *, n_boot: int = 1000, seed: int = 0, top_disputed: int = 20, min_common: int = 5, pairwise: bool = True) -> AgreementReport:
    """Everything the agreement table shows, computed once from the judgments."""
    i, a, y = labels.item_codes, labels.annotator_codes, labels.label_codes
    k = max(len(labels.classes), 1)
    # Items x labels counts, sparse: an item uses a few of many labels.
    cells, cell_of, cell_count = np.unique(i * k + y, return_inverse=True, return_counts=True)
    counts = sparse.csr_matrix((cell_count.astype(float), (cells // k, cells % k)), shape=(len(labels.items), k))
    counts.sort_indices()
    m = np.bincount(i, minlength=len(labels.items)).astype(float)
    pairable = int((m >= 2).sum())
    alpha, interval, note = alpha_with_interval(counts, n_boot=n_boot, seed=seed)
    fleiss, fleiss_note = _fleiss(counts, m)
    pairs = _pairs(labels, min_common) if pairwise else []

    n_ann = len(labels.annotators)
    co = m[i] >= 2
    same = (cell_count[cell_of.reshape(-1)][co] - 1) / (m[i[co]] - 1)
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

    top_share = np.where(m > 0, counts.max(axis=1).toarray().ravel() / np.maximum(m, 1), 1.0)
    order = [int(u) for u in np.lexsort((-m, top_share)) if m[u] >= 2][:top_disputed]
    disputed = [
        DisputedItem(labels.items[u], int(m[u]), float(top_share[u]),
                     {labels.classes[c]: int(n) for c, n in zip(counts.indices[counts.indptr[u]:counts.indptr[u + 1]].tolist(),
                                                                counts.data[counts.indptr[u]:counts.indptr[u + 1]].tolist())})
        for u in order
        if top_share[u] < 1.0
    ]
    return AgreementReport(len(labels.items), n_ann, len(labels), pairable, alpha, interval, note, fleiss, fleiss_note, pairs, annotators, disputed)
