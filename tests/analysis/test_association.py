"""The one association helper ("images matching X => class Y") against scipy and statsmodels on the same counts."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import fisher_exact
from statsmodels.stats.multitest import multipletests

from analysis.association import associate, associate_masks


def test_associate_matches_scipy_fisher_and_statsmodels_bh_with_a_different_n_per_test() -> None:
    rng = np.random.default_rng(7)
    rows = []
    for _ in range(60):
        n = int(rng.integers(10, 500))
        n_y, n_x = int(rng.integers(1, n)), int(rng.integers(1, n))
        n_xy = int(rng.integers(max(0, n_x + n_y - n), min(n_x, n_y) + 1))
        rows.append((n_xy, n_x, n_y, n))
    xy, x, y, n = (np.array(v) for v in zip(*rows))
    got = associate(xy, x, y, n)
    expected = [fisher_exact([[a, b - a], [c - a, d - b - c + a]], alternative="greater")[1] for a, b, c, d in rows]
    np.testing.assert_allclose(got.p_value, expected, rtol=1e-9, atol=1e-300)
    np.testing.assert_allclose(got.q_value, multipletests(expected, method="fdr_bh")[1], rtol=1e-9)
    np.testing.assert_allclose(got.confidence, xy / x)
    np.testing.assert_allclose(got.lift, (xy / x) / (y / n))


def test_associate_documents_tests_where_nothing_matches() -> None:
    got = associate([8, 0], [10, 0], [20, 20], 100)
    assert got.lift.tolist() == [4.0, 0.0] and got.confidence.tolist() == [0.8, 0.0]
    assert got.p_value[1] == 1.0 and len(got) == 2


def test_associate_masks_counts_like_the_masks_say() -> None:
    matching = np.array([[1, 1, 0, 0, 1], [0, 0, 0, 0, 0]], dtype=bool)
    in_class = np.array([[1, 1, 1, 0, 0], [1, 0, 0, 0, 0]], dtype=bool)
    got = associate_masks(matching, in_class)
    assert got.n_xy.tolist() == [2, 0] and got.n_x.tolist() == [3, 0] and got.n_y.tolist() == [3, 1] and got.n.tolist() == [5, 5]
    assert got.p_value[0] == pytest.approx(fisher_exact([[2, 1], [1, 1]], alternative="greater")[1])
