from __future__ import annotations

import krippendorff
import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score
from statsmodels.stats.inter_rater import aggregate_raters
from statsmodels.stats.inter_rater import fleiss_kappa as sm_fleiss

from analysis.agreement import alpha_bootstrap, alpha_from_counts, cohen_kappa, fleiss_kappa, krippendorff_alpha_nominal, unit_counts
from analysis.errors import InvalidInputError

N = None
# Krippendorff (2011), "Computing Krippendorff's Alpha-Reliability", the example with four observers,
# twelve units and missing values; nominal alpha 0.743 (value as printed there, recalled from memory
# and confirmed below against the krippendorff package).
KRIPP_2011 = [
    [1, 2, 3, 3, 2, 1, 4, 1, 2, N, N, N],
    [1, 2, 3, 3, 2, 2, 4, 1, 2, 5, N, 3],
    [N, 3, 3, 3, 2, 3, 4, 2, 2, 5, 1, N],
    [1, 2, 3, 3, 2, 4, 4, 1, 2, 5, 1, N],
]


def test_krippendorff_2011_worked_example() -> None:
    assert krippendorff_alpha_nominal(KRIPP_2011) == pytest.approx(0.743, abs=5e-4)
    ref = krippendorff.alpha(reliability_data=np.array(KRIPP_2011, dtype=float), level_of_measurement="nominal")
    assert krippendorff_alpha_nominal(KRIPP_2011) == pytest.approx(ref)


@pytest.mark.parametrize("seed", range(5))
def test_alpha_matches_krippendorff_package_on_random_data(seed: int) -> None:
    rng = np.random.default_rng(seed)
    data = rng.integers(0, 4, size=(6, 40)).astype(float)
    data[rng.random(data.shape) < 0.3] = np.nan
    ours = krippendorff_alpha_nominal(np.where(np.isnan(data), None, data).tolist())
    # The package defaults to the interval level; nominal is asked for explicitly.
    assert ours == pytest.approx(krippendorff.alpha(reliability_data=data, level_of_measurement="nominal"))


@pytest.mark.parametrize("seed", range(5))
def test_fleiss_and_cohen_match_statsmodels_and_sklearn(seed: int) -> None:
    rng = np.random.default_rng(seed)
    truth = rng.integers(0, 3, 60)
    ratings = np.where(rng.random((60, 5)) < 0.7, truth[:, None], rng.integers(0, 3, (60, 5)))
    table, _ = aggregate_raters(ratings)
    assert fleiss_kappa(table) == pytest.approx(sm_fleiss(table, method="fleiss"))
    assert cohen_kappa(ratings[:, 0], ratings[:, 1]) == pytest.approx(cohen_kappa_score(ratings[:, 0], ratings[:, 1]))


def test_degenerate_inputs_raise() -> None:
    with pytest.raises(InvalidInputError, match="same number"):
        fleiss_kappa([[2, 0], [1, 2]])
    with pytest.raises(InvalidInputError, match="undefined"):
        krippendorff_alpha_nominal([[1, 1], [1, 1]])


# Fleiss' kappa, the ten-subject, fourteen-rater, five-category example of the Wikipedia article
# "Fleiss' kappa" (table recalled from memory; its printed kappa 0.210 is also what statsmodels gives).
FLEISS_EXAMPLE = [
    [0, 0, 0, 0, 14], [0, 2, 6, 4, 2], [0, 0, 3, 5, 6], [0, 3, 9, 2, 0], [2, 2, 8, 1, 1],
    [7, 7, 0, 0, 0], [3, 2, 6, 3, 0], [2, 5, 3, 2, 2], [6, 5, 2, 1, 0], [0, 2, 2, 3, 7],
]
# Cohen (1960), Table 1: 200 cases, two judges, three categories, as proportions .44 .07 .09 /
# .05 .20 .05 / .01 .03 .06 (recalled from memory; the marginals give p_o .70, p_c .41, kappa .492).
COHEN_1960 = np.array([[88, 14, 18], [10, 40, 10], [2, 6, 12]])


def test_published_fleiss_and_cohen_examples() -> None:
    assert fleiss_kappa(FLEISS_EXAMPLE) == pytest.approx(0.210, abs=5e-4)
    assert fleiss_kappa(FLEISS_EXAMPLE) == pytest.approx(sm_fleiss(np.array(FLEISS_EXAMPLE), method="fleiss"))
    a = np.repeat(np.repeat(np.arange(3), 3), COHEN_1960.ravel())
    b = np.repeat(np.tile(np.arange(3), 3), COHEN_1960.ravel())
    assert cohen_kappa(a, b) == pytest.approx(0.492, abs=5e-4)


def test_alpha_from_unit_counts_equals_alpha_from_ratings() -> None:
    assert alpha_from_counts(unit_counts(KRIPP_2011)) == pytest.approx(krippendorff_alpha_nominal(KRIPP_2011))


