"""Count concept sets within each class, fast enough for a million images by hundreds of concepts.

Two engines give the same counts: ``count_itemsets`` (our own, below) and ``count_with_mlxtend``,
mlxtend's FP-growth over the concepts and one-hot class columns together, which is the slower
reference a test holds the fast engine to.

Single concepts and pairs are counted with sparse matrix products per class (X_k^T X_k). Larger
sets are counted level by level (Apriori: a set is a candidate only if all its subsets were
frequent in some class) on bit-packed columns whose rows are sorted by class, so one AND and one
popcount per 64 images count a candidate in every class at once.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy import sparse

from .errors import InvalidInputError

IntArray = npt.NDArray[np.int64]


@dataclass(frozen=True)
class ItemsetCounts:
    """Every concept set that reaches ``min_count`` images in at least one class, with its counts.

    ``itemsets[i]`` holds column indices (ascending); ``class_counts[i, k]`` is the number of images
    of class k that hold all of them; since each image has one class, the row sum is the set's total.
    """

    itemsets: list[tuple[int, ...]]
    class_counts: IntArray  # (sets, classes); 0 may also stand for "below min_count, not counted"
    class_sizes: IntArray  # (classes,)
    n_rows: int
    min_count: int
    totals: IntArray  # (sets,) images holding the set, whatever their class


def count_itemsets(x: sparse.spmatrix | sparse.sparray, y: npt.ArrayLike, *, n_classes: int, min_count: int, max_len: int) -> ItemsetCounts:
    """Count sets of up to ``max_len`` columns of the boolean matrix ``x`` (rows x columns) per class ``y``.

    Parameters
    ----------
    x
        Sparse boolean image-by-concept matrix.
    y
        Class code (0..n_classes-1) of each row.
    min_count
        A set is kept (and extended) when some class has at least this many rows holding it.
    max_len
        Largest set size.
    """
    y = np.asarray(y, dtype=np.int64)
    x = sparse.csr_matrix(x)
    n, _ = x.shape
    if y.shape != (n,):
        raise InvalidInputError(f"one class per row is needed; got {y.shape[0]} classes for {n} rows.")
    if max_len < 1:
        raise InvalidInputError(f"max_len must be at least 1; got {max_len}.")
    if min_count < 1:
        raise InvalidInputError(f"min_count must be at least 1; got {min_count}.")
    if n and (y.min() < 0 or y.max() >= n_classes):
        raise InvalidInputError(f"class codes must be 0..{n_classes - 1}.")
    x.data = np.ones_like(x.data, dtype=np.int32)
    x.sum_duplicates()
    x.data[:] = 1
    order = np.argsort(y, kind="stable")
    xs = x[order]
    bounds = np.searchsorted(y[order], np.arange(n_classes + 1))
    class_sizes = np.diff(bounds).astype(np.int64)

    # Singles: one product with the one-hot class matrix.
    onehot = sparse.csr_matrix((np.ones(n, dtype=np.int32), (np.arange(n), y[order])), shape=(n, n_classes))
    single = np.asarray((onehot.T @ xs).todense(), dtype=np.int64).T  # (columns, classes)
    keep1 = np.nonzero(single.max(axis=1) >= min_count)[0] if n_classes else np.array([], dtype=np.int64)
    itemsets: list[tuple[int, ...]] = [(int(a),) for a in keep1]
    counts: list[IntArray] = [single[keep1]]
    if max_len == 1 or len(keep1) < 2:
        return _result(itemsets, counts, class_sizes, n, min_count)

    # Pairs: per class, the co-occurrence of the kept columns.
    xf = sparse.csc_matrix(xs[:, keep1])
    blocks = [(xf[bounds[k] : bounds[k + 1]].T @ xf[bounds[k] : bounds[k + 1]]).tocsr() for k in range(n_classes)]
    frequent: set[tuple[int, int]] = set()
    for g in blocks:
        coo = sparse.triu(g, k=1).tocoo()
        hit = coo.data >= min_count
        frequent.update(zip(coo.row[hit].tolist(), coo.col[hit].tolist()))
    pairs = sorted(frequent)
    if pairs:
        a_idx = np.array([p[0] for p in pairs])
        b_idx = np.array([p[1] for p in pairs])
        pair_counts = np.column_stack([np.asarray(g[a_idx, b_idx]).ravel() for g in blocks]).astype(np.int64)
        itemsets += [(int(keep1[a]), int(keep1[b])) for a, b in pairs]
        counts.append(pair_counts)
    level: list[tuple[int, ...]] = list(pairs)  # in positions of keep1
    if max_len >= 3 and len(level) >= 2:
        packed, word_starts = _pack_by_class(xf, bounds)
        for _ in range(3, max_len + 1):
            candidates = _candidates(level)
            if not candidates:
                break
            found, found_counts = _count_candidates(packed, word_starts, candidates, min_count)
            if not found:
                break
            itemsets += [tuple(int(keep1[i]) for i in s) for s in found]
            counts.append(found_counts)
            level = found
    return _result(itemsets, counts, class_sizes, n, min_count)


def _result(itemsets: list[tuple[int, ...]], counts: list[IntArray], class_sizes: IntArray, n: int, min_count: int) -> ItemsetCounts:
    cc = np.vstack(counts).astype(np.int64) if counts else np.zeros((0, len(class_sizes)), np.int64)
    return ItemsetCounts(itemsets, cc, class_sizes, n, min_count, cc.sum(axis=1))  # every class was counted


def _pack_by_class(xf: sparse.csc_matrix, bounds: IntArray) -> tuple[npt.NDArray[np.uint64], IntArray]:
    """Columns as bit rows (columns x words); each class's rows start on a fresh 64-bit word."""
    sizes = np.diff(bounds)
    padded = (sizes + 63) // 64 * 64
    starts = np.concatenate([[0], np.cumsum(padded)[:-1]])
    row_class = np.repeat(np.arange(len(sizes)), sizes)
    position = starts[row_class] + (np.arange(bounds[-1]) - bounds[:-1][row_class])  # bit of each (sorted) row
    n_words = max(1, int(padded.sum() // 64))
    coo = xf.tocoo()
    bit = position[coo.row]
    packed = np.zeros((xf.shape[1], n_words), dtype=np.uint64)
    # Each (column, row) pair is one distinct bit, so adding the bit values is the same as OR-ing them.
    np.add.at(packed, (coo.col, bit // 64), np.left_shift(np.uint64(1), (bit % 64).astype(np.uint64)))
    return packed, (starts // 64).astype(np.int64)


def _candidates(level: list[tuple[int, ...]]) -> list[tuple[int, ...]]:
    """Apriori join: sets sharing all but their last item, kept when every subset one smaller is known."""
    known = set(level)
    by_prefix: dict[tuple[int, ...], list[int]] = defaultdict(list)
    for s in level:
        by_prefix[s[:-1]].append(s[-1])
    out = []
    for prefix, lasts in by_prefix.items():
        lasts.sort()
        for i, a in enumerate(lasts):
            for b in lasts[i + 1 :]:
                cand = (*prefix, a, b)
                if all(cand[:j] + cand[j + 1 :] in known for j in range(len(cand) - 2)):
                    out.append(cand)
    return out


def _count_candidates(packed: npt.NDArray[np.uint64], word_starts: IntArray, candidates: list[tuple[int, ...]], min_count: int) -> tuple[list[tuple[int, ...]], IntArray]:
    """Per-class counts of the candidates that reach ``min_count`` in some class."""
    by_prefix: dict[tuple[int, ...], list[int]] = defaultdict(list)
    for c in candidates:
        by_prefix[c[:-1]].append(c[-1])
    found: list[tuple[int, ...]] = []
    found_counts: list[IntArray] = []
    for prefix, lasts in by_prefix.items():
        mask = packed[prefix[0]].copy()
        for i in prefix[1:]:
            mask &= packed[i]
        ext = np.array(lasts)
        for start in range(0, len(ext), 256):  # bounded memory: 256 x words at a time
            chunk = ext[start : start + 256]
            per_word = np.bitwise_count(packed[chunk] & mask[None, :])
            per_class = np.add.reduceat(per_word, word_starts, axis=1, dtype=np.int64)
            hit = per_class.max(axis=1) >= min_count
            found += [(*prefix, int(e)) for e in chunk[hit]]
            found_counts.append(per_class[hit])
    return found, (np.vstack(found_counts) if found_counts else np.zeros((0, len(word_starts)), np.int64))


def count_with_mlxtend(x: sparse.spmatrix | sparse.sparray, y: npt.ArrayLike, *, n_classes: int, min_count: int, max_len: int) -> ItemsetCounts:
    """The same counts through mlxtend's FP-growth (class columns added to the concepts, as a script would)."""
    import pandas as pd
    from mlxtend.frequent_patterns import fpgrowth

    y = np.asarray(y, dtype=np.int64)
    x = sparse.csr_matrix(x).astype(bool)
    n, n_cols = x.shape
    concepts = pd.DataFrame(x.toarray(), columns=[f"c{i}" for i in range(n_cols)])
    onehot = pd.DataFrame(np.eye(n_classes, dtype=bool)[y], columns=[f"k{k}" for k in range(n_classes)])
    frequent = fpgrowth(pd.concat([concepts, onehot], axis=1), min_support=(min_count - 0.5) / n, use_colnames=True, max_len=max_len + 1)
    totals: dict[tuple[int, ...], int] = {}
    per_class: dict[tuple[int, ...], dict[int, int]] = defaultdict(dict)
    for items, support in zip(frequent["itemsets"], frequent["support"]):
        cols = tuple(sorted(int(i[1:]) for i in items if i.startswith("c")))
        ks = [int(i[1:]) for i in items if i.startswith("k")]
        count = int(round(support * n))
        if not cols or len(ks) > 1:
            continue
        if ks:
            per_class[cols][ks[0]] = count
        else:
            totals[cols] = count
    itemsets = sorted((s for s, cs in per_class.items() if max(cs.values()) >= min_count), key=lambda s: (len(s), s))
    cc = np.zeros((len(itemsets), n_classes), dtype=np.int64)
    for i, s in enumerate(itemsets):
        for k, c in per_class[s].items():
            cc[i, k] = c
    return ItemsetCounts(itemsets, cc, np.bincount(y, minlength=n_classes).astype(np.int64), n, min_count, np.array([totals[s] for s in itemsets], dtype=np.int64))
