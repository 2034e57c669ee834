"""The campaign-analysis use case: a campaign's labels -> its concept table, its votes, its main labels.

Pages, commands, the report and the demo take a campaign's results from here only; the work
itself is analysis.pipeline's.
"""

from __future__ import annotations

import contextlib
import gc
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import TypeVar, cast

import numpy as np
import pandas as pd
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from analysis.agreement_report import AgreementReport, agreement_report
from analysis.concept_table import TARGETS, ConceptTable, Target
from analysis.concept_votes import (
    AnnotatorRates,
    ConceptAgreement,
    PresenceVotes,
    ReadJudgments,
    estimate_concepts,
    presence_agreement,
)
from analysis.concepts import Judgment
from analysis.errors import InvalidInputError, NotEnoughLabelsError
from analysis.pipeline import campaign_table, campaign_votes
from analysis.reliability import Method
from analysis.rules import RuleTable
from analysis.synonyms import SynonymRules

from .. import campaigns, store
from ..campaigns import CampaignInfo
from ..errors import InvalidRequestError, NotFoundError
from ..models import CampaignRegion, Label, Prediction, SaliencyRun
from . import run_snapshot
from .label_store import LabelStore

T = TypeVar("T")


@dataclass(frozen=True)
class Results:
    """What a campaign's labels add up to: the concept table (with how it was made)."""

    campaign: CampaignInfo
    table: ConceptTable
    n_labelled_regions: int
    model_sha256: str = ""  # of the run's model: interventions are kept per model version
    version: tuple[object, ...] = ()  # store.labels_version these results were computed at (empty: not kept)
    cache: ResultsCache | None = field(default=None, compare=False, repr=False)  # where results made from these are kept

    @property
    def method(self) -> str:
        return self.table.method


class _CollectorPauses:
    """Nested pauses of Python's cycle collector from any thread: off at the first, back on (if it was on) after the last."""

    OVERDUE_S = 30.0  # under pauses that overlap without end, a collection runs anyway this often

    def __init__(self) -> None:
        self.depth, self.was_on, self.lock, self.since = 0, True, threading.Lock(), 0.0

    @contextlib.contextmanager
    def paused(self) -> Iterator[None]:
        with self.lock:
            if self.depth == 0:
                self.was_on = gc.isenabled()
                gc.disable()
                self.since = time.monotonic()
            self.depth += 1
        try:
            yield
        finally:
            overdue = False
            with self.lock:
                self.depth -= 1
                if self.depth == 0 and self.was_on:
                    gc.enable()
                elif self.depth > 0 and self.was_on and time.monotonic() - self.since > self.OVERDUE_S:
                    overdue, self.since = True, time.monotonic()
            if overdue:  # other results are still being made: collect once here rather than never
                gc.collect()


_pauses = _CollectorPauses()


def collector_paused() -> contextlib.AbstractContextManager[None]:
    """Python's cycle collector off while a result is made (on again when the last result being made is done).

    Making a campaign's results creates hundreds of thousands of small objects beside a live heap of that size; at the
    default thresholds the collector walks the whole heap again and again meanwhile (a third of a cold results page at
    100,000 labels). Nothing is lost: objects freed by reference counting go at once, and cycles made meanwhile are
    collected at the collector's next run after it is back on."""
    return _pauses.paused()


