"""The campaign-analysis use case: a campaign's labels -> its concept table, its votes, its main labels.

Pages, commands, the report and the demo take a campaign's results from here only; the work
itself is analysis.pipeline's.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass, field, replace
from typing import cast

import pandas as pd
from sqlalchemy.orm import Session

from analysis.concept_table import ConceptTable
from analysis.concept_votes import PresenceVotes
from analysis.pipeline import campaign_table, campaign_votes
from analysis.reliability import Method

from .. import campaigns, store
from ..campaigns import CampaignInfo
from ..errors import NotFoundError
from ..models import SaliencyRun


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
    """Results per state of a campaign's labels (store.labels_version), shared by the app's request threads."""

    size: int = 16
    _found: dict[tuple[object, ...], Results] = field(default_factory=dict)
    _lock: threading.Lock = field(default_factory=threading.Lock)

    def get(self, key: tuple[object, ...]) -> Results | None:
        return self._found.get(key)

    def put(self, key: tuple[object, ...], value: Results) -> None:
        with self._lock:
            while len(self._found) >= self.size:
                self._found.pop(next(iter(self._found)))
            self._found[key] = value


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
    made = campaign_table(
        found, store.prediction_frame(s, campaign.run_id), rules=campaigns.synonym_rules(s, campaign.id)[0],
        region_class=campaigns.region_classes(s, campaign.id), check_answers=campaigns.check_answers(s, campaign.id),
        classes=campaign.classes, method=_method(campaign), threshold=threshold,
    )
    run = s.get(SaliencyRun, campaign.run_id)
    return Results(campaign, made.table, made.n_labelled_regions, str((run.provenance or {}).get("model_sha256", "")) if run else "")


def campaign_results(s: Session, campaign: CampaignInfo | int, *, cache: ResultsCache | None = None) -> Results:
    """The campaign's results, computed once per state of its labels and rules when a cache is given."""
    c = _campaign(s, campaign)
    if cache is None:
        return compute_results(s, c)
    key = store.labels_version(s, c.id)
    found = cache.get(key)
    if found is None:
        found = compute_results(s, c)
        cache.put(key, found)
    return replace(found, campaign=c)  # the table is cached; the campaign's text fields are read fresh


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
