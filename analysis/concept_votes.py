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

from .agreement import alpha_with_interval
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
    region_class = region_class or {}
    judgments = [j for j in judgments if not j.unsure]
    words = attribute_words(judgments, rules=rules)
    families: dict[str, str] = {}
    known_sets: dict[int, set[str]] = {}
    for r, cs in (known or {}).items():
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
    named: dict[tuple[int, str], set[str]] = {}
    entity: dict[tuple[int, str], str] = {}
    # Reading a label depends only on what was typed and the region's class (the rules and attribute words are
    # fixed here), and the same few labels come back thousands of times: read each distinct one once.
    read: dict[tuple[object, str | None], tuple[dict[str, str], frozenset[str], str]] = {}
    for j in judgments:
        key = (int(j.region_id), j.annotator)
        if key in named:
            raise InvalidInputError(f"annotator {j.annotator!r} judged region {j.region_id} twice; keep one judgment per region and annotator.")
        cls = region_class.get(j.region_id)
        seen = read.get((j.entities, cls))
        if seen is None:
            fam = judgment_families(j, rules=rules, cls=cls, attributes=words)
            seen = read[(j.entities, cls)] = (fam, frozenset(fam), main_entity(j, rules=rules, cls=cls, attributes=words))
            for concept, e in fam.items():
                if concept != e:
                    families.setdefault(concept, e)
        named[key] = set(seen[1])
        entity[key] = seen[2]
    if not named:
        raise InvalidInputError("no judgments to aggregate (none given, or all marked not sure); collect labels first.")
    regions = tuple(sorted({r for r, _ in named}))
    annotators = tuple(sorted({a for _, a in named}))
    concept_set = {c for cs in named.values() for c in cs}
    for r in regions:
        concept_set |= known_sets.get(r, set())
    concepts = tuple(sorted(concept_set))
    r_index = {r: i for i, r in enumerate(regions)}
    a_index = {a: i for i, a in enumerate(annotators)}
    c_index = {c: i for i, c in enumerate(concepts)}
    per_region: dict[int, list[tuple[int, set[str]]]] = {}
    for (r, a), cs in named.items():
        per_region.setdefault(r, []).append((a_index[a], cs))
    pr: list[int] = []
    pc: list[int] = []
    kn: list[int] = []
    vp: list[int] = []
    va: list[int] = []
    vy: list[bool] = []
    for r in regions:
        raters = per_region[r]
        answer = known_sets.get(r)
        union = set().union(*(cs for _, cs in raters)) | (answer or set())
        for c in sorted(union):
            p = len(pr)
            pr.append(r_index[r])
            pc.append(c_index[c])
            kn.append(-1 if answer is None else int(c in answer))
            for rater, cs in raters:
                vp.append(p)
                va.append(rater)
                vy.append(c in cs)
    keys = sorted(entity)
    ent_names = tuple(sorted(set(entity.values())))
    e_index = {e: i for i, e in enumerate(ent_names)}
    main = LongLabels(
        tuple(str(r) for r in regions), annotators, ent_names,
        np.array([r_index[r] for r, _ in keys], dtype=np.int64),
        np.array([a_index[a] for _, a in keys], dtype=np.int64),
        np.array([e_index[entity[k]] for k in keys], dtype=np.int64),
    )

    def as_int(v: list[int]) -> IntArray:
        return np.array(v, dtype=np.int64)

    fams = {c: e for c, e in sorted(families.items()) if c in concept_set and e in concept_set}
    return PresenceVotes(regions, annotators, concepts, as_int(pr), as_int(pc), as_int(kn), as_int(vp), as_int(va), np.array(vy, dtype=bool), main, fams)


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
        for p in np.nonzero(self.present)[0]:
            out[v.regions[v.pair_region[p]]][v.concepts[v.pair_concept[p]]] = float(self.probability[p])
        # A region showing a refinement shows its entity ("yellow tag" counts for "tag").
        for found in out.values():
            for c, prob in list(found.items()):
                e = v.families.get(c)
                if e is not None and found.get(e, -1.0) < prob:
                    found[e] = prob
        return out


def estimate_concepts(votes: PresenceVotes, *, method: Method = "majority", threshold: float = 0.5, prior: ConfusionPrior = DEFAULT_PRIOR,
                      tol: float = 1e-8, max_iter: int = 1000) -> ConceptEstimate:
    """Aggregate the yes/no votes with ``method`` (majority, dawid-skene or one-coin).

    Majority gives each pair the share of its region's annotators who named it, so with the
    default threshold a concept needs more than half of them. Known pairs keep their answer.
    Dawid-Skene learns each annotator's sensitivity and specificity under ``prior`` (see
    :class:`analysis.reliability.ConfusionPrior`).
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
        agg = aggregate(items, anns, said, n_classes=2, method=method, known=known, prior=prior, tol=tol, max_iter=max_iter, item_weights=weights)
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
                          counts, pseudo, agg.confusion_prior)
    rates = est.annotator_rates()
    return replace(est, sensitivity=np.array([r.sensitivity.estimate for r in rates]), specificity=np.array([r.specificity.estimate for r in rates]))


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
    wanted = range(len(votes.concepts)) if concepts is None else [votes.concepts.index(c) for c in concepts if c in votes.concepts]
    yes_pair = np.bincount(votes.vote_pair, weights=votes.vote_yes, minlength=len(votes.pair_region))
    out = []
    for c in wanted:
        sel = votes.pair_concept == c
        yes = np.zeros(len(votes.regions))
        np.add.at(yes, votes.pair_region[sel], yes_pair[sel])
        counts = np.column_stack([m - yes, yes])
        named = int((yes > 0).sum())
        alpha, interval, note = alpha_with_interval(counts, n_boot=n_boot, seed=seed)
        out.append(ConceptAgreement(votes.concepts[c], named, alpha, interval, note))
    return sorted(out, key=lambda a: (-a.regions_named, a.concept))
