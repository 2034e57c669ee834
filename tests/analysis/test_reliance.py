"""Reliance verdicts: covering decides, one family of tests corrected together, a minimum effect.

Statistics are checked against scipy (bootstrap, permutation test) and statsmodels (multiple testing);
the verdict rules against models whose reliance is known by construction (one reads only a corner).
"""

from __future__ import annotations

import numpy as np
import pytest
import torch
from scipy import stats
from statsmodels.stats.multitest import multipletests

from analysis.errors import InvalidInputError
from analysis.expectations import check_expectations, decide_expectations, read_expectations
from analysis.interventions import InterventionResult, ablation_test, effect_stats, insertion_test
from analysis.model_io import prepare_model
from analysis.reliance import RuleTests, VerdictSettings, adjust_p_values, concept_set, judge_family

from .tables import table_from_rows
from .test_interventions import SIDECAR, Corner, _data


def _result(kind: str, effect: float, interval: tuple[float, float], p: float, fill: str = "mean") -> InterventionResult:
    return InterventionResult(kind, "can", "tag", fill if kind == "ablation" else "paste", "in place", 40, 5, effect, 0.0, 0.0, 0.0,  # type: ignore[arg-type]
                              effect, interval, p, 0)


@pytest.mark.parametrize("method, reference", [("holm", "holm"), ("bh", "fdr_bh")])
def test_correction_matches_statsmodels(method: str, reference: str) -> None:
    rng = np.random.default_rng(0)
    for p in (rng.uniform(0, 1, 34), rng.uniform(0, 0.05, 12), np.array([0.01, 0.01, 0.04, 0.5, 1.0, 0.0]), np.array([0.3])):
        np.testing.assert_allclose(adjust_p_values(p, method=method), multipletests(p, method=reference)[1], rtol=1e-12)  # type: ignore[arg-type]
    assert adjust_p_values([], method=method).size == 0  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match="correction"):
        adjust_p_values([0.1], method="bonferroni")  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match="p-values"):
        adjust_p_values([1.2])


def test_holm_on_the_textbook_example() -> None:
    # Holm (1979) step-down on four p-values, worked by hand (common textbook practice):
    # sorted 0.01, 0.02, 0.03, 0.04 times 4, 3, 2, 1 -> 0.04, 0.06, 0.06, 0.06 after the running maximum.
    assert adjust_p_values([0.04, 0.01, 0.03, 0.02]).tolist() == pytest.approx([0.06, 0.04, 0.06, 0.06])


def test_bootstrap_interval_matches_scipy() -> None:
    diff = np.random.default_rng(1).normal(0.1, 0.2, 60)
    _, (lo, hi), _ = effect_stats(diff, np.random.default_rng(2), n_boot=20000, n_perm=2000)
    ref = stats.bootstrap((diff,), np.mean, method="percentile", n_resamples=20000, random_state=np.random.default_rng(3)).confidence_interval
    # Two Monte Carlo bootstraps of the same percentile interval: the ends agree to a small share of its width.
    assert lo == pytest.approx(ref.low, abs=0.05 * (hi - lo)) and hi == pytest.approx(ref.high, abs=0.05 * (hi - lo))


def test_sign_flip_p_value_matches_scipy_exactly_for_small_samples_and_closely_for_large() -> None:
    rng = np.random.default_rng(4)
    for n, shift in ((8, 0.1), (11, 0.0), (12, 0.3)):
        diff = rng.normal(shift, 0.3, n)
        _, _, p = effect_stats(diff, np.random.default_rng(0), n_boot=100, n_perm=5000)  # 2**n <= 5000: every sign pattern
        ref = stats.permutation_test((diff,), np.mean, permutation_type="samples", alternative="greater", n_resamples=np.inf).pvalue
        assert p == pytest.approx(ref, rel=1e-12)
    diff = rng.normal(0.05, 0.3, 80)
    _, _, p = effect_stats(diff, np.random.default_rng(0), n_boot=100, n_perm=20000)
    ref = stats.permutation_test((diff,), np.mean, permutation_type="samples", alternative="greater", n_resamples=20000,
                                 random_state=np.random.default_rng(1)).pvalue
    assert p == pytest.approx(ref, abs=0.01)


