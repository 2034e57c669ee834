"""What the labels say: rules per class, agreement, the synonym editor and the exports."""

from __future__ import annotations

from typing import Annotated
from urllib.parse import urlencode

import pandas as pd

from fastapi import APIRouter, Form, Request
from fastapi.responses import PlainTextResponse, RedirectResponse, Response

from analysis.agreement_report import agreement_report
from analysis.concept_votes import estimate_concepts, presence_agreement, presence_votes
from analysis.rules import to_csv
from analysis.synonyms import suggest_merges

from .. import campaigns, store
from ..deps import AnalystDep, CsrfDep, ReviewerDep, SessionDep, SettingsDep, WriteSessionDep
from ..errors import InvalidRequestError, NotFoundError
from .common import render

router = APIRouter()


def _csv(text: str, name: str) -> PlainTextResponse:
    return PlainTextResponse(text, media_type="text/csv", headers={"Content-Disposition": f"attachment; filename={name}"})


@router.get("/campaigns/{campaign_id}/results")
def results(request: Request, campaign_id: int, s: SessionDep, settings: SettingsDep, viewer: ReviewerDep) -> Response:
    """Per-class concept rules from the campaign's labels so far."""
    c = campaigns.get_campaign(s, campaign_id)
    res = store.compute_results(s, c, min_support=settings.min_support)
    rules = res.rules.rules
    by_class = {k: g.head(15).to_dict("records") for k, g in rules.groupby("class")} if not rules.empty else {}
    context = {"campaign": c, "by_class": by_class, "n_images": res.rules.n_images, "n_regions": res.n_labelled_regions,
               "min_support": settings.min_support, "method": res.method}
    return render(request, "results.html", context, viewer=viewer)


@router.get("/campaigns/{campaign_id}/exports/rules.csv", response_class=PlainTextResponse)
def export_rules(campaign_id: int, s: SessionDep, settings: SettingsDep, viewer: ReviewerDep) -> PlainTextResponse:
    """Per-class concept rules as CSV."""
    res = store.compute_results(s, campaigns.get_campaign(s, campaign_id), min_support=settings.min_support)
    return _csv(to_csv(res.rules.rules), f"rules-campaign-{campaign_id}.csv")


@router.get("/campaigns/{campaign_id}/exports/concepts.csv", response_class=PlainTextResponse)
def export_concepts(campaign_id: int, s: SessionDep, settings: SettingsDep, viewer: ReviewerDep) -> PlainTextResponse:
    """The image-by-concept table as CSV (0/1 per concept); the aggregation method is a column."""
    res = store.compute_results(s, campaigns.get_campaign(s, campaign_id), min_support=settings.min_support)
    frame = res.concepts.reset_index()
    for col in frame.columns:
        if frame[col].dtype == bool:
            frame[col] = frame[col].astype(int)
    frame.insert(1, "aggregation", res.method)
    return _csv(to_csv(frame), f"concepts-campaign-{campaign_id}.csv")


@router.get("/campaigns/{campaign_id}/exports/main-labels.csv", response_class=PlainTextResponse)
def export_main_labels(campaign_id: int, s: SessionDep, viewer: ReviewerDep) -> PlainTextResponse:
    """Each judgment's main entity as item,annotator,label: the input of `heedmap agreement` and `heedmap aggregate`."""
    c = campaigns.get_campaign(s, campaign_id)
    rules, _ = campaigns.synonym_rules(s, c.id)
    found = campaigns.judgments(s, c.id)
    if not found:
        raise NotFoundError(f"campaign {c.name!r} has no labels yet.")
    votes = presence_votes(found, rules=rules, region_class=campaigns.region_classes(s, c.id))
    m = votes.main_entities
    frame = pd.DataFrame({"item": [m.items[i] for i in m.item_codes], "annotator": [m.annotators[a] for a in m.annotator_codes], "label": [m.classes[y] for y in m.label_codes]})
    return _csv(to_csv(frame), f"main-labels-campaign-{campaign_id}.csv")


