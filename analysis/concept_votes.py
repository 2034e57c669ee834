"""From judgments to concepts per region: yes/no votes per (region, concept), their agreement, and
majority or Dawid-Skene estimates of which concepts each region really shows.

An annotator who labelled a region votes "yes" on every concept they named there and "no" on
every concept somebody else named there. Dawid-Skene then learns one 2 x 2 confusion matrix per
annotator over all (region, concept) pairs (sensitivity and specificity), which is the data a
sparse team produces; per concept it would be starved.
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field, replace

import numpy as np
import numpy.typing as npt

from .agreement import alpha_with_interval_of_rows
from .concepts import (
    Judgment,
    attribute_words,
    entity_with_attributes,
    judgment_families,
    main_entity,
    normalise_label,
)
from .errors import InvalidInputError
from .long_labels import LongLabels
from .reliability import (
    DEFAULT_PRIOR,
    ConfusionPrior,
    Method,
    Rate,
    aggregate,
    cell_rate,
)
from .synonyms import SynonymRules

IntArray = npt.NDArray[np.int64]
FloatArray = npt.NDArray[np.float64]
BoolArray = npt.NDArray[np.bool_]


def sorted_distinct(values: npt.NDArray[np.int64]) -> npt.NDArray[np.int64]:
    """``np.unique(values)`` of an integer array, by sorting: NumPy 2's unique hashes, which on hundreds of thousands of
    wide-ranging keys (region x concept) takes tens of times longer than a sort."""
    ordered = np.sort(values)
    if len(ordered) < 2:
        return ordered
    keep = np.empty(len(ordered), dtype=bool)
    keep[0] = True
    np.not_equal(ordered[1:], ordered[:-1], out=keep[1:])
    return ordered[keep]


@dataclass(frozen=True)
class PresenceVotes:
    """Binary votes on (region, concept) pairs, plus each judgment's main entity.

    Codes index into ``regions``, ``annotators`` and ``concepts``. ``known`` is 1/0 for pairs
    whose answer is known (check items) and -1 elsewhere.
    """

    regions: tuple[int, ...]
    annotators: tuple[str, ...]
    concepts: tuple[str, ...]
    pair_region: IntArray  # (P,)
    pair_concept: IntArray  # (P,)
    known: IntArray  # (P,)
    vote_pair: IntArray  # (V,)
    vote_annotator: IntArray  # (V,)
    vote_yes: BoolArray  # (V,)
    main_entities: LongLabels  # items = regions (as str), label = first entity named
    families: Mapping[str, str] = field(default_factory=dict)  # refinement -> its entity ("yellow tag" -> "tag")

    @property
    def raters(self) -> IntArray:
        """Annotators who judged each region, (regions,)."""
        return np.bincount(self.main_entities.item_codes, minlength=len(self.regions))


@dataclass(frozen=True)
class Reading:
    """What one label says in a region of one predicted class: the concepts it names, each mapped to its
    entity (see :func:`analysis.concepts.judgment_families`), and its main entity."""

    families: Mapping[str, str]
    concepts: tuple[str, ...]
    main: str


def read_label(entities: tuple[tuple[str, tuple[str, ...]], ...], cls: str | None, *, rules: SynonymRules | None,
               words: frozenset[str]) -> Reading:
    """One label (``entities`` as typed) read in a region predicted as ``cls``, with the campaign's rules and attribute words."""
    j = Judgment(0, "", entities)
    fam = judgment_families(j, rules=rules, cls=cls, attributes=words)
    return Reading(fam, tuple(fam), main_entity(j, rules=rules, cls=cls, attributes=words))


@dataclass(frozen=True)
class ReadJudgments:
    """Usable judgments as codes: each one's region, annotator and reading, every distinct label read once.

    ``words`` are the attribute words the readings were made with (see :func:`analysis.concepts.attribute_words`).
    """

    region_ids: IntArray  # (J,)
    annotators: tuple[str, ...]  # sorted
    annotator_codes: IntArray  # (J,)
    readings: tuple[Reading, ...]
    reading_codes: IntArray  # (J,)
    words: frozenset[str] = frozenset()