def test_pasting_never_stands_in_for_covering_and_small_or_uncorrected_effects_do_not_confirm() -> None:
    # The case that misled: covering moved nothing (-0.007, p 0.70) while pasting had p 0.012 for a 0.007 rise.
    weak = RuleTests("can", "tag", (_result("ablation", -0.007, (-0.029, 0.008), 0.70),), _result("insertion", 0.007, (0.002, 0.012), 0.012))
    # A covering p of 0.093 is not significant; 0.01 among 34 tests is not, once corrected.
    borderline = RuleTests("can", "rim", (_result("ablation", 0.08, (-0.01, 0.17), 0.093),))
    many = [RuleTests("bottle", f"c{i}", (_result("ablation", 0.2, (0.05, 0.35), 0.01 if i == 0 else 0.5),)) for i in range(34)]
    tiny = RuleTests("carton", "print", (_result("ablation", 0.02, (0.015, 0.025), 1e-5),))  # significant, below the minimum effect
    strong = RuleTests("can", "body", (_result("ablation", 0.4, (0.3, 0.5), 1e-4),), _result("insertion", 0.01, (-0.02, 0.03), 0.4))
    found = judge_family([weak, borderline, *many, tiny, strong])
    assert found[("can", "tag")].reliance == "no reliance" and found[("can", "tag")].steering == "not steered"  # 0.007 is below 0.05
    assert found[("can", "rim")].reliance == "inconclusive"
    assert found[("bottle", "c0")].reliance == "inconclusive" and found[("bottle", "c0")].decided_by.adjusted_p > 0.05  # type: ignore[union-attr]
    assert found[("carton", "print")].reliance == "no reliance"  # the whole interval lies below 0.05
    assert found[("can", "body")].reliance == "relies on" and found[("can", "body")].steering == "not steered"
    # One family: 40 tests (38 coverings, 2 pastings), Holm; the figures behind the verdict are the deciding test's.
    assert "Holm correction over the 40 intervention tests" in found[("can", "body")].family
    assert found[("can", "body")].decided_by.adjusted_p == pytest.approx(39 * 1e-4)  # type: ignore[union-attr]  # second smallest of 40: x 39
    assert "decided by covering (mean fill)" in found[("can", "body")].evidence()
    # With no minimum effect and BH, the tiny effect is shown; the setting decides and is recorded.
    loose = judge_family([tiny], VerdictSettings(min_effect=0.0, correction="bh"))[("carton", "print")]
    assert loose.reliance == "relies on" and "Benjamini-Hochberg" in loose.family and "minimum effect 0" in loose.family
    with pytest.raises(InvalidInputError, match="min_effect"):
        VerdictSettings(min_effect=2.0)


def test_several_fills_keep_the_most_conservative_verdict() -> None:
    both = RuleTests("can", "tag", (_result("ablation", 0.4, (0.3, 0.5), 1e-4, "mean"), _result("ablation", 0.2, (0.1, 0.3), 1e-4, "ring")))
    split = RuleTests("can", "patch", (_result("ablation", 0.4, (0.3, 0.5), 1e-4, "mean"), _result("ablation", 0.01, (-0.01, 0.03), 0.3, "blur")))
    found = judge_family([both, split])
    assert found[("can", "tag")].reliance == "relies on" and found[("can", "tag")].decided_by.fill == "ring"  # type: ignore[union-attr]
    assert found[("can", "patch")].reliance == "inconclusive" and found[("can", "patch")].decided_by.fill == "blur"  # type: ignore[union-attr]


def test_a_covering_over_shared_regions_is_corrected_with_the_family_and_cannot_confirm() -> None:
    # The fallback when too few images have a region showing the concept alone covers regions that also
    # show other concepts: a fall there belongs to the concept and its neighbours together. It is one of
    # the family (its p-value is adjusted with the rest), it can rule reliance out, but not confirm it.
    from dataclasses import replace

    strong = replace(_result("ablation", 0.4, (0.3, 0.5), 1e-4), shared=True)
    alone = _result("ablation", 0.4, (0.3, 0.5), 1e-4)
    flat = replace(_result("ablation", 0.001, (-0.01, 0.012), 0.4), shared=True)
    pasted = replace(_result("insertion", 0.3, (0.2, 0.4), 1e-4), shared=True)
    found = judge_family([RuleTests("can", "scrap", (strong,), pasted), RuleTests("can", "tag", (alone,)), RuleTests("can", "rim", (flat,))])
    scrap = found[("can", "scrap")]
    assert scrap.reliance == "inconclusive" and scrap.steering == "inconclusive" and scrap.decided_by is not None
    assert scrap.decided_by.shared and "also show other concepts" in scrap.evidence()
    assert found[("can", "tag")].reliance == "relies on"  # the same figures over regions of its own confirm
    assert found[("can", "rim")].reliance == "no reliance"  # covering more than the rim moved nothing: the rim alone moves nothing
    # All four tests are one family: each adjusted p is Holm's over four (statsmodels, the same p-values).
    ref = multipletests([1e-4, 1e-4, 1e-4, 0.4], method="holm")[1]
    assert scrap.decided_by.adjusted_p == pytest.approx(ref[0]) and "over the 4 intervention tests" in scrap.family
    assert found[("can", "rim")].decided_by.adjusted_p == pytest.approx(ref[3])  # type: ignore[union-attr]


