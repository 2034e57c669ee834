"""The campaign-analysis use case: a campaign's labels -> its concept table, its votes, its main labels.

Pages, commands, the report and the demo take a campaign's results from here only; the work
itself is analysis.pipeline's.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import TypeVar, cast

import numpy as np
import pandas as pd
from sqlalchemy.orm import Session

from analysis.agreement_report import AgreementReport, agreement_report
from analysis.concept_table import TARGETS, ConceptTable, Target
from analysis.concept_votes import (
    AnnotatorRates,
    ConceptAgreement,
    PresenceVotes,
    estimate_concepts,
    presence_agreement,
)
from analysis.pipeline import campaign_table, campaign_votes
from analysis.reliability import Method
from analysis.rules import RuleTable

from .. import campaigns, store
from ..campaigns import CampaignInfo
from ..errors import InvalidRequestError, NotFoundError
from ..models import SaliencyRun

T = TypeVar("T")


@dataclass(frozen=True)
class Results:
    """What a campaign's labels add up to: the concept table (with how it was made)."""

    campaign: CampaignInfo
    table: ConceptTable
    n_labelled_regions: int
    model_sha256: str = ""  # of the run's model: interventions are kept per model version

    @property
    def method(self) -> str:
        return self.table.method


@dataclass
class ResultsCache:
    """Computed results per (what, state of a campaign's labels), shared by the app's request threads.

    The key includes store.labels_version, which changes with every label, synonym rule, check
    item or method change, so an entry is never stale; the oldest entries make room for new ones.
    """

    size: int = 32
    _found: dict[tuple[object, ...], object] = field(default_factory=dict)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def get_or_make(self, key: tuple[object, ...], make: Callable[[], T]) -> T:
        found = self._found.get(key)
        if found is None:
            found = make()
            with self._lock:
                while len(self._found) >= self.size:
                    self._found.pop(next(iter(self._found)))
                self._found[key] = found
        return cast(T, found)


def _campaign(s: Session, campaign: CampaignInfo | int) -> CampaignInfo:
    return campaigns.get_campaign(s, campaign) if isinstance(campaign, int) else campaign


def _method(campaign: CampaignInfo) -> Method:
    # Checked against METHODS when the campaign is stored, and again by the pipeline.
    return cast(Method, campaign.method)


def compute_results(s: Session, campaign: CampaignInfo, *, threshold: float = 0.5) -> Results:
    """The campaign's concept table, from its labels, synonym rules, check answers and the run's predictions."""
    found = campaigns.judgments(s, campaign.id)
    if not found:
        raise NotFoundError(f"campaign {campaign.name!r} has no labels yet; label some regions first.")
    design = campaigns.sample_of(s, campaign.id)
    made = campaign_table(
        found, store.prediction_frame(s, campaign.run_id), rules=campaigns.synonym_rules(s, campaign.id)[0],
        region_class=campaigns.region_classes(s, campaign.id), check_answers=campaigns.check_answers(s, campaign.id),
        classes=campaign.classes, method=_method(campaign), threshold=threshold,
        sample=design[0] if design else None, population=design[1] if design else None,
    )
    run = s.get(SaliencyRun, campaign.run_id)
    return Results(campaign, made.table, made.n_labelled_regions, str((run.provenance or {}).get("model_sha256", "")) if run else "")


def campaign_results(s: Session, campaign: CampaignInfo | int, *, cache: ResultsCache | None = None) -> Results:
    """The campaign's results, computed once per state of its labels and rules when a cache is given."""
    c = _campaign(s, campaign)
    if cache is None:
        return compute_results(s, c)
    found = cache.get_or_make(("results", *store.labels_version(s, c.id)), lambda: compute_results(s, c))
    return replace(found, campaign=c)  # the table is cached; the campaign's text fields are read fresh


def target_of(target: str) -> Target:
    """``target`` as one of TARGETS, or an error that lists them."""
    for t in TARGETS:
        if t == target:
            return t
    raise InvalidRequestError(f"target must be one of {', '.join(TARGETS)}; got {target!r}.")