def read_judgments(judgments: Iterable[Judgment], *, rules: SynonymRules | None = None, region_class: Mapping[int, str] | None = None) -> ReadJudgments:
    """The usable judgments (not marked unsure), read: the same few labels come back thousands of times, each distinct one is read once."""
    region_class = region_class or {}
    usable = [j for j in judgments if not j.unsure]
    words = attribute_words(usable, rules=rules)
    index: dict[tuple[object, str | None], int] = {}
    readings: list[Reading] = []
    codes = np.empty(len(usable), dtype=np.int64)
    for n, j in enumerate(usable):
        cls = region_class.get(j.region_id)
        k = index.get((j.entities, cls))
        if k is None:
            k = index[(j.entities, cls)] = len(readings)
            readings.append(read_label(j.entities, cls, rules=rules, words=words))
        codes[n] = k
    annotators = tuple(sorted({j.annotator for j in usable}))
    a_index = {a: i for i, a in enumerate(annotators)}
    return ReadJudgments(np.fromiter((int(j.region_id) for j in usable), dtype=np.int64, count=len(usable)), annotators,
                         np.fromiter((a_index[j.annotator] for j in usable), dtype=np.int64, count=len(usable)), tuple(readings), codes, words)


def known_concepts(known: Mapping[int, Iterable[str]], *, rules: SynonymRules | None = None, region_class: Mapping[int, str] | None = None,
                   words: frozenset[str] = frozenset()) -> tuple[dict[int, set[str]], dict[str, str]]:
    """The concepts each check region is known to show (normalised, read through the rules), and the refinements among them -> their entity."""
    region_class = region_class or {}
    families: dict[str, str] = {}
    known_sets: dict[int, set[str]] = {}
    for r, cs in known.items():
        found: set[str] = set()
        for c in cs:
            label = normalise_label(c)
            if not label:
                continue
            head, lead = entity_with_attributes(label, rules or SynonymRules(), region_class.get(int(r)), words)
            found.add(head)
            for attr in lead:
                found.add(f"{attr} {head}")
                families.setdefault(f"{attr} {head}", head)
        known_sets[int(r)] = found
    return known_sets, families


def presence_votes(
    judgments: Iterable[Judgment],
    *,
    rules: SynonymRules | None = None,
    region_class: Mapping[int, str] | None = None,
    known: Mapping[int, Iterable[str]] | None = None,
) -> PresenceVotes:
    """Turn judgments into yes/no votes; judgments flagged unsure are left out.

    ``region_class`` gives each region's predicted class (for class-dependent splits);
    ``known`` gives the concepts a check region is known to show (normalised on the way in),
    which become known-yes pairs, and every other concept named there a known no. A known
    refinement ("yellow tag") makes its entity ("tag") known too.

    Concepts form families (see :func:`analysis.concepts.judgment_families`): naming "yellow tag"
    or "tag: yellow" is a yes vote for "tag" as well, and the words any annotator used as an
    attribute are split off the front of multi-word entities throughout. ``families`` of the
    result maps each refinement to its entity.
    """
    read = read_judgments(judgments, rules=rules, region_class=region_class)
    return votes_from_read(read, known=known, rules=rules, region_class=region_class)