def test_concept_sets_that_covering_can_test() -> None:
    assert concept_set('tag and "label band"') == ["label band", "tag"]
    assert concept_set("rim or tab") is None and concept_set("cap and not tag") is None


@pytest.fixture(scope="module")
def corner_model():  # type: ignore[no-untyped-def]
    return prepare_model(Corner(), SIDECAR)


def _corner_table(seed: int = 0):  # type: ignore[no-untyped-def]
    """Every image shows the bright corner (a concept in ~every image of both classes: lift ~1)."""
    rng = np.random.default_rng(seed)
    rows = [("corner" if i % 2 else "other", "corner" if i % 2 else "other", 0.9, {"corner"} | ({"stripe"} if rng.random() < 0.5 else set()))
            for i in range(120)]
    rows[0] = (rows[0][0], rows[0][1], 0.9, {"stripe"})  # one image without it, so the concept is not constant
    return table_from_rows(rows)


def test_a_concept_in_nearly_every_image_that_the_model_needs_is_met_through_covering(corner_model) -> None:  # type: ignore[no-untyped-def]
    table = _corner_table()
    exp = read_expectations('[classes.corner]\nrelies_on = ["corner", "stripe"]\nmust_not_rely_on = ["corner", "stripe or corner"]')
    before = check_expectations(exp, table)
    # Co-occurrence alone says nothing either way (lift ~1), and without an intervention nothing is violated.
    assert [v.verdict for v in before] == ["not tested"] * 4
    assert all(0.9 < v.lift < 1.1 for v in before[:1])
    x, corner, elsewhere = _data()
    covering_corner = ablation_test(corner_model, x, corner, 0, concept="corner", fill="mean", seed=1)
    covering_stripe = ablation_test(corner_model, x, elsewhere, 0, concept="stripe", fill="mean", seed=1)
    targets = torch.randn(30, 3, 32, 32, generator=torch.Generator().manual_seed(9)) * 0.2 - 0.5
    pasting = insertion_test(corner_model, targets, x, corner, 0, concept="corner", seed=1)
    settings = exp.settings
    findings = judge_family([RuleTests("corner", "corner", (covering_corner,), pasting), RuleTests("corner", "stripe", (covering_stripe,))], settings)
    after = {(v.expectation.kind, v.expectation.question): v for v in decide_expectations(before, findings, settings)}
    met = after[("relies_on", "corner")]
    assert met.verdict == "met" and met.decided_by == "covering (mean fill)" and met.confirmed
    assert met.effect is not None and met.effect > 0.3 and met.interval is not None and met.interval[0] > 0.2
    assert met.adjusted_p is not None and met.adjusted_p <= 0.05 and met.steering == "steered" and "Holm" in met.family
    assert "supporting only" in met.reason and "lift" in met.reason
    assert after[("must_not_rely_on", "corner")].verdict == "violated"
    assert after[("relies_on", "stripe")].verdict == "violated"  # covering where the model does not look: the interval lies below 0.05
    assert after[("must_not_rely_on", "stripe or corner")].verdict == "not tested"  # covering cannot test "or"


def test_expectation_settings_are_read_and_checked() -> None:
    exp = read_expectations('min_effect = 0.1\ncorrection = "bh"\nalpha = 0.1\n[classes.can]\nrelies_on = ["rim"]')
    assert exp.settings == VerdictSettings(min_effect=0.1, alpha=0.1, correction="bh")
    with pytest.raises(InvalidInputError, match="correction"):
        read_expectations('correction = "bonferroni"\n[classes.can]\nrelies_on = ["rim"]')
    with pytest.raises(InvalidInputError, match="min_effect"):
        read_expectations('min_effect = 1.5\n[classes.can]\nrelies_on = ["rim"]')
