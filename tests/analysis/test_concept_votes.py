from __future__ import annotations

import krippendorff
import numpy as np
import pandas as pd
import pytest
from crowdkit.aggregation import DawidSkene

from analysis.concept_votes import estimate_concepts, presence_agreement, presence_votes
from analysis.concepts import Judgment
from analysis.errors import InvalidInputError
from analysis.reliability import NO_PRIOR
from analysis.synonyms import Merge, build_rules
from tests.analysis.test_reliability import crowd_kit_warnings

PARTS = ["cap", "neck", "label band", "tag", "rim", "body"]


def _crowd(seed: int, sens: list[float], fp: list[float], n_regions: int = 300) -> tuple[dict[int, set[str]], list[Judgment]]:
    """Regions with 1-3 true parts; annotator a names a true part with probability sens[a] and
    adds a wrong part with probability fp[a]."""
    rng = np.random.default_rng(seed)
    truth = {r: set(rng.choice(PARTS, int(rng.integers(1, 4)), replace=False)) for r in range(n_regions)}
    js = []
    for r, parts in truth.items():
        for a in range(len(sens)):
            named = {p for p in sorted(parts) if rng.random() < sens[a]}  # sorted: set order follows the hash seed
            if rng.random() < fp[a]:
                named.add(str(rng.choice(PARTS)))
            js.append(Judgment(r, f"a{a}", tuple((p, ()) for p in sorted(named))))
    return truth, js


def test_votes_cover_every_concept_named_in_a_region() -> None:
    js = [Judgment(1, "x", (("Caps", ("red",)),)), Judgment(1, "y", (("lid", ()),)), Judgment(2, "x", ()), Judgment(2, "z", (("tag", ()),), unsure=True)]
    votes = presence_votes(js, rules=build_rules([Merge("lid", "cap")]))
    assert votes.concepts == ("cap", "red cap") and votes.regions == (1, 2)
    # Region 1: cap (x yes, y yes), red cap (x yes, y no); region 2 has no concept; z's unsure vote is left out.
    assert sorted(zip(votes.vote_pair.tolist(), votes.vote_annotator.tolist(), votes.vote_yes.tolist())) == [(0, 0, True), (0, 1, True), (1, 0, True), (1, 1, False)]
    assert votes.main_entities.classes == ("cap", "nothing recognisable")
    est = estimate_concepts(votes, method="majority")
    assert est.region_concepts() == {1: {"cap": 1.0}, 2: {}}  # "red cap" has half, not more than half
    with pytest.raises(InvalidInputError, match="twice"):
        presence_votes([Judgment(1, "x", ()), Judgment(1, "x", ())])


@pytest.mark.parametrize("seed", [0, 1])
def test_dawid_skene_presence_beats_majority_with_unreliable_annotators(seed: int) -> None:
    truth, js = _crowd(seed, sens=[0.95, 0.9, 0.5, 0.45, 0.5], fp=[0.05, 0.05, 0.8, 0.8, 0.8])
    votes = presence_votes(js)

    def accuracy(method: str) -> float:
        est = estimate_concepts(votes, method=method)  # type: ignore[arg-type]
        got = est.region_concepts()
        pairs = [(votes.regions[r], votes.concepts[c]) for r, c in zip(votes.pair_region, votes.pair_concept)]
        return float(np.mean([(c in got[r]) == (c in truth[r]) for r, c in pairs]))

    # Dawid-Skene learns to discount the three careless people; at least a quarter fewer errors.
    assert 1 - accuracy("dawid-skene") < 0.75 * (1 - accuracy("majority"))
    ds = estimate_concepts(votes, method="dawid-skene")
    assert ds.converged and ds.sensitivity[0] > 0.85 and ds.sensitivity[3] < 0.65


