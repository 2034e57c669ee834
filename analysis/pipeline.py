"""From a campaign's judgments to its concept table, in one pure function.

The data path: judgments (with the synonym rules and the check items' known answers) become
yes/no votes per (region, concept); the aggregation method estimates which concepts each region
shows; images whose regions are all labelled make the image-by-concept table. Everything that
shows results (pages, commands, the report, the demo) gets its table from here, through the
application's campaign-analysis service.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from .concept_table import ConceptTable, build_concept_table
from .concept_votes import PresenceVotes, ReadJudgments, estimate_concepts, read_judgments, votes_from_read
from .concepts import Judgment, judgment_concepts
from .errors import InvalidInputError, NotEnoughLabelsError
from .reliability import METHODS, Method
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
    region_concepts = estimate_concepts(votes, method=method, threshold=threshold).region_concepts()
    labelled = set(region_concepts)
    preds = predictions[predictions["predicted"].isin(list(classes))].copy() if classes else predictions.copy()
    if sample is not None:
        preds = preds[preds.index.isin(list(sample))]
    mass = {r: m for rs, ms in zip(preds["regions"], preds["mass_shares"]) for r, m in zip(rs, ms)}
    preds["regions"] = preds["regions"].map(lambda rs: [r for r in rs if r in region_class])
    complete = preds[preds["regions"].map(lambda rs: all(r in labelled for r in rs))]
    if complete.empty:
        raise NotEnoughLabelsError("no image has all its regions labelled yet; label some more regions first.")
    meta = complete[["label", "predicted", "confidence", "split"]].rename(columns={"label": "true_class", "predicted": "predicted_class"})
    image_regions = dict(zip(complete.index.to_numpy(dtype=np.int64).tolist(), complete["regions"].tolist()))
    table = build_concept_table(meta, image_regions, mass, region_concepts, method=str(method), threshold=threshold, families=votes.families)
    if sample is not None:
        table = replace(table, design=sample_design([sample[int(i)] for i in table.meta.index], population or {}))
    return CampaignTable(table, len(labelled))


def sample_design(strata: Sequence[str], population: Mapping[str, int]) -> Design:
    """The design of a sample from each unit's stratum name and each stratum's size in the population."""
    names = sorted(population)
    code = {n: i for i, n in enumerate(names)}
    unknown = sorted({s for s in strata if s not in code})
    if unknown:
        raise InvalidInputError(f"sampled images in strata {unknown[:5]} that have no population size; give every stratum's images.")
    return Design(np.array([code[s] for s in strata], dtype=np.int64), np.array([float(population[n]) for n in names]))