def test_bootstrap_interval_brackets_alpha_and_narrows_with_more_units() -> None:
    rng = np.random.default_rng(3)

    def counts(n_units: int) -> np.ndarray:
        truth = rng.integers(0, 3, n_units)
        ratings = np.where(rng.random((4, n_units)) < 0.7, truth, rng.integers(0, 3, (4, n_units)))
        return unit_counts(ratings.tolist())

    small, large = counts(40), counts(640)
    lo_s, hi_s = alpha_bootstrap(small, n_boot=400)
    lo_l, hi_l = alpha_bootstrap(large, n_boot=400)
    assert lo_s <= alpha_from_counts(small) <= hi_s and lo_l <= alpha_from_counts(large) <= hi_l
    # The interval width shrinks roughly with the square root of the units (16x units -> about 1/4).
    assert (hi_l - lo_l) < 0.5 * (hi_s - lo_s)
    assert alpha_bootstrap(small, n_boot=400, seed=1) == alpha_bootstrap(small, n_boot=400, seed=1)


def test_bootstrap_by_indices_matches_scipy_percentile_interval() -> None:
    """Resampling unit indices gives the interval scipy.stats.bootstrap (percentile method, units
    resampled with replacement) gives for the same statistic, within Monte Carlo error."""
    from scipy.stats import bootstrap

    rng = np.random.default_rng(7)
    truth = rng.integers(0, 3, 300)
    ratings = np.where(rng.random((3, 300)) < 0.75, truth, rng.integers(0, 3, (3, 300)))
    counts = unit_counts(ratings.tolist())
    ours = alpha_bootstrap(counts, n_boot=4000, seed=0)
    ref = bootstrap((np.arange(len(counts)),), lambda idx: alpha_from_counts(counts[idx]), vectorized=False, n_resamples=4000,
                    method="percentile", random_state=np.random.default_rng(1)).confidence_interval
    width = ref.high - ref.low
    assert ours[0] == pytest.approx(ref.low, abs=0.05 * width + 0.005)
    assert ours[1] == pytest.approx(ref.high, abs=0.05 * width + 0.005)


def test_bootstrap_matches_scipy_when_every_unit_differs() -> None:
    """Draws are grouped by distinct rows of counts; with no two rows alike (many values, many raters per unit)
    the interval is still scipy.stats.bootstrap's percentile interval over units, within Monte Carlo error."""
    from scipy.stats import bootstrap

    rng = np.random.default_rng(11)
    counts = rng.integers(0, 6, size=(120, 8)).astype(float)
    counts[:, 0] += 10 * rng.integers(0, 2, size=120)  # some agreement to measure
    assert len(np.unique(counts, axis=0)) == len(counts)
    ours = alpha_bootstrap(counts, n_boot=4000, seed=0)
    ref = bootstrap((np.arange(len(counts)),), lambda idx: alpha_from_counts(counts[idx]), vectorized=False, n_resamples=4000,
                    method="percentile", random_state=np.random.default_rng(2)).confidence_interval
    width = ref.high - ref.low
    assert ours[0] == pytest.approx(ref.low, abs=0.05 * width + 0.005)
    assert ours[1] == pytest.approx(ref.high, abs=0.05 * width + 0.005)


def test_resample_weights_are_multinomial_counts() -> None:
    """Each resample's weights count u draws (they sum to u) and every unit is equally likely (mean 1)."""
    from analysis.agreement import _resample_weights

    w = np.concatenate(_resample_weights(50, 400, 0))
    assert w.shape == (400, 50) and np.all(w.sum(axis=1) == 50)
    assert w.mean() == pytest.approx(1.0) and abs(w.mean(axis=0) - 1).max() < 0.25
    # The variance of a multinomial count with p = 1/u is u * p * (1 - p) = 0.98.
    assert w.var() == pytest.approx(1 - 1 / 50, rel=0.1)


@pytest.mark.parametrize("distinct", [False, True])
def test_bootstrap_of_a_wide_table_matches_scipy(distinct: bool) -> None:
    """A table with a column per value (40 values, three raters per unit), read as its used cells: with few
    distinct rows (draws per row) and with many (a weight per unit), scipy's percentile interval within Monte Carlo error."""
    from scipy.stats import bootstrap

    rng = np.random.default_rng(5)
    n_units, n_values = 160, 40
    truth = rng.integers(0, 4 if not distinct else n_values, n_units)
    ratings = np.where(rng.random((3, n_units)) < 0.7, truth, rng.integers(0, 4 if not distinct else n_values, (3, n_units)))
    counts = np.zeros((n_units, n_values))
    for r in ratings:
        np.add.at(counts, (np.arange(n_units), r), 1)
    assert (len(np.unique(counts, axis=0)) > n_units // 4) == distinct
    ours = alpha_bootstrap(counts, n_boot=4000, seed=0)
    ref = bootstrap((np.arange(n_units),), lambda idx: alpha_from_counts(counts[idx]), vectorized=False, n_resamples=4000,
                    method="percentile", random_state=np.random.default_rng(3)).confidence_interval
    width = ref.high - ref.low
    assert ours[0] == pytest.approx(ref.low, abs=0.05 * width + 0.005)
    assert ours[1] == pytest.approx(ref.high, abs=0.05 * width + 0.005)