def votes_from_read(read: ReadJudgments, *, known: Mapping[int, Iterable[str]] | None = None, rules: SynonymRules | None = None,
                    region_class: Mapping[int, str] | None = None) -> PresenceVotes:
    """:func:`presence_votes` from judgments already read (see :func:`read_judgments`).

    Pairs come sorted by region, then concept; each pair's votes in the order of the judgments. Only the
    distinct readings are visited one by one; the rest is array work, so it costs little per judgment.
    """
    if len(read.region_ids) == 0:
        raise InvalidInputError("no judgments to aggregate (none given, or all marked not sure); collect labels first.")
    known_sets, families = known_concepts(known or {}, rules=rules, region_class=region_class, words=read.words)
    used = sorted_distinct(read.reading_codes)
    for k in used:
        for concept, e in read.readings[k].families.items():
            if concept != e:
                families.setdefault(concept, e)
    regions_arr, jr = np.unique(read.region_ids, return_inverse=True)
    jr = jr.astype(np.int64).reshape(-1)
    ja = read.annotator_codes
    n_ann = max(len(read.annotators), 1)
    pair_key = jr * n_ann + ja
    keys, first, times = np.unique(pair_key, return_index=True, return_counts=True)
    if len(keys) < len(pair_key):
        dup = int(first[np.argmax(times > 1)])
        raise InvalidInputError(f"annotator {read.annotators[int(ja[dup])]!r} judged region {int(read.region_ids[dup])} twice; "
                                "keep one judgment per region and annotator.")
    regions = tuple(int(r) for r in regions_arr)
    concept_set = {c for k in used for c in read.readings[k].concepts}
    r_index = {r: i for i, r in enumerate(regions)}
    answered = {r_index[r]: found for r, found in known_sets.items() if r in r_index}
    for found in answered.values():
        concept_set |= found
    concepts = tuple(sorted(concept_set))
    c_index = {c: i for i, c in enumerate(concepts)}
    n_c = max(len(concepts), 1)
    # What each judgment named, as sorted keys judgment * n_c + concept code.
    in_use = np.zeros(len(read.readings), dtype=bool)
    in_use[used] = True
    reading_concepts = [sorted(c_index[c] for c in x.concepts) if in_use[k] else [] for k, x in enumerate(read.readings)]
    sizes = np.fromiter((len(c) for c in reading_concepts), dtype=np.int64, count=len(reading_concepts))
    flat = np.fromiter((c for cs in reading_concepts for c in cs), dtype=np.int64, count=int(sizes.sum()))
    starts = np.cumsum(sizes) - sizes
    per_judgment = sizes[read.reading_codes]
    named_j = np.repeat(np.arange(len(jr), dtype=np.int64), per_judgment)
    offset = np.arange(len(named_j), dtype=np.int64) - np.repeat(np.cumsum(per_judgment) - per_judgment, per_judgment)
    named_c = flat[starts[read.reading_codes][named_j] + offset]
    named_key = named_j * n_c + named_c
    # The pairs: every (region, concept) somebody named there, and the concepts of a check region's answer.
    has_answer = np.zeros(len(regions), dtype=bool)
    has_answer[list(answered)] = True
    known_keys = np.array(sorted(i * n_c + c_index[c] for i, found in answered.items() for c in found), dtype=np.int64)
    pairs = sorted_distinct(np.concatenate([jr[named_j] * n_c + named_c, known_keys]))
    pr, pc = pairs // n_c, pairs % n_c
    kn = np.where(has_answer[pr], np.isin(pairs, known_keys).astype(np.int64), -1)
    # Every judgment of a pair's region votes on it: yes where it named the concept.
    order = np.argsort(jr, kind="stable")  # judgments by region, in their own order within one
    per_region = np.bincount(jr, minlength=len(regions))
    region_start = np.cumsum(per_region) - per_region
    n_votes = per_region[pr]
    vp = np.repeat(np.arange(len(pairs), dtype=np.int64), n_votes)
    k = np.arange(len(vp), dtype=np.int64) - np.repeat(np.cumsum(n_votes) - n_votes, n_votes)
    voter = order[region_start[pr[vp]] + k]
    asked = voter * n_c + pc[vp]
    at = np.minimum(np.searchsorted(named_key, asked), max(len(named_key) - 1, 0))
    vy = named_key[at] == asked if len(named_key) else np.zeros(len(asked), dtype=bool)
    ent_names = tuple(sorted({read.readings[k].main for k in used}))
    e_index = {e: i for i, e in enumerate(ent_names)}
    reading_entity = np.array([e_index.get(x.main, -1) for x in read.readings], dtype=np.int64)
    by_key = np.lexsort((ja, jr))  # (region, annotator)
    main = LongLabels(tuple(str(r) for r in regions), read.annotators, ent_names, jr[by_key], ja[by_key], reading_entity[read.reading_codes][by_key])
    fams = {c: e for c, e in sorted(families.items()) if c in concept_set and e in concept_set}
    return PresenceVotes(regions, read.annotators, concepts, pr, pc, kn.astype(np.int64), vp, ja[voter], np.asarray(vy, dtype=bool), main, fams)