@crowd_kit_warnings
def test_presence_dawid_skene_matches_crowd_kit_on_the_same_votes() -> None:
    # crowd-kit stops as soon as its bound falls; seeds 4-9 stop within 6 steps, so compare on one where it converged.
    _, js = _crowd(10, sens=[0.9, 0.8, 0.6], fp=[0.1, 0.3, 0.5], n_regions=25)
    votes = presence_votes(js)
    ours = estimate_concepts(votes, method="dawid-skene", prior=NO_PRIOR, tol=1e-12, max_iter=2000)
    # Every annotator of a region says "no" to each campaign concept nobody named there: written out as
    # tasks of their own for crowd-kit (we weigh one item per region instead).
    tasks, workers, said = list(votes.vote_pair), list(votes.vote_annotator), list(votes.vote_yes.astype(int))
    m = votes.main_entities
    task = len(votes.pair_region)
    for r in range(len(votes.regions)):
        named = set(votes.pair_concept[votes.pair_region == r].tolist())
        raters = m.annotator_codes[m.item_codes == r].tolist()
        for _ in range(len(votes.concepts) - len(named)):
            tasks += [task] * len(raters)
            workers += raters
            said += [0] * len(raters)
            task += 1
    ref = DawidSkene(n_iter=2000, tol=1e-12).fit(pd.DataFrame({"task": tasks, "worker": workers, "label": said}))
    assert abs(ref.loss_history_[-1] - ref.loss_history_[-2]) < 1e-9 and ours.converged
    np.testing.assert_allclose(ours.probability, ref.probas_.sort_index()[1].to_numpy()[: len(votes.pair_region)], atol=1e-4)


def test_presence_alpha_per_concept_matches_krippendorff_package() -> None:
    _, js = _crowd(5, sens=[0.9, 0.7, 0.6, 0.8], fp=[0.1, 0.2, 0.4, 0.1], n_regions=120)
    js = [j for k, j in enumerate(js) if k % 7 != 3]  # some regions lose a rater: missing data
    votes = presence_votes(js)
    rep = {a.concept: a for a in presence_agreement(votes, n_boot=100)}
    for concept in ("cap", "tag"):
        data = np.full((len(votes.annotators), len(votes.regions)), np.nan)
        for j in js:
            named = {e for e, _ in j.entities}
            data[votes.annotators.index(j.annotator), votes.regions.index(j.region_id)] = float(concept in named)
        assert rep[concept].alpha == pytest.approx(krippendorff.alpha(reliability_data=data, level_of_measurement="nominal"))
        lo, hi = rep[concept].interval  # type: ignore[misc]
        assert lo <= rep[concept].alpha <= hi


def test_presence_alpha_from_distinct_rows_is_the_per_region_computation() -> None:
    """Alpha per concept is computed from the distinct (no, yes) rows and their counts: the same alpha, interval
    (the same resamples) and note as the regions-by-(no, yes) table given to alpha_with_interval (alpha checked
    against the krippendorff package above)."""
    from analysis.agreement import alpha_with_interval

    _, js = _crowd(8, sens=[0.9, 0.7, 0.6, 0.8, 0.5], fp=[0.1, 0.2, 0.4, 0.1, 0.3], n_regions=200)
    js = [j for k, j in enumerate(js) if k % 5 != 2] + [Judgment(10_000, "a0", (("lone", ()),))]  # missing raters; a concept never pairable
    votes = presence_votes(js)
    found = {a.concept: a for a in presence_agreement(votes, n_boot=150, seed=3)}
    yes_pair = np.bincount(votes.vote_pair, weights=votes.vote_yes, minlength=len(votes.pair_region))
    assert set(found) == set(votes.concepts)
    for k, concept in enumerate(votes.concepts):
        mine = votes.pair_concept == k
        yes = np.bincount(votes.pair_region[mine], weights=yes_pair[mine], minlength=len(votes.regions))
        counts = np.column_stack([votes.raters - yes, yes])
        alpha, interval, note = alpha_with_interval(counts, n_boot=150, seed=3)
        got = found[concept]
        assert got.regions_named == int((yes > 0).sum()) and got.note == note
        assert (got.alpha is None) == (alpha is None) and (got.interval is None) == (interval is None)
        if alpha is not None:
            assert got.alpha == pytest.approx(alpha, rel=1e-12, abs=1e-12)
        if interval is not None:
            assert got.interval == pytest.approx(interval, rel=1e-12, abs=1e-12)
    assert found["lone"].alpha is None and "alpha is undefined" in found["lone"].note


def test_check_regions_keep_their_known_answer() -> None:
    truth, js = _crowd(6, sens=[0.6, 0.6, 0.6], fp=[0.5, 0.5, 0.5], n_regions=40)
    known = {r: truth[r] for r in range(10)}
    est = estimate_concepts(presence_votes(js, known=known), method="dawid-skene")
    got = est.region_concepts()
    assert all(set(got[r]) == truth[r] for r in known)


