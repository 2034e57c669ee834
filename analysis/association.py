"""How strongly a set of images goes with a class: counts, confidence, lift, one-sided Fisher p and
Benjamini-Hochberg q over a family of tests, vectorised.

Rules, questions, expectations and confident errors all ask "do images matching X hold class Y
more often than chance?"; this module is the one place that answers it.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
from scipy.special import betaln

FloatArray = npt.NDArray[np.float64]


@dataclass(frozen=True)
class Association:
    """One row per test of "images matching X => class Y", each array of shape (tests,).

    ``confidence`` is n_xy / n_x (0 where nothing matches), ``lift`` is confidence over the
    class's share n_y / n (0 where nothing matches or the class is empty), ``p_value`` the
    one-sided Fisher's exact p (1 where nothing matches) and ``q_value`` its Benjamini-Hochberg
    adjustment over all the tests given together (one family).
    """

    n_xy: FloatArray
    n_x: FloatArray
    n_y: FloatArray
    n: FloatArray
    confidence: FloatArray
    lift: FloatArray
    p_value: FloatArray
    q_value: FloatArray

    def __len__(self) -> int:
        return len(self.p_value)


def associate(n_xy: npt.ArrayLike, n_x: npt.ArrayLike, n_y: npt.ArrayLike, n: npt.ArrayLike) -> Association:
    """Confidence, lift, one-sided Fisher p and BH q for a family of "X => Y" tests from their counts.

    Parameters
    ----------
    n_xy
        Images matching X and of class Y, per test.
    n_x, n_y
        Images matching X; images of class Y.
    n
        Images in all (one number, or one per test).

    Example: 8 of the 10 images matching X are of Y, which holds 20 of 100 images:
    ``associate([8], [10], [20], 100).lift`` is ``[4.0]``.
    """
    xy, x, y, total = (np.array(v) for v in np.broadcast_arrays(*(np.asarray(v, dtype=np.float64) for v in (n_xy, n_x, n_y, n))))
    some = x > 0
    confidence = np.divide(xy, x, out=np.zeros_like(xy), where=some)
    share = np.divide(y, total, out=np.zeros_like(y), where=total > 0)
    lift = np.divide(confidence, share, out=np.zeros_like(confidence), where=some & (share > 0))
    p_value = np.ones_like(xy)
    if some.any():
        p_value[some] = fisher_greater(xy[some], x[some], y[some], total[some])
    return Association(xy, x, y, total, confidence, lift, p_value, benjamini_hochberg(p_value))


def associate_masks(matching: npt.ArrayLike, in_class: npt.ArrayLike) -> Association:
    """The same from boolean masks over the images: ``matching`` and ``in_class`` are (tests, images)."""
    m = np.atleast_2d(np.asarray(matching, dtype=bool))
    c = np.atleast_2d(np.asarray(in_class, dtype=bool))
    return associate((m & c).sum(axis=1), m.sum(axis=1), c.sum(axis=1), m.shape[1])


def benjamini_hochberg(p: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """Benjamini & Hochberg (1995) adjusted p-values (q-values): p * m / rank, made monotone, capped at 1."""
    p = np.asarray(p, dtype=np.float64)
    m = len(p)
    if m == 0:
        return p.copy()
    order = np.argsort(p, kind="stable")
    scaled = p[order] * m / np.arange(1, m + 1)
    q = np.minimum.accumulate(scaled[::-1])[::-1].clip(max=1.0)
    out = np.empty(m)
    out[order] = q
    return out


def _log_comb(n: npt.NDArray[np.float64], k: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
    out: npt.NDArray[np.float64] = -np.log(n + 1) - betaln(n - k + 1, k + 1)
    return out


def fisher_greater(n_xy: npt.ArrayLike, n_x: npt.ArrayLike, n_y: npt.ArrayLike, n: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """One-sided Fisher's exact p-value that images with the concept set hold the class more often than chance.

    It is the hypergeometric tail P(X >= n_xy) for X images of the class among the n_x with the set,
    drawn from n images of which n_y have the class. Vectorised over rules: from the exact
    probability of one count, the tail is summed away from the distribution's mode with the
    ratio of neighbouring probabilities, until the terms no longer change the sum (scipy's own
    survival function sums each rule in a Python loop, which is slow for thousands of rules).
    """
    k0, nx, ny, nn = (np.array(v) for v in np.broadcast_arrays(*(np.asarray(v, dtype=np.float64) for v in (n_xy, n_x, n_y, n))))
    lo = np.maximum(0.0, nx + ny - nn)
    hi = np.minimum(nx, ny)
    mode = np.floor((nx + 1) * (ny + 1) / (nn + 2))
    upper = k0 > mode  # sum P(X >= k0) directly; otherwise 1 - P(X <= k0 - 1)
    start = np.where(upper, k0, k0 - 1)
    total = np.zeros_like(k0)
    valid = (start >= lo) & (start <= hi)
    term = np.where(valid, np.exp(_log_comb(ny, start) + _log_comb(nn - ny, nx - start) - _log_comb(nn, nx)), 0.0)
    k = start.copy()
    active = valid & (term > 0)
    total += term
    while active.any():
        i = np.nonzero(active)[0]
        ki, up = k[i], upper[i]
        # P(k+1)/P(k) going up, P(k-1)/P(k) going down.
        ratio = np.where(
            up,
            (ny[i] - ki) * (nx[i] - ki) / ((ki + 1) * (nn[i] - ny[i] - nx[i] + ki + 1)),
            ki * (nn[i] - ny[i] - nx[i] + ki) / ((ny[i] - ki + 1) * (nx[i] - ki + 1)),
        )
        k[i] = np.where(up, ki + 1, ki - 1)
        term[i] = term[i] * ratio
        inside = np.where(up, k[i] <= hi[i], k[i] >= lo[i])
        term[i] = np.where(inside, term[i], 0.0)
        total[i] += term[i]
        active[i] = inside & (term[i] > total[i] * 1e-17)
    p = np.where(upper, total, 1.0 - total)
    return p.clip(0.0, 1.0)