@dataclass(frozen=True)
class AnnotatorRates:
    """What the aggregation learned of one annotator, each rate with the items it rests on and its 95% interval."""

    annotator: str
    sensitivity: Rate  # P(names the concept | it is there)
    specificity: Rate  # P(leaves it out | it is not there)

    def to_dict(self) -> dict[str, object]:
        return {"annotator": self.annotator, "sensitivity": self.sensitivity.to_dict(), "specificity": self.specificity.to_dict()}


@dataclass(frozen=True)
class ConceptEstimate:
    """Probability that each (region, concept) pair is present, and what the method learned of each annotator.

    ``rate_counts[a, t, g]`` are the (expected) votes of annotator a with truth t (1 = present) and
    vote g (1 = yes), and ``pseudo`` the prior's pseudo-counts added to each (zero for majority),
    so that every sensitivity and specificity comes with the evidence behind it.
    """

    method: Method
    threshold: float  # a pair is present when its probability exceeds this
    votes: PresenceVotes
    probability: FloatArray  # (P,)
    sensitivity: FloatArray  # (annotators,) P(says yes | present); NaN where nothing supports an estimate
    specificity: FloatArray  # (annotators,) P(says no | absent)
    iterations: int
    converged: bool
    rate_counts: FloatArray = field(default_factory=lambda: np.zeros((0, 2, 2)))  # (annotators, truth, vote)
    pseudo: FloatArray = field(default_factory=lambda: np.zeros((2, 2)))  # (truth, vote)
    prior: ConfusionPrior | None = None
    fit: tuple[FloatArray, FloatArray] | None = None  # Dawid-Skene's (confusion, class shares), to start a later fit from

    def annotator_rates(self) -> list[AnnotatorRates]:
        """Each annotator's sensitivity and specificity with their counts and 95% intervals (Beta posterior).

        The interval is the marginal of the Dirichlet posterior of the confusion row: under the
        Dawid-Skene prior for its methods, under a uniform prior for majority vote.
        """
        out = []
        for k, name in enumerate(self.votes.annotators):
            counts = self.rate_counts[k] if k < len(self.rate_counts) else np.zeros((2, 2))
            out.append(AnnotatorRates(name, cell_rate(counts[1], self.pseudo[1], 1), cell_rate(counts[0], self.pseudo[0], 0)))
        return out

    @property
    def present(self) -> BoolArray:
        return self.probability > self.threshold

    def region_concepts(self) -> dict[int, dict[str, float]]:
        """``{region_id: {concept: probability}}`` for the present pairs; every judged region has an entry.

        An entity is present wherever one of its refinements is, with at least the refinement's probability.
        """
        v = self.votes
        out: dict[int, dict[str, float]] = {r: {} for r in v.regions}
        present = np.nonzero(self.present)[0]
        for r, c, prob in zip(v.pair_region[present].tolist(), v.pair_concept[present].tolist(), self.probability[present].tolist()):
            out[v.regions[r]][v.concepts[c]] = prob
        # A region showing a refinement shows its entity ("yellow tag" counts for "tag").
        for found in out.values():
            for c, prob in list(found.items()):
                e = v.families.get(c)
                if e is not None and found.get(e, -1.0) < prob:
                    found[e] = prob
        return out


