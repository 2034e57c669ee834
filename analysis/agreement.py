"""Agreement among annotators on nominal labels: Krippendorff's alpha, Fleiss' kappa, Cohen's kappa."""

from __future__ import annotations

import functools
from typing import Any, TypeAlias

import numpy as np
import numpy.typing as npt
from scipy import sparse

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


Counts: TypeAlias = Any
"""A units x values count table: a dense float array, or a scipy sparse matrix (a column per value, a few used per unit)."""


def _as_counts(counts: object) -> Counts:
    if sparse.issparse(counts):
        table = sparse.csr_matrix(counts, dtype=float)
        table.sum_duplicates()
        table.sort_indices()
        return table
    return np.asarray(counts, dtype=float)


def _row_sums(counts: Counts) -> npt.NDArray[np.float64]:
    return np.asarray(counts.sum(axis=1), dtype=float).ravel()


def _row_square_sums(counts: Counts) -> npt.NDArray[np.float64]:
    squared = counts.multiply(counts) if sparse.issparse(counts) else counts**2
    return np.asarray(squared.sum(axis=1), dtype=float).ravel()


def _pairable(counts: Counts) -> Counts:
    """Units x values count table, keeping only units with two or more ratings (the pairable ones)."""
    counts = _as_counts(counts)
    kept: Counts = counts[_row_sums(counts) >= 2]
    return kept


def _alpha_from_counts(counts: Counts) -> float:
    """Nominal alpha = 1 - (n - 1) * sum_u D_u / (n^2 - sum_c n_c^2), with D_u = (m_u^2 - sum_c n_uc^2) / (m_u - 1).

    This is the coincidence-matrix form with the sums taken per unit.
    """
    m = _row_sums(counts)
    d = (m**2 - _row_square_sums(counts)) / (m - 1)
    n_c = np.asarray(counts.sum(axis=0), dtype=float).ravel()
    n = n_c.sum()
    expected = n * n - (n_c**2).sum()
    if expected == 0:
        raise InvalidInputError("every rating has the same value; alpha is undefined (no variation to agree on).")
    return float(1 - (n - 1) * d.sum() / expected)


def krippendorff_alpha_nominal(ratings: npt.ArrayLike) -> float:
    """Krippendorff's alpha for nominal data with missing values (annotators x items).

    Units with fewer than two ratings are left out, as the coefficient defines.

    Reference: Krippendorff (2011), "Computing Krippendorff's Alpha-Reliability": the
    four-observer, twelve-unit example gives 0.743 (nominal).
    """
    return alpha_from_counts(unit_counts(ratings))


def unit_counts(ratings: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """Units x values table of how many annotators gave each value, from annotators x items ratings."""
    codes, k = _codes(ratings)
    if k == 0:
        raise InvalidInputError("ratings hold no values; give at least one unit rated twice.")
    n_units = codes.shape[1]
    unit = np.broadcast_to(np.arange(n_units), codes.shape)[codes >= 0]
    return np.bincount(unit * k + codes[codes >= 0], minlength=n_units * k).reshape(n_units, k).astype(float)


def alpha_from_counts(counts: npt.ArrayLike | sparse.csr_matrix) -> float:
    """Nominal alpha from a units x values count table, dense or sparse (missing ratings simply not counted)."""
    pairable = _pairable(_as_counts(counts))
    if pairable.shape[0] == 0:
        raise InvalidInputError("no unit has two or more ratings; alpha is undefined.")
    return _alpha_from_counts(pairable)


@functools.lru_cache(maxsize=4)
def _resample_weights(u: int, n_boot: int, seed: int) -> tuple[npt.NDArray[np.float64], ...]:
    """How often each of ``u`` units is drawn in each resample, in chunks of 64 resamples (small for many units).

    Each resample draws ``u`` unit indices uniformly with replacement and counts them: the same
    multinomial distribution as ``rng.multinomial(u, [1/u] * u)``, several times cheaper to draw.
    Kept for the last few sizes: alphas over the same units resample them with the same seed.
    """
    rng = np.random.default_rng(seed)
    chunks = []
    for start in range(0, n_boot, 64):
        rows = min(64, n_boot - start)
        picks = rng.integers(0, u, size=(rows, u)) + (np.arange(rows) * u)[:, None]
        w = np.bincount(picks.ravel(), minlength=rows * u).reshape(rows, u).astype(float)
        w.flags.writeable = False
        chunks.append(w)
    return tuple(chunks)


def _distinct_rows(table: Counts) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.int64]] | None:
    """The distinct rows of a table of whole counts and how many times each occurs (None when it is not whole counts).

    Each row becomes one integer and the integers are grouped (``np.unique(axis=0)`` sorts the rows as
    records instead, a hundred times slower): a narrow row's counts are the digits of its integer; a wide
    row (one column per value, few values used per unit) is first cut to its used columns and their counts.
    The distinct rows come back dense.
    """
    n_rows = table.shape[0]
    if sparse.issparse(table):
        values = table.data
        rows_at = np.repeat(np.arange(n_rows), np.diff(table.indptr))
        cols_at = table.indices.astype(np.int64)
    else:
        values = table[table != 0] if table.size else table.ravel()
        rows_at, cols_at = np.nonzero(table)
    whole_values = values.astype(np.int64)
    if n_rows == 0 or table.shape[1] == 0 or (len(values) and (whole_values.min() < 0 or not np.array_equal(whole_values, values))):
        return None
    top = (int(whole_values.max()) if len(values) else 0) + 1
    if table.shape[1] * np.log2(top + 1) < 62:
        digits = (table.toarray() if sparse.issparse(table) else table).astype(np.int64)
    else:  # the used (column, count) pairs of each row, padded with 0, as the row's digits
        used = np.bincount(rows_at, minlength=n_rows)
        width = max(int(used.max()), 1)
        slot = np.arange(len(rows_at)) - np.repeat(np.cumsum(used) - used, used)
        digits = np.zeros((n_rows, width), dtype=np.int64)
        digits[rows_at, slot] = cols_at * top + whole_values
        top = table.shape[1] * top
    base = top + 1
    if digits.shape[1] * np.log2(base) < 62:
        keys = digits @ (base ** np.arange(digits.shape[1], dtype=np.int64))
        _, first, share = np.unique(keys, return_index=True, return_counts=True)
    else:  # too many digits for one integer: group the rows' bytes
        seen: dict[bytes, int] = {}
        firsts: list[int] = []
        counts: list[int] = []
        for i, row in enumerate(digits):
            k = seen.setdefault(row.tobytes(), len(firsts))
            if k == len(firsts):
                firsts.append(i)
                counts.append(0)
            counts[k] += 1
        first, share = np.asarray(firsts), np.asarray(counts, dtype=np.int64)
    distinct = table[first]
    return (distinct.toarray() if sparse.issparse(distinct) else distinct), share