def test_equally_careful_annotators_keep_a_clear_majority_on_every_concept() -> None:
    # Invented crowds (an invariant, not a published figure): three people of equal care per region.
    present = absent = n_two = n_one = 0
    for seed in range(10):
        for n in (15, 40, 150):
            _, js = _crowd(seed, sens=[0.85] * 3, fp=[0.2] * 3, n_regions=n)
            votes = presence_votes(js)
            est = estimate_concepts(votes, method="dawid-skene")
            assert est.converged, (seed, n)
            yes = np.bincount(votes.vote_pair, weights=votes.vote_yes, minlength=len(votes.pair_region))
            present += int(est.present[yes == 2].sum())
            absent += int((~est.present[yes == 1]).sum())
            n_two, n_one = n_two + int((yes == 2).sum()), n_one + int((yes == 1).sum())
            # Nobody gets a bare 0 or 1 from a handful of pairs: each rate rests on its pairs and has room.
            for r in est.annotator_rates():
                assert 0 < r.specificity.estimate < 1 and r.specificity.n > 10
    assert n_two > 1000 and n_one > 500
    assert present / n_two >= 0.99 and absent / n_one >= 0.99


def test_rates_resting_on_few_pairs_show_their_count_and_a_wide_interval() -> None:
    _, js = _crowd(2, sens=[0.9, 0.9, 0.9], fp=[0.1, 0.1, 0.1], n_regions=120)
    # A fourth annotator judged two regions only and named nothing there.
    js += [Judgment(0, "late", ()), Judgment(1, "late", ())]
    est = estimate_concepts(presence_votes(js), method="dawid-skene")
    rates = {r.annotator: r for r in est.annotator_rates()}
    late, a0 = rates["late"], rates["a0"]
    assert late.sensitivity.n < 8 and late.sensitivity.high - late.sensitivity.low > 0.4
    assert late.sensitivity.estimate > 0  # never a bare 0.000: the prior and the interval speak for the few pairs
    assert a0.sensitivity.n > 100 and a0.sensitivity.high - a0.sensitivity.low < 0.15
    for r in rates.values():
        for rate in (r.sensitivity, r.specificity):
            assert rate.low <= rate.estimate <= rate.high
    assert "n=" in str(late.sensitivity)
    # Majority vote states its rates the same way (uniform prior): a 0 from four pairs comes with them and a wide interval.
    maj = {r.annotator: r for r in estimate_concepts(presence_votes(js), method="majority").annotator_rates()}
    assert maj["late"].sensitivity.n == 4 and maj["late"].sensitivity.estimate == 0 and maj["late"].sensitivity.high > 0.4


def test_single_mentions_kept_are_mostly_right_when_annotators_differ() -> None:
    # Dawid-Skene keeps a concept that only one of three people named when that person is the one it
    # learned to be sensitive and the two who left it out are known to miss things (here it kept about
    # half of the single mentions); majority vote drops every one. Against the invented truth (an
    # invariant, not a published figure) the kept ones are mostly right, and there are fewer errors on
    # these pairs than majority makes. With equally careful people it keeps none (test above).
    kept_right = kept_wrong = dropped_true = 0
    for seed in range(3):
        truth, js = _crowd(seed, sens=[0.95, 0.8, 0.6], fp=[0.05, 0.1, 0.15])
        votes = presence_votes(js)
        est = estimate_concepts(votes, method="dawid-skene")
        assert est.converged
        yes = np.bincount(votes.vote_pair, weights=votes.vote_yes, minlength=len(votes.pair_region))
        for p in np.nonzero(yes == 1)[0]:
            true = votes.concepts[votes.pair_concept[p]] in truth[votes.regions[votes.pair_region[p]]]
            if est.present[p]:
                kept_right, kept_wrong = kept_right + true, kept_wrong + (not true)
            else:
                dropped_true += true
    assert kept_right + kept_wrong > 100
    assert kept_right / (kept_right + kept_wrong) > 0.7
    assert kept_wrong + dropped_true < 0.5 * (kept_right + dropped_true)  # majority's errors here: every true single mention


