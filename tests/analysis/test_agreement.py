from __future__ import annotations

import krippendorff
import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score
from statsmodels.stats.inter_rater import aggregate_raters
from statsmodels.stats.inter_rater import fleiss_kappa as sm_fleiss

from analysis.agreement import cohen_kappa, fleiss_kappa, krippendorff_alpha_nominal
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