@dataclass
class ResultsCache:
    """Computed results per (what, state of a campaign's labels), shared by the app's request threads.

    The key includes store.labels_version, which changes with every label, synonym rule, check
    item or method change, so an entry is never stale; the oldest entries make room for new ones.
    A result being made is made once: another thread asking for the same key waits for it (the
    start-up warm-up and the first page, or two people opening the same page) instead of computing
    it again beside it on the same few cores.
    """

    size: int = 32
    labels: LabelStore = field(default_factory=LabelStore)  # each campaign's labels, read incrementally
    _found: dict[tuple[object, ...], object] = field(default_factory=dict)
    _making: dict[tuple[object, ...], threading.Event] = field(default_factory=dict)
    _lock: threading.Lock = field(default_factory=threading.Lock)
    _apart: dict[str, ResultsCache] = field(default_factory=dict)

    @classmethod
    def for_warming(cls, campaigns: int, *, snapshots: Path | None = None) -> ResultsCache:
        """A cache with room for what :func:`warm_results` makes for ``campaigns`` campaigns (about seven entries each) and
        the pages after it, and a label store holding them all: a smaller one would push the newest warmed out again.
        ``snapshots``: where the label store keeps each campaign's labels between runs (see :class:`LabelStore`)."""
        return cls(size=max(32, 8 * campaigns + 8), labels=LabelStore(campaigns_kept=max(8, campaigns + 2), snapshots=snapshots))

    def apart(self, name: str, *, size: int = 64) -> ResultsCache:
        """A cache of its own (sharing the labels held) for results that stay valid across labels versions, such as
        the results at a settling checkpoint: there the many entries each new label adds do not push them out."""
        with self._lock:
            found = self._apart.get(name)
            if found is None:
                found = self._apart[name] = ResultsCache(size=size, labels=self.labels)
            return found

    def get_or_make(self, key: tuple[object, ...], make: Callable[[], T]) -> T:
        while True:
            with self._lock:
                if key in self._found:
                    return cast(T, self._found[key])
                pending = self._making.get(key)
                if pending is None:
                    pending = self._making[key] = threading.Event()
                    break
            pending.wait()  # made by another thread: found next time round (or, if that failed, made here)
        try:
            with collector_paused():
                found = make()
            with self._lock:
                while len(self._found) >= self.size:
                    self._found.pop(next(iter(self._found)))
                self._found[key] = found
            return found
        finally:
            with self._lock:
                self._making.pop(key, None)
            pending.set()


def _campaign(s: Session, campaign: CampaignInfo | int) -> CampaignInfo:
    return campaigns.get_campaign(s, campaign) if isinstance(campaign, int) else campaign


def _method(campaign: CampaignInfo) -> Method:
    # Checked against METHODS when the campaign is stored, and again by the pipeline.
    return cast(Method, campaign.method)


def region_classes(s: Session, campaign_id: int, *, cache: ResultsCache | None = None) -> dict[int, str]:
    """Each campaign region's predicted class (``campaigns.region_classes``), kept while the campaign's regions stay the same."""
    if cache is None:
        return campaigns.region_classes(s, campaign_id)
    shape = s.execute(select(func.count(), func.max(CampaignRegion.region_id), func.min(CampaignRegion.region_id))
                      .where(CampaignRegion.campaign_id == campaign_id)).one()
    return cache.get_or_make(("region-classes", campaign_id, *shape), lambda: campaigns.region_classes(s, campaign_id))


def prediction_frame(s: Session, run_id: int, *, cache: ResultsCache | None = None) -> pd.DataFrame:
    """The run's predictions (``store.prediction_frame``; read-only), kept while the run's predictions stay the same."""
    if cache is None:
        return store.prediction_frame(s, run_id)
    folder = cache.labels.snapshots
    if folder is None:
        shape = s.execute(select(func.count(), func.max(Prediction.id)).where(Prediction.run_id == run_id)).one()
        return cache.get_or_make(("predictions", run_id, *shape), lambda: store.prediction_frame(s, run_id))
    sums = run_snapshot.run_sums(s, run_id)

    def make() -> pd.DataFrame:  # from the file kept beside the database when it still matches, else read (and kept)
        found = run_snapshot.read(folder, run_id, sums)
        if found is None:
            found = store.prediction_frame(s, run_id)
            run_snapshot.write(folder, run_id, found, sums)
        return found

    return cache.get_or_make(("predictions", run_id, *sums), make)


def _read(s: Session, campaign: CampaignInfo, cache: ResultsCache | None, version: tuple[object, ...] | None = None,
          *, limit: int | None = None) -> tuple[ReadJudgments | list[Judgment], SynonymRules, dict[int, str]]:
    """The campaign's judgments (read incrementally and handed on read, with a cache), its rules and each region's class."""
    rules = campaigns.synonym_rules(s, campaign.id)[0]
    region_class = region_classes(s, campaign.id, cache=cache)
    if cache is None:
        found = campaigns.judgments(s, campaign.id)
        if not found:
            raise NotFoundError(f"campaign {campaign.name!r} has no labels yet; label some regions first.")
        return (found if limit is None else found[:limit]), rules, region_class
    version = version or store.labels_version(s, campaign.id)
    if not version[1]:
        raise NotFoundError(f"campaign {campaign.name!r} has no labels yet; label some regions first.")
    return cache.labels.read(s, campaign.id, version, rules=rules, region_class=region_class, limit=limit), rules, region_class