def test_votes_built_with_arrays_equal_the_definition_pair_by_pair() -> None:
    # Invariant on invented labels: every judge of a region votes on every concept named there (or in its
    # known answer), yes where they named it, pairs by region then concept, votes in the judgments' order.
    from analysis.concepts import attribute_words, judgment_concepts
    from analysis.synonyms import Split

    rng = np.random.default_rng(3)
    words = ["cap", "lid", "yellow tag", "tag", "label band", "top", "rim"]
    js = [Judgment(int(r), f"a{a}", tuple((str(rng.choice(words)), tuple(str(x) for x in rng.choice(["red", "yellow"], int(rng.integers(0, 2)))))
                                          for _ in range(int(rng.integers(0, 3)))), bool(rng.random() < 0.05))
          for r in rng.permutation(80) for a in rng.choice(5, int(rng.integers(1, 4)), replace=False)]
    region_class = {j.region_id: ("bottle", "carton")[j.region_id % 2] for j in js}
    rules = build_rules([Merge("lid", "cap")], [Split("top", (("bottle", "cap"), ("carton", "gable top")))])
    known = {int(js[0].region_id): ["cap", "yellow tag"], int(js[-1].region_id): []}
    votes = presence_votes(js, rules=rules, region_class=region_class, known=known)

    usable = [j for j in js if not j.unsure]
    attrs = attribute_words(usable, rules=rules)
    named = {(j.region_id, j.annotator): judgment_concepts(j, rules=rules, cls=region_class[j.region_id], attributes=attrs) for j in usable}
    assert "yellow" in attrs  # so the known "yellow tag" is the refinement of "tag", and both are known
    answer = {js[0].region_id: {"cap", "tag", "yellow tag"}, js[-1].region_id: set()}
    expected_pairs, expected_votes = [], []
    for r in sorted({j.region_id for j in usable}):
        judges = [(j.annotator, named[(j.region_id, j.annotator)]) for j in usable if j.region_id == r]
        union = set().union(*(cs for _, cs in judges)) | answer.get(r, set())
        for c in sorted(union):
            expected_pairs.append((r, c, -1 if r not in known else int(c in answer[r])))
            expected_votes.extend((len(expected_pairs) - 1, a, c in cs) for a, cs in judges)
    got_pairs = [(votes.regions[r], votes.concepts[c], int(k)) for r, c, k in zip(votes.pair_region, votes.pair_concept, votes.known)]
    got_votes = [(int(p), votes.annotators[a], bool(y)) for p, a, y in zip(votes.vote_pair, votes.vote_annotator, votes.vote_yes)]
    assert got_pairs == expected_pairs and got_votes == expected_votes
    assert votes.families.get("yellow tag") == "tag"


def test_dawid_skene_started_from_the_fit_before_the_newest_label_reaches_the_same_estimate_sooner() -> None:
    # Invariant: EM started from an earlier fit ends at the cold start's optimum (to the tolerance), in fewer iterations.
    _, js = _crowd(5, [0.9, 0.7, 0.6], [0.05, 0.2, 0.3], n_regions=400)
    before = estimate_concepts(presence_votes(js[:-1]), method="dawid-skene")
    votes = presence_votes(js)
    cold = estimate_concepts(votes, method="dawid-skene")
    warm = estimate_concepts(votes, method="dawid-skene", start=before)
    assert warm.converged and warm.iterations < cold.iterations
    assert np.abs(warm.probability - cold.probability).max() < 1e-3
    assert np.abs(warm.sensitivity - cold.sensitivity).max() < 1e-3 and np.abs(warm.specificity - cold.specificity).max() < 1e-3
    assert (warm.present == cold.present).all()
    # A start without the newest annotator starts them from the others' mean and reaches the same optimum.
    other = estimate_concepts(presence_votes([j for j in js if j.annotator != "a2"]), method="dawid-skene")
    joined = estimate_concepts(votes, method="dawid-skene", start=other)
    assert joined.converged and np.abs(joined.probability - cold.probability).max() < 1e-3
    assert (joined.present == cold.present).all()
    # A start by another method is not used.
    assert estimate_concepts(votes, method="dawid-skene", start=estimate_concepts(votes, method="majority")).iterations == cold.iterations
