"""Agreement among annotators on nominal labels: Krippendorff's alpha, Fleiss' kappa, Cohen's kappa."""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from .errors import InvalidInputError


def _codes(ratings: npt.ArrayLike) -> tuple[npt.NDArray[np.int64], int]:
    """Map an annotators x items array of labels (None/NaN = missing) to codes, -1 for missing."""
    arr = np.asarray(ratings, dtype=object)
    if arr.ndim != 2:
        raise InvalidInputError(f"ratings must be annotators x items; got {arr.ndim} dimension(s).")
    missing = np.vectorize(lambda v: v is None or (isinstance(v, float) and np.isnan(v)) or v == "", otypes=[bool])(arr)
    values = sorted({v for v in arr[~missing].tolist()}, key=str)
    index = {v: i for i, v in enumerate(values)}
    codes = np.full(arr.shape, -1, dtype=np.int64)
    codes[~missing] = [index[v] for v in arr[~missing].tolist()]
    return codes, len(values)


def krippendorff_alpha_nominal(ratings: npt.ArrayLike) -> float:
    """Krippendorff's alpha for nominal data with missing values (annotators x items).

    Units with fewer than two ratings are left out, as the coefficient defines.

    Reference: Krippendorff (2011), "Computing Krippendorff's Alpha-Reliability": the
    four-observer, twelve-unit example gives 0.743 (nominal).
    """
    codes, k = _codes(ratings)
    if k == 0:
        raise InvalidInputError("ratings hold no values; give at least one unit rated twice.")
    counts = np.zeros((codes.shape[1], k))
    for j in range(codes.shape[1]):
        col = codes[:, j]
        counts[j] = np.bincount(col[col >= 0], minlength=k)
    m = counts.sum(axis=1)
    counts = counts[m >= 2]
    m = m[m >= 2]
    if len(m) == 0:
        raise InvalidInputError("no unit has two or more ratings; alpha is undefined.")
    # Coincidence matrix o_ck = sum_u n_uc n_uk (c != k, or n_uc (n_uc - 1) on the diagonal) / (m_u - 1).
    o = np.einsum("uc,uk->ck", counts / (m - 1)[:, None], counts) - np.diag((counts / (m - 1)[:, None]).sum(0))
    n_c = o.sum(axis=1)
    n = n_c.sum()
    observed = n - np.trace(o)
    expected = (n * n - (n_c**2).sum()) / (n - 1)
    if expected == 0:
        raise InvalidInputError("every rating has the same value; alpha is undefined (no variation to agree on).")
    return float(1 - observed / expected)


def fleiss_kappa(table: npt.ArrayLike) -> float:
    """Fleiss' kappa from an items x categories table of rating counts (same raters per item).

    Reference: Fleiss (1971), "Measuring nominal scale agreement among many raters".
    """
    t = np.asarray(table, dtype=float)
    if t.ndim != 2 or t.shape[0] < 1:
        raise InvalidInputError("table must be items x categories counts.")
    n = t.sum(axis=1)
    if not np.all(n == n[0]) or n[0] < 2:
        raise InvalidInputError("Fleiss' kappa needs the same number (at least 2) of ratings for every item; use Krippendorff's alpha instead.")
    r = n[0]
    p_j = t.sum(axis=0) / t.sum()
    p_i = ((t * (t - 1)).sum(axis=1)) / (r * (r - 1))
    p_e = (p_j**2).sum()
    if p_e == 1:
        raise InvalidInputError("every rating is in one category; kappa is undefined.")
    return float((p_i.mean() - p_e) / (1 - p_e))


def cohen_kappa(a: npt.ArrayLike, b: npt.ArrayLike) -> float:
    """Cohen's kappa for two annotators' labels of the same items (Cohen, 1960)."""
    x, y = np.asarray(a, dtype=object), np.asarray(b, dtype=object)
    if x.shape != y.shape or x.ndim != 1 or len(x) == 0:
        raise InvalidInputError("a and b must be equal-length, non-empty 1-D label sequences.")
    cats = sorted(set(x.tolist()) | set(y.tolist()), key=str)
    idx = {c: i for i, c in enumerate(cats)}
    m = np.zeros((len(cats), len(cats)))
    for u, v in zip(x.tolist(), y.tolist()):
        m[idx[u], idx[v]] += 1
    m /= m.sum()
    p_o = np.trace(m)
    p_e = float(m.sum(1) @ m.sum(0))
    if p_e == 1:
        raise InvalidInputError("both annotators used one and the same category throughout; kappa is undefined.")
    return float((p_o - p_e) / (1 - p_e))
