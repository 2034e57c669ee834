"""From a campaign's judgments to its concept table, in one pure function.

The data path: judgments (with the synonym rules and the check items' known answers) become
yes/no votes per (region, concept); the aggregation method estimates which concepts each region
shows; images whose regions are all labelled make the image-by-concept table. Everything that
shows results (pages, commands, the report, the demo) gets its table from here, through the
application's campaign-analysis service.
"""

from __future__ import annotations

import itertools
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
import numpy.typing as npt
import pandas as pd
from scipy import sparse

from .concept_table import ConceptTable, concept_table_from_regions
from .concept_votes import ConceptEstimate, PresenceVotes, ReadJudgments, estimate_concepts, read_judgments, sorted_distinct, votes_from_read
from .concepts import Judgment, judgment_concepts
from .errors import InvalidInputError, NotEnoughLabelsError
from .reliability import METHODS, Method
from .rules import RegionMass
from .sampling import Design
from .synonyms import SynonymRules

PREDICTION_COLUMNS = ("label", "predicted", "confidence", "split", "regions", "mass_shares")


@dataclass(frozen=True)
class CampaignTable:
    """The concept table and how many labelled regions went into it."""

    table: ConceptTable
    n_labelled_regions: int


def campaign_votes(
    judgments: Sequence[Judgment] | ReadJudgments,
    *,
    rules: SynonymRules | None = None,
    region_class: Mapping[int, str] | None = None,
    check_answers: Mapping[int, Judgment] | None = None,
) -> PresenceVotes:
    """Yes/no votes per (region, concept) from the judgments; check answers become known pairs.

    Raises
    ------
    NotEnoughLabelsError
        When no judgment is usable (none given, or every one marked not sure).
    """
    if isinstance(judgments, ReadJudgments):  # read already (the app keeps them read between requests)
        read = judgments
        if len(read.region_ids) == 0:
            raise NotEnoughLabelsError("no usable labels yet (there are none, or all are marked not sure); label some regions first.")
    else:
        usable = [j for j in judgments if not j.unsure]
        if not usable:
            detail = f"all {len(judgments)} are marked not sure" if judgments else "there are none"
            raise NotEnoughLabelsError(f"no usable labels yet ({detail}); label some regions first.")
        read = read_judgments(usable, rules=rules, region_class=region_class)
    region_class = region_class or {}
    known = {r: judgment_concepts(j, rules=rules, cls=region_class.get(r)) for r, j in (check_answers or {}).items()}
    return votes_from_read(read, known=known, rules=rules, region_class=region_class)


def campaign_table(
    judgments: Sequence[Judgment] | ReadJudgments,
    predictions: pd.DataFrame,
    *,
    rules: SynonymRules | None = None,
    region_class: Mapping[int, str],
    check_answers: Mapping[int, Judgment] | None = None,
    classes: Sequence[str] = (),
    method: Method = "majority",
    threshold: float = 0.5,
    sample: Mapping[int, str] | None = None,
    population: Mapping[str, int] | None = None,
) -> CampaignTable:
    """The image-by-concept table of a campaign's labels.

    Parameters
    ----------
    judgments
        Every label of the campaign (those marked not sure are kept out of the votes), or its usable
        ones already read (:func:`analysis.concept_votes.read_judgments`).
    predictions
        Indexed by image id, with PREDICTION_COLUMNS: true ``label``, ``predicted`` class,
        ``confidence``, ``split``, ``regions`` (ids) and ``mass_shares`` (one per region).
    rules
        The campaign's synonym rules.
    region_class
        The predicted class of every region in the campaign; regions outside it are ignored.
    check_answers
        Known answers of check regions, held fixed by the aggregation.
    classes
        Predicted classes the campaign covers (empty: all).
    method, threshold
        How votes become concepts: a pair is present when its probability exceeds ``threshold``.
    sample, population
        A sampled campaign's design: each sampled image's stratum, and the images of each stratum in
        the population. Only sampled images count, and the table carries the design, so its rates are
        weighted estimates. Each stratum's weight is its images over its complete sampled images (a
        sampled image not yet complete is left out of its stratum as if it had not been drawn).

    Returns
    -------
    CampaignTable
        Images of the campaign's classes count once all their campaign regions have labels (an
        image with no region counts with no concept).

    Raises
    ------
    NotEnoughLabelsError
        No usable label, or no image with all its regions labelled.
    InvalidInputError
        ``predictions`` lacks a column, or ``method``/``threshold`` is out of range.
    """
    missing = [c for c in PREDICTION_COLUMNS if c not in predictions.columns]
    if missing:
        raise InvalidInputError(f"predictions lack the columns {missing}; give one row per image with {', '.join(PREDICTION_COLUMNS)}.")
    if method not in METHODS:
        raise InvalidInputError(f"method must be one of {', '.join(METHODS)}; got {method!r}.")
    votes = campaign_votes(judgments, rules=rules, region_class=region_class, check_answers=check_answers)
    est = estimate_concepts(votes, method=method, threshold=threshold)
    preds = predictions[predictions["predicted"].isin(list(classes))] if classes else predictions
    if sample is not None:
        preds = preds[preds.index.isin(list(sample))]
    # Every image's regions as flat arrays (its row in ``preds`` for each): the campaign's regions are kept, and an image
    # is complete when each of its kept regions has been judged.
    region_lists = preds["regions"].tolist()
    sizes = np.fromiter(map(len, region_lists), dtype=np.int64, count=len(region_lists))
    flat = np.fromiter(itertools.chain.from_iterable(region_lists), dtype=np.int64, count=int(sizes.sum()))
    share_lists = preds["mass_shares"].tolist()
    if any(len(ms) != n for ms, n in zip(share_lists, sizes.tolist())):
        raise InvalidInputError("predictions' mass_shares must hold one value per region of the same row; give them with the regions.")
    shares = np.fromiter(itertools.chain.from_iterable(share_lists), dtype=np.float64, count=len(flat))
    owner = np.repeat(np.arange(len(region_lists), dtype=np.int64), sizes)
    kept = np.isin(flat, np.fromiter(region_class.keys(), dtype=np.int64, count=len(region_class)))
    unjudged = kept & ~np.isin(flat, np.asarray(votes.regions, dtype=np.int64))
    is_complete = np.bincount(owner[unjudged], minlength=len(region_lists)) == 0
    complete = preds[is_complete] if len(preds) else preds
    if complete.empty:
        raise NotEnoughLabelsError("no image has all its regions labelled yet; label some more regions first.")
    meta = complete[["label", "predicted", "confidence", "split"]].rename(columns={"label": "true_class", "predicted": "predicted_class"})
    take = kept & is_complete[owner]
    region_ids = flat[take]
    concepts, carries = _carried(est, region_ids)
    regions = RegionMass((np.cumsum(is_complete) - 1)[owner[take]], shares[take], carries, region_ids)
    table = concept_table_from_regions(meta, regions, concepts, method=str(method), threshold=threshold, families=votes.families)
    if sample is not None:
        table = replace(table, design=sample_design([sample[int(i)] for i in table.meta.index], population or {}))
    return CampaignTable(table, len(votes.regions))  # the judged regions, each once (each has its concepts, none possibly)