def campaign_rules(res: Results, *, target: str = "predicted", max_len: int = 2, min_support: float, prune: bool = True) -> RuleTable:
    """The campaign's concept rules for a target class (predicted, true or errors)."""
    if not 1 <= max_len <= 4:
        raise InvalidRequestError(f"max_len must be 1-4 concepts; got {max_len}.")
    return res.table.rules(target=target_of(target), min_support=min_support, max_len=max_len, prune=prune)


def votes(s: Session, campaign: CampaignInfo) -> PresenceVotes:
    """The campaign's yes/no votes per (region, concept) and main entities, among annotators only.

    Check answers are left out: agreement is about the annotators, not about the answer key.
    """
    found = campaigns.judgments(s, campaign.id)
    if not found:
        raise NotFoundError(f"campaign {campaign.name!r} has no labels yet; label some regions first.")
    return campaign_votes(found, rules=campaigns.synonym_rules(s, campaign.id)[0], region_class=campaigns.region_classes(s, campaign.id))


def main_labels(s: Session, campaign: CampaignInfo | int) -> pd.DataFrame:
    """Each usable judgment's main entity as item, annotator, label (the long form the agreement commands read)."""
    m = votes(s, _campaign(s, campaign)).main_entities
    return pd.DataFrame({"item": [m.items[i] for i in m.item_codes], "annotator": [m.annotators[a] for a in m.annotator_codes],
                         "label": [m.classes[y] for y in m.label_codes]})


@dataclass(frozen=True)
class AgreementSummary:
    """What the agreement page shows: agreement on the main entity, per concept (the most named), and each annotator's reliability."""

    report: AgreementReport
    concepts: list[ConceptAgreement]
    reliability: dict[str, AnnotatorRates]  # annotator -> sensitivity and specificity from Dawid-Skene, with counts and intervals
    reliability_note: str = ""  # the smoothing and convergence behind them


def most_named(v: PresenceVotes, top: int) -> list[str]:
    """The ``top`` concepts named in the most regions (ties by name): the order presence_agreement sorts in."""
    named_pair = np.bincount(v.vote_pair, weights=v.vote_yes, minlength=len(v.pair_region)) > 0
    regions_named = np.bincount(v.pair_concept[named_pair], minlength=len(v.concepts))
    order = sorted(range(len(v.concepts)), key=lambda c: (-int(regions_named[c]), v.concepts[c]))
    return [v.concepts[c] for c in order[:top]]


def _agreement(s: Session, c: CampaignInfo, *, top_concepts: int) -> AgreementSummary:
    v = votes(s, c)
    report = agreement_report(v.main_entities, n_boot=500, top_disputed=12)
    # Alpha with its bootstrap interval costs the same for every concept: compute it only for those shown.
    concepts = presence_agreement(v, concepts=most_named(v, top_concepts), n_boot=200)
    ds = estimate_concepts(v, method="dawid-skene")
    reliability = {r.annotator: r for r in ds.annotator_rates()}
    note = f"{ds.prior.describe() if ds.prior else 'no smoothing'}; {'converged' if ds.converged else 'did not converge'} after {ds.iterations} iterations"
    return AgreementSummary(report, concepts, reliability, note)


def campaign_progress(s: Session, campaign: CampaignInfo | int, *, cache: ResultsCache | None = None
                      ) -> tuple[list[campaigns.AnnotatorProgress], list[campaigns.ClassProgress]]:
    """Progress per annotator (labels, skips, time, check-item score) and per class, once per state of the labels and skips."""
    c = _campaign(s, campaign)
    if cache is None:
        return campaigns.campaign_progress(s, c)
    return cache.get_or_make(("progress", *store.labels_version(s, c.id), *campaigns.skips_version(s, c.id)), lambda: campaigns.campaign_progress(s, c))


def agreement_summary(s: Session, campaign: CampaignInfo | int, *, cache: ResultsCache | None = None, top_concepts: int = 40) -> AgreementSummary:
    """Agreement on the main entity and on the ``top_concepts`` most named concepts, and each annotator's reliability."""
    c = _campaign(s, campaign)
    if cache is None:
        return _agreement(s, c, top_concepts=top_concepts)
    return cache.get_or_make(("agreement", top_concepts, *store.labels_version(s, c.id)), lambda: _agreement(s, c, top_concepts=top_concepts))