def alpha_bootstrap(counts: npt.ArrayLike | sparse.csr_matrix, *, n_boot: int = 1000, level: float = 0.95, seed: int = 0) -> tuple[float, float]:
    """Percentile bootstrap interval for nominal alpha, resampling units with replacement.

    Resampling whole units is common practice for agreement coefficients (Krippendorff's own
    bootstrap resamples pairable values instead); resamples without variation are skipped.

    Units with the same row of counts are interchangeable in alpha, and there are few such rows
    (with three raters and yes/no, at most ten) however many units there are. Drawing ``u`` units
    uniformly with replacement puts a multinomial number of draws on each distinct row, with
    probabilities its share of the units; that is what is drawn when the distinct rows are few, so a
    resample costs the number of distinct rows, not of units, and the interval is the units'
    bootstrap interval all the same. With many distinct rows every unit gets a weight per resample.
    """
    return _bootstrap_pairable(_pairable(_as_counts(counts)), n_boot=n_boot, level=level, seed=seed)


def _bootstrap_pairable(pairable: Counts, *, n_boot: int, level: float, seed: int) -> tuple[float, float]:
    """:func:`alpha_bootstrap` of a table already cut to its pairable units."""
    u = pairable.shape[0]
    if u < 2:
        raise InvalidInputError("a bootstrap interval needs at least two units rated twice or more.")
    grouped = _distinct_rows(pairable)
    if grouped is not None and len(grouped[0]) <= max(64, u // 4):
        return _bootstrap_rows(*grouped, n_boot=n_boot, level=level, seed=seed)
    # many distinct rows: a weight for every unit in every resample
    return _bootstrap_weighted(pairable, _resample_weights(u, n_boot, seed), level=level)


def _bootstrap_rows(rows: npt.NDArray[np.float64], share: npt.NDArray[np.int64], *, n_boot: int, level: float, seed: int) -> tuple[float, float]:
    """The bootstrap of units given as distinct rows of counts and how many units show each: multinomial draws per row."""
    u = int(share.sum())
    drawn = np.random.default_rng(seed).multinomial(u, share / u, size=n_boot).astype(float)  # (n_boot, distinct rows)
    return _bootstrap_weighted(rows, (drawn,), level=level)


def _bootstrap_weighted(x: Counts, weights: tuple[npt.NDArray[np.float64], ...], *, level: float) -> tuple[float, float]:
    m = _row_sums(x)
    d = (m**2 - _row_square_sums(x)) / (m - 1)
    # A wide table (a column per value, a few used per unit) is multiplied as a sparse one: only its used cells count.
    if sparse.issparse(x):
        wide = sparse.csr_array(x) if x.shape[1] > 16 and x.nnz < 0.1 * x.shape[0] * x.shape[1] else None
        x = x.toarray() if wide is None else x
    else:
        wide = sparse.csr_array(x) if x.shape[1] > 16 and np.count_nonzero(x) < 0.1 * x.size else None
    stats = []
    for w in weights:
        n_c = (wide.T @ w.T).T if wide is not None else w @ x
        n = n_c.sum(axis=1)
        expected = n * n - (n_c**2).sum(axis=1)
        ok = expected > 0
        stats.append(1 - (n[ok] - 1) * (w[ok] @ d) / expected[ok])
    values = np.concatenate(stats)
    if len(values) == 0:
        raise InvalidInputError("every bootstrap resample lacked variation; alpha has no interval here.")
    lo, hi = np.quantile(values, [(1 - level) / 2, (1 + level) / 2])
    return float(lo), float(hi)


def alpha_with_interval_of_rows(rows: npt.ArrayLike, share: npt.ArrayLike, *, n_boot: int = 1000, seed: int = 0
                                ) -> tuple[float | None, tuple[float, float] | None, str]:
    """:func:`alpha_with_interval` of a table given as its distinct rows of whole counts (each a unit, rated once or more)
    and how many units show each row: the same figures, at a cost that does not grow with the units.

    Rows in the order :func:`alpha_with_interval` groups them in (``np.lexsort(rows.T)``: by the last column first) draw
    the same resamples with the same seed.
    """
    table = np.asarray(rows, dtype=float).reshape(len(np.asarray(share)), -1)
    times = np.asarray(share, dtype=np.int64)
    pairable = (table.sum(axis=1) >= 2) & (times > 0)
    table, times = table[pairable], times[pairable]
    u = int(times.sum())
    try:
        if u == 0:
            raise InvalidInputError("no unit has two or more ratings; alpha is undefined.")
        m = table.sum(axis=1)
        d = (m**2 - (table**2).sum(axis=1)) / (m - 1)
        n_c = times @ table
        n = n_c.sum()
        expected = n * n - (n_c**2).sum()
        if expected == 0:
            raise InvalidInputError("every rating has the same value; alpha is undefined (no variation to agree on).")
        alpha = float(1 - (n - 1) * (times @ d) / expected)
        if not n_boot:
            return alpha, None, ""
        if u < 2:
            raise InvalidInputError("a bootstrap interval needs at least two units rated twice or more.")
        if len(table) > max(64, u // 4):  # as many distinct rows as units, nearly: the units' own resampling
            return alpha, _bootstrap_pairable(np.repeat(table, times, axis=0), n_boot=n_boot, level=0.95, seed=seed), ""
        return alpha, _bootstrap_rows(table, times, n_boot=n_boot, level=0.95, seed=seed), ""
    except InvalidInputError as exc:
        return None, None, str(exc)


def alpha_with_interval(counts: npt.ArrayLike | sparse.csr_matrix, *, n_boot: int = 1000, seed: int = 0) -> tuple[float | None, tuple[float, float] | None, str]:
    """Alpha, its bootstrap interval (None when ``n_boot`` is 0) and, where alpha is undefined, why (else "")."""
    try:
        pairable = _pairable(_as_counts(counts))
        if pairable.shape[0] == 0:
            raise InvalidInputError("no unit has two or more ratings; alpha is undefined.")
        alpha = _alpha_from_counts(pairable)
        return alpha, (_bootstrap_pairable(pairable, n_boot=n_boot, level=0.95, seed=seed) if n_boot else None), ""
    except InvalidInputError as exc:
        return None, None, str(exc)


def fleiss_kappa(table: npt.ArrayLike | sparse.csr_matrix) -> float:
    """Fleiss' kappa from an items x categories table of rating counts (same raters per item), dense or sparse.

    Reference: Fleiss (1971), "Measuring nominal scale agreement among many raters".
    """
    t = _as_counts(table)
    if t.ndim != 2 or t.shape[0] < 1:
        raise InvalidInputError("table must be items x categories counts.")
    n = _row_sums(t)
    if not np.all(n == n[0]) or n[0] < 2:
        raise InvalidInputError("Fleiss' kappa needs the same number (at least 2) of ratings for every item; use Krippendorff's alpha instead.")
    r = n[0]
    p_j = np.asarray(t.sum(axis=0), dtype=float).ravel() / t.sum()
    p_i = (_row_square_sums(t) - n) / (r * (r - 1))
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
    return cohen_kappa_codes(np.array([idx[u] for u in x.tolist()], dtype=np.int64), np.array([idx[v] for v in y.tolist()], dtype=np.int64))


def cohen_kappa_codes(x: npt.NDArray[np.int64], y: npt.NDArray[np.int64]) -> float:
    """:func:`cohen_kappa` of two equal-length, non-empty arrays of category codes (0, 1, ...)."""
    if x.shape != y.shape or x.ndim != 1 or len(x) == 0:
        raise InvalidInputError("a and b must be equal-length, non-empty 1-D label sequences.")
    k = int(max(x.max(), y.max())) + 1
    p_x = np.bincount(x, minlength=k) / len(x)
    p_y = np.bincount(y, minlength=k) / len(y)
    p_o = float(np.count_nonzero(x == y)) / len(x)
    p_e = float(p_x @ p_y)
    if p_e == 1:
        raise InvalidInputError("both annotators used one and the same category throughout; kappa is undefined.")
    return float((p_o - p_e) / (1 - p_e))