def compute_results(s: Session, campaign: CampaignInfo, *, threshold: float = 0.5, cache: ResultsCache | None = None,
                    version: tuple[object, ...] | None = None) -> Results:
    """The campaign's concept table, from its labels, synonym rules, check answers and the run's predictions."""
    found, rules, region_class = _read(s, campaign, cache, version)
    design = campaigns.sample_of(s, campaign.id)
    made = campaign_table(
        found, prediction_frame(s, campaign.run_id, cache=cache), rules=rules,
        region_class=region_class, check_answers=campaigns.check_answers(s, campaign.id),
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
    version = store.labels_version(s, c.id)
    found = cache.get_or_make(("results", *version), lambda: compute_results(s, c, cache=cache, version=version))
    return replace(found, campaign=c, version=version, cache=cache)  # the table is cached; the campaign's text fields are read fresh


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
    t = target_of(target)
    if res.cache is None or not res.version:
        return res.table.rules(target=t, min_support=min_support, max_len=max_len, prune=prune)
    # Kept with the results they come from: the results page, its exports and questions ask for the same rules.
    return res.cache.get_or_make(("rules", t, max_len, float(min_support), prune, *res.version),
                                 lambda: res.table.rules(target=t, min_support=min_support, max_len=max_len, prune=prune))


def votes(s: Session, campaign: CampaignInfo, *, cache: ResultsCache | None = None, version: tuple[object, ...] | None = None) -> PresenceVotes:
    """The campaign's yes/no votes per (region, concept) and main entities, among annotators only.

    Check answers are left out: agreement is about the annotators, not about the answer key.
    """
    found, rules, region_class = _read(s, campaign, cache, version)
    return campaign_votes(found, rules=rules, region_class=region_class)


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


def _agreement(s: Session, c: CampaignInfo, *, top_concepts: int, cache: ResultsCache | None = None,
               version: tuple[object, ...] | None = None) -> AgreementSummary:
    v = votes(s, c, cache=cache, version=version)
    report = agreement_report(v.main_entities, n_boot=500, top_disputed=12)
    # Alpha with its bootstrap interval costs the same for every concept: compute it only for those shown.
    concepts = presence_agreement(v, concepts=most_named(v, top_concepts), n_boot=200)
    # Always started from majority vote: a start from an earlier fit stops at a point that depends on which
    # pages were opened before (up to 3.5e-3 apart in posterior on a simulated crowd), and shown numbers must not.
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
    version = store.labels_version(s, c.id)
    return cache.get_or_make(("agreement", top_concepts, *version), lambda: _agreement(s, c, top_concepts=top_concepts, cache=cache, version=version))


def warm_results(sessions: Callable[[], Session], cache: ResultsCache, *, min_support: float, campaigns_kept: int = 3,
                 stop: threading.Event | None = None) -> list[int]:
    """Compute, into ``cache``, what the results page and the concepts CSV of the most recent campaigns with labels
    need (their labels read, the concept table, the page's default rules, the CSV), then the agreement page's figures
    and the settling page's status (its earlier checkpoints, kept while labels come in), so that the first page after
    start-up does not pay for it. Returns the campaigns warmed; a campaign whose results cannot be made is passed
    over (its page says why when opened). ``stop`` set: no further campaign is started."""
    from .exports import cached_concepts_export  # exports builds on this module
    from .stopping import stopping_status  # so does stopping

    with sessions() as s:
        labelled = s.scalars(select(Label.campaign_id).group_by(Label.campaign_id).order_by(Label.campaign_id.desc()).limit(campaigns_kept)).all()
    done = []
    for campaign_id in labelled:
        if stop is not None and stop.is_set():
            break
        with sessions() as s:
            try:
                res = campaign_results(s, int(campaign_id), cache=cache)
                campaign_rules(res, min_support=min_support)
                cached_concepts_export(res, "csv")
            except (NotFoundError, InvalidInputError, NotEnoughLabelsError):
                continue
        for page in ("agreement", "settling"):
            if stop is not None and stop.is_set():
                break
            with sessions() as s:
                try:
                    if page == "agreement":
                        agreement_summary(s, int(campaign_id), cache=cache)
                    else:
                        stopping_status(s, _campaign(s, int(campaign_id)), min_support=min_support, cache=cache)
                except (NotFoundError, InvalidInputError, NotEnoughLabelsError):
                    pass
        done.append(int(campaign_id))
    return done