def estimate_concepts(votes: PresenceVotes, *, method: Method = "majority", threshold: float = 0.5, prior: ConfusionPrior = DEFAULT_PRIOR,
                      tol: float = 1e-8, max_iter: int = 1000, start: ConceptEstimate | None = None) -> ConceptEstimate:
    """Aggregate the yes/no votes with ``method`` (majority, dawid-skene or one-coin).

    Majority gives each pair the share of its region's annotators who named it, so with the
    default threshold a concept needs more than half of them. Known pairs keep their answer.
    Dawid-Skene learns each annotator's sensitivity and specificity under ``prior`` (see
    :class:`analysis.reliability.ConfusionPrior`). ``start``, an earlier estimate by the same method of
    the same annotators' votes (e.g. before the newest label), warm-starts it: fewer iterations, but not
    necessarily the cold start's stopping point (see :func:`analysis.reliability.dawid_skene`). A start of other annotators or another method is ignored.
    """
    if not 0 <= threshold < 1:
        raise InvalidInputError(f"threshold must be in [0, 1); got {threshold}. 0.5 keeps what more than half support.")
    n_pairs = len(votes.pair_region)
    n_ann = len(votes.annotators)
    if n_pairs == 0:
        probability = np.zeros(0)
        sens = spec = np.full(n_ann, np.nan)
        return ConceptEstimate(method, threshold, votes, probability, sens, spec, 0, True, np.zeros((n_ann, 2, 2)))
    known = {int(p): int(votes.known[p]) for p in np.nonzero(votes.known >= 0)[0]}
    yes = votes.vote_yes.astype(np.int64)
    if method == "majority":
        agg = aggregate(votes.vote_pair, votes.vote_annotator, yes, n_classes=2, method=method, known=known)
    else:
        items, anns, said, weights = _with_unnamed(votes, known)
        fit = _start_for(start, votes.annotators) if start is not None and start.method == method else None
        agg = aggregate(items, anns, said, n_classes=2, method=method, known=known, prior=prior, tol=tol, max_iter=max_iter, item_weights=weights,
                        start=fit)
    probability = np.asarray(agg.posterior[:n_pairs, 1], dtype=np.float64)  # every pair has its region's votes
    counts = np.zeros((n_ann, 2, 2))
    if agg.confusion_counts is not None:
        # An annotator who only ever said "nothing recognisable" where nobody named anything casts no vote.
        counts[: len(agg.confusion_counts)] = agg.confusion_counts
        used = agg.confusion_prior or prior
        pseudo = used.pseudo_counts(2)
    else:
        # Majority: how often an annotator's yes/no matches the aggregated presence.
        truth = (probability > threshold)[votes.vote_pair].astype(np.int64)
        np.add.at(counts, (votes.vote_annotator, truth, votes.vote_yes.astype(np.int64)), 1.0)
        pseudo = np.zeros((2, 2))
    est = ConceptEstimate(method, threshold, votes, probability, np.full(n_ann, np.nan), np.full(n_ann, np.nan), agg.iterations, agg.converged,
                          counts, pseudo, agg.confusion_prior, None if agg.confusion is None else (agg.confusion, agg.prior))
    rates = est.annotator_rates()
    return replace(est, sensitivity=np.array([r.sensitivity.estimate for r in rates]), specificity=np.array([r.specificity.estimate for r in rates]))


def _start_for(start: ConceptEstimate, annotators: tuple[str, ...]) -> tuple[FloatArray, FloatArray] | None:
    """An earlier fit's (confusion, class shares) for these annotators: each one's own, the earlier annotators' mean for a newcomer."""
    if start.fit is None or not start.votes.annotators:
        return None
    confusion, shares = start.fit
    if confusion.shape[0] != len(start.votes.annotators):
        return None
    row = {a: k for k, a in enumerate(start.votes.annotators)}
    mean = confusion.mean(axis=0)
    return np.stack([confusion[row[a]] if a in row else mean for a in annotators]), shares