@router.get("/campaigns/{campaign_id}/agreement")
def agreement(request: Request, campaign_id: int, s: SessionDep, viewer: ReviewerDep) -> Response:
    """Agreement on the main entity and on each concept, per annotator, and the most disputed regions."""
    c = campaigns.get_campaign(s, campaign_id)
    rules, _ = campaigns.synonym_rules(s, c.id)
    found = campaigns.judgments(s, c.id)
    if not found:
        raise NotFoundError(f"campaign {c.name!r} has no labels yet; agreement needs regions labelled by two or more people.")
    votes = presence_votes(found, rules=rules, region_class=campaigns.region_classes(s, c.id))
    report = agreement_report(votes.main_entities, n_boot=500, top_disputed=12)
    concepts = presence_agreement(votes, n_boot=200)[:40]
    ds = estimate_concepts(votes, method="dawid-skene")
    progress = {p.name: p for p in campaigns.campaign_progress(s, c)[0]}
    reliability = {name: (float(ds.sensitivity[k]), float(ds.specificity[k])) for k, name in enumerate(votes.annotators)}
    context = {"campaign": c, "report": report, "concepts": concepts, "reliability": reliability, "progress": progress}
    return render(request, "agreement.html", context, viewer=viewer)


@router.get("/campaigns/{campaign_id}/synonyms")
def synonyms(request: Request, campaign_id: int, s: SessionDep, viewer: ReviewerDep, error: str = "") -> Response:
    """The campaign's merges and splits, with suggested duplicates to accept or reject."""
    c = campaigns.get_campaign(s, campaign_id)
    rules, rejected = campaigns.synonym_rules(s, c.id)
    raw_counts, _ = campaigns.label_counts(s, c.id)
    merged_counts, _ = campaigns.label_counts(s, c.id, rules)
    context = {
        "campaign": c, "rules": campaigns.synonym_rule_rows(s, c.id), "suggestions": suggest_merges(raw_counts, rules=rules, rejected=rejected)[:30],
        "counts": merged_counts.most_common(60), "classes": campaigns.run_classes(s, c.run_id), "error": error[:300],
    }
    return render(request, "synonyms.html", context, viewer=viewer)


@router.post("/campaigns/{campaign_id}/synonyms", dependencies=[CsrfDep])
def add_synonym(
    request: Request, campaign_id: int, s: WriteSessionDep, viewer: AnalystDep,
    kind: Annotated[str, Form()], source: Annotated[str, Form(max_length=60)], target: Annotated[str, Form(max_length=60)] = "",
    targets: Annotated[str, Form(max_length=600)] = "",
) -> Response:
    """Add a merge, a split ("bottle=cap, carton=gable top") or a rejected suggestion."""
    c = campaigns.get_campaign(s, campaign_id)
    split_targets: dict[str, str] = {}
    try:
        for part in filter(None, (p.strip() for p in targets.split(","))):
            cls, eq, concept = part.partition("=")
            if not eq or not cls.strip() or not concept.strip():
                raise InvalidRequestError(f"write each split target as class=concept; {part!r} is not.")
            split_targets[cls.strip()] = concept.strip()
        campaigns.add_synonym_rule(s, campaign_id=c.id, kind=kind, source=source, target=target, targets=split_targets, by=viewer.name)
    except InvalidRequestError as exc:
        s.rollback()
        return RedirectResponse(f"/campaigns/{campaign_id}/synonyms?{urlencode({'error': exc.message})}", status_code=303)
    return RedirectResponse(f"/campaigns/{campaign_id}/synonyms", status_code=303)


@router.post("/campaigns/{campaign_id}/synonyms/{rule_id}/delete", dependencies=[CsrfDep])
def delete_synonym(campaign_id: int, rule_id: int, s: WriteSessionDep, viewer: AnalystDep) -> Response:
    """Undo a merge, split or rejection."""
    campaigns.delete_synonym_rule(s, campaign_id=campaign_id, rule_id=rule_id)
    return RedirectResponse(f"/campaigns/{campaign_id}/synonyms", status_code=303)