def _carried(est: ConceptEstimate, region_ids: npt.NDArray[np.int64]) -> tuple[list[str], sparse.csc_matrix]:
    """Which concepts each of these (judged) regions carries: those present there and every entity above them
    (``families``, followed up the chain), as (sorted concept names, regions x concepts bool matrix).
    The same as completing :meth:`ConceptEstimate.region_concepts` with their entities region by region."""
    v = est.votes
    n_c = max(len(v.concepts), 1)
    code = {c: i for i, c in enumerate(v.concepts)}
    chains: list[list[int]] = []
    for c in v.concepts:
        chain, seen = [code[c]], {c}
        while c in v.families and v.families[c] not in seen:  # refinements of refinements reach the top entity
            c = v.families[c]
            seen.add(c)
            chain.append(code[c])
        chains.append(chain)
    sizes = np.array([len(ch) for ch in chains], dtype=np.int64)
    flat = np.array([a for ch in chains for a in ch], dtype=np.int64)
    starts = np.cumsum(sizes) - sizes
    present = np.nonzero(est.present)[0]
    pc = v.pair_concept[present]
    n_up = sizes[pc]
    up = np.arange(int(n_up.sum()), dtype=np.int64) - np.repeat(np.cumsum(n_up) - n_up, n_up)
    keys = sorted_distinct(np.repeat(v.pair_region[present], n_up) * n_c + flat[np.repeat(starts[pc], n_up) + up])
    key_region = keys // n_c
    codes = np.searchsorted(np.asarray(v.regions, dtype=np.int64), region_ids)
    first, last = np.searchsorted(key_region, codes, "left"), np.searchsorted(key_region, codes, "right")
    n_each = last - first
    rows = np.repeat(np.arange(len(region_ids), dtype=np.int64), n_each)
    at = np.repeat(first, n_each) + np.arange(int(n_each.sum()), dtype=np.int64) - np.repeat(np.cumsum(n_each) - n_each, n_each)
    concept_codes = keys[at] % n_c
    used = sorted_distinct(concept_codes)
    cols = np.searchsorted(used, concept_codes)
    carries = sparse.csc_matrix((np.ones(len(rows), dtype=bool), (rows, cols)), shape=(len(region_ids), len(used)))
    return [v.concepts[c] for c in used.tolist()], carries


def sample_design(strata: Sequence[str], population: Mapping[str, int]) -> Design:
    """The design of a sample from each unit's stratum name and each stratum's size in the population."""
    names = sorted(population)
    code = {n: i for i, n in enumerate(names)}
    unknown = sorted({s for s in strata if s not in code})
    if unknown:
        raise InvalidInputError(f"sampled images in strata {unknown[:5]} that have no population size; give every stratum's images.")
    return Design(np.array([code[s] for s in strata], dtype=np.int64), np.array([float(population[n]) for n in names]))