def _with_unnamed(votes: PresenceVotes, known: dict[int, int]) -> tuple[IntArray, IntArray, IntArray, FloatArray]:
    """The votes plus, per region, one item standing for every campaign concept nobody named there.

    Each annotator who judged a region said "no" to those concepts as plainly as to one somebody
    else named. Without them every pair has at least one "yes", and Dawid-Skene, which does not
    know that, can explain the data better by calling "present" only what everybody named.
    The item's weight is the number of such concepts; on a check region they are known absent.
    """
    n_pairs = len(votes.pair_region)
    n_regions = len(votes.regions)
    named_pairs = np.bincount(votes.pair_region, minlength=n_regions)
    weights = len(votes.concepts) - named_pairs
    m = votes.main_entities
    item = n_pairs + m.item_codes  # region codes are the main entities' item codes
    known_regions = {int(votes.pair_region[p]) for p in known}
    for r in known_regions:
        known[n_pairs + r] = 0
    items = np.concatenate([votes.vote_pair, item])
    anns = np.concatenate([votes.vote_annotator, m.annotator_codes])
    said = np.concatenate([votes.vote_yes.astype(np.int64), np.zeros(len(item), dtype=np.int64)])
    return items, anns, said, np.concatenate([np.ones(n_pairs), weights.astype(np.float64)])


@dataclass(frozen=True)
class ConceptAgreement:
    """Krippendorff's alpha on one concept's presence (yes/no per region and annotator)."""

    concept: str
    regions_named: int  # regions where at least one annotator named it
    alpha: float | None
    interval: tuple[float, float] | None
    note: str


def presence_agreement(votes: PresenceVotes, *, concepts: Sequence[str] | None = None, n_boot: int = 200, seed: int = 0) -> list[ConceptAgreement]:
    """Alpha per concept over every region rated twice or more (absent votes included), most named first.

    A concept nobody disagrees on, or that every pairable region has, leaves alpha undefined;
    the note says why instead of returning NaN.
    """
    m = votes.raters.astype(np.float64)
    wanted = range(len(votes.concepts)) if concepts is None else [votes.concepts.index(c) for c in dict.fromkeys(concepts) if c in votes.concepts]
    yes_pair = np.bincount(votes.vote_pair, weights=votes.vote_yes, minlength=len(votes.pair_region))
    # Yes votes per (region, wanted concept), for all wanted concepts in one pass over the pairs.
    slot = np.full(len(votes.concepts), -1, dtype=np.int64)
    slot[list(wanted)] = np.arange(len(wanted))
    at = slot[votes.pair_concept]
    sel = at >= 0
    yes_all = np.bincount(votes.pair_region[sel] * max(len(wanted), 1) + at[sel], weights=yes_pair[sel],
                          minlength=len(votes.regions) * max(len(wanted), 1)).reshape(len(votes.regions), max(len(wanted), 1))
    # Regions with the same raters and yes votes are interchangeable in alpha: per concept, the distinct (no, yes)
    # rows and how many regions show each, all concepts in one count (raters and votes are whole numbers).
    width = int(m.max(initial=0)) + 1
    n_wanted = max(len(wanted), 1)
    cell = (np.arange(n_wanted) * width * width)[None, :] + (m.astype(np.int64) * width)[:, None] + yes_all.astype(np.int64)
    shares = np.bincount(cell.ravel(), minlength=n_wanted * width * width).reshape(n_wanted, width, width)
    out = []
    for k, c in enumerate(wanted):
        raters, yes = np.nonzero(shares[k])
        rows = np.column_stack([raters - yes, yes]).astype(np.float64)
        order = np.lexsort(rows.T)  # the order alpha_with_interval groups rows in: the same resamples
        alpha, interval, note = alpha_with_interval_of_rows(rows[order], shares[k][raters, yes][order], n_boot=n_boot, seed=seed)
        named = int(shares[k][:, 1:].sum())
        out.append(ConceptAgreement(votes.concepts[c], named, alpha, interval, note))
    return sorted(out, key=lambda a: (-a.regions_named, a.concept))
