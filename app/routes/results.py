"""What the labels say: rules per class, questions, expectations, confident errors, class comparison,
agreement, the synonym editor, exports and the report."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated
from urllib.parse import urlencode

from fastapi import Depends, Form, Query, Request
from fastapi.responses import PlainTextResponse, RedirectResponse, Response

from analysis.compare import compare_classes
from analysis.concept_table import TARGETS
from analysis.confident_errors import confident_errors
from analysis.errors import InvalidInputError
from analysis.expectations import Verdict
from analysis.plots import frequency_plot, lift_plot
from analysis.questions import QuestionError, answer_question, rule_question
from analysis.synonyms import suggest_merges

from .. import campaigns
from ..deps import (
    AnalystDep,
    ReviewerDep,
    SessionDep,
    SettingsDep,
    WriteSessionDep,
    guarded_router,
    require_analyst,
    require_reviewer,
)
from ..errors import InvalidRequestError, NotFoundError
from ..report import build_report
from ..services.campaign_analysis import (
    Results,
    agreement_summary,
    campaign_progress,
    campaign_results,
    campaign_rules,
    target_of,
)
from ..services.exports import Export, cached_concepts_export, main_labels_export, rules_export
from ..services.reliance import expectation_verdicts, rules_with_reliance, stored_lookup
from .common import render

router = guarded_router(require_reviewer, prefix="/campaigns/{campaign_id}")
routers = (router,)


def results_for(request: Request, s: SessionDep, campaign_id: int) -> Results:
    """The campaign's results, from the campaign-analysis service (cached per state of its labels)."""
    return campaign_results(s, campaign_id, cache=request.app.state.results_cache)


def _file(found: Export) -> Response:
    return Response(found.body, media_type=found.media_type, headers={"Content-Disposition": f"attachment; filename={found.filename}"})


@router.get("/results")
def results(request: Request, campaign_id: int, s: SessionDep, settings: SettingsDep, viewer: ReviewerDep, target: str = "predicted",
            max_len: int = 2, min_support: float | None = None, prune: bool = True) -> Response:
    """Per-class concept rules with significance, for the predicted class, the true class or the errors."""
    res = results_for(request, s, campaign_id)
    rules = campaign_rules(res, target=target, max_len=max_len, min_support=min_support or settings.min_support, prune=prune)
    shown = rules.rules.groupby("class").head(15)  # look up stored interventions only for the rules on the page
    frame = rules_with_reliance(Path(settings.project_dir), res, shown).assign(question=shown["concepts"].map(rule_question))
    by_class = {k: g.to_dict("records") for k, g in frame.groupby("class")} if not frame.empty else {}
    context = {"campaign": res.campaign, "by_class": by_class, "table": res.table, "rules": rules, "n_regions": res.n_labelled_regions,
               "target": target, "targets": TARGETS, "max_len": max_len, "prune": prune, "query": urlencode({"target": target, "max_len": max_len}),
               "family": next((str(f) for f in frame.get("family", []) if f), "")}
    return render(request, "results.html", context, viewer=viewer)


@router.get("/plots/{kind}.png")
def plot(request: Request, campaign_id: int, kind: str, s: SessionDep, target: str = "predicted") -> Response:
    """Concept frequency or lift per class, as a PNG heat map."""
    if kind not in ("frequency", "lift"):
        raise NotFoundError(f"no plot called {kind!r}; there are frequency and lift.")
    table = results_for(request, s, campaign_id).table
    png = (frequency_plot if kind == "frequency" else lift_plot)(table, target_of(target))
    return Response(png, media_type="image/png")


@router.get("/exports/rules.{fmt}")
def export_rules(request: Request, campaign_id: int, fmt: str, s: SessionDep, settings: SettingsDep, target: str = "predicted",
                 max_len: int = 2, min_support: float | None = None, prune: bool = True) -> Response:
    """The rule table as CSV, JSON or Parquet."""
    res = results_for(request, s, campaign_id)
    return _file(rules_export(res, fmt, target=target, max_len=max_len, min_support=min_support or settings.min_support, prune=prune,
                              project=Path(settings.project_dir)))


@router.get("/exports/concepts.{fmt}")
def export_concepts(request: Request, campaign_id: int, fmt: str, s: SessionDep) -> Response:
    """The image-by-concept table (presence and saliency share per concept) as CSV, JSON or Parquet.

    The file is kept per state of the campaign's labels, like the results it is written from."""
    return _file(cached_concepts_export(results_for(request, s, campaign_id), fmt))


@router.get("/exports/main-labels.csv", response_class=PlainTextResponse)
def export_main_labels(campaign_id: int, s: SessionDep) -> Response:
    """Each judgment's main entity as item,annotator,label: the input of `heedmap agreement` and `heedmap aggregate`."""
    return _file(main_labels_export(s, campaign_id))


@router.get("/ask")
def ask(request: Request, campaign_id: int, s: SessionDep, viewer: ReviewerDep, q: Annotated[str, Query(max_length=2000)] = "") -> Response:
    """Ask which images match a combination of concepts, and how they fall per class."""
    res = results_for(request, s, campaign_id)
    answer, error, column = None, "", 0
    if q.strip():
        try:
            answer = answer_question(q, res.table)
        except QuestionError as exc:
            error, column = exc.reason, exc.column
    context = {"campaign": res.campaign, "q": q, "answer": answer, "error": error, "column": column, "concepts": res.table.concepts[:80],
               "table": res.table}
    return render(request, "ask.html", context, viewer=viewer, status_code=422 if error else 200)


@router.get("/expectations")
def expectations(request: Request, campaign_id: int, s: SessionDep, viewer: ReviewerDep) -> Response:
    """The team's expectations per class and whether the labels bear them out."""
    res = results_for(request, s, campaign_id)
    return _expectations_page(request, res, viewer, res.campaign.expectations)


def _expectations_page(request: Request, res: Results, viewer: ReviewerDep, text: str, error: str = "", status_code: int = 200) -> Response:
    verdicts: list[Verdict] = []
    if text.strip() and not error:
        try:
            verdicts = expectation_verdicts(res, text, lookup=stored_lookup(Path(request.app.state.settings.project_dir), res))
        except InvalidInputError as exc:
            error = str(exc)
    family = next((v.family for v in verdicts if v.family), "")
    context = {"campaign": res.campaign, "text": text, "verdicts": verdicts, "family": family, "error": error, "table": res.table,
               "classes": sorted(res.table.meta["predicted_class"].astype(str).unique())}
    return render(request, "expectations.html", context, viewer=viewer, status_code=status_code)


@router.post("/expectations")
def save_expectations(request: Request, campaign_id: int, s: WriteSessionDep, viewer: AnalystDep, text: Annotated[str, Form(max_length=50_000)] = "") -> Response:
    """Save the expectations after checking they read; a file with errors is shown back, not saved."""
    res = results_for(request, s, campaign_id)
    if text.strip():
        try:
            expectation_verdicts(res, text)
        except InvalidInputError as exc:
            return _expectations_page(request, res, viewer, text, error=str(exc), status_code=422)
    campaigns.update_campaign(s, campaign_id, expectations=text)
    return RedirectResponse(f"/campaigns/{campaign_id}/expectations", status_code=303)


@router.get("/errors")
def errors(request: Request, campaign_id: int, s: SessionDep, viewer: ReviewerDep, threshold: float = 0.8) -> Response:
    """Wrong predictions made with high confidence, grouped, with the concepts that set them apart."""
    res = results_for(request, s, campaign_id)
    found = confident_errors(res.table, threshold=threshold)
    return render(request, "errors.html", {"campaign": res.campaign, "found": found, "table": res.table}, viewer=viewer)


@router.get("/compare")
def compare(request: Request, campaign_id: int, s: SessionDep, settings: SettingsDep, viewer: ReviewerDep, a: str = "", b: str = "",
            target: str = "predicted") -> Response:
    """Two classes side by side: what sets each apart, what they share, their top rules."""
    res = results_for(request, s, campaign_id)
    classes = sorted(res.table.targets(target_of(target)).unique())
    a = a or (classes[0] if classes else "")
    b = b or (classes[1] if len(classes) > 1 else "")
    comparison, top, crops = None, {}, {}
    if a and b:
        comparison = compare_classes(res.table, a, b, target=target_of(target))
        frame = campaign_rules(res, target=target, min_support=settings.min_support).rules
        frame = frame[frame["class"].isin([a, b])].groupby("class").head(8)
        frame = rules_with_reliance(Path(settings.project_dir), res, frame)
        top = {k: frame[frame["class"] == k].to_dict("records") for k in (a, b)}
        classes_of = res.table.targets(target_of(target))
        crops = {
            k: [(c.concept, res.table.example_regions([c.concept], classes_of == k, limit=4)) for c in distinct[:3]]
            for k, distinct in ((a, comparison.distinct_a), (b, comparison.distinct_b))
        }
    context = {"campaign": res.campaign, "comparison": comparison, "classes": classes, "a": a, "b": b, "target": target, "targets": TARGETS,
               "top": top, "crops": crops, "table": res.table}
    return render(request, "compare.html", context, viewer=viewer)


@router.get("/report.html")
def report(request: Request, campaign_id: int, s: SessionDep, settings: SettingsDep) -> Response:
    """A self-contained HTML report (images and plots inline) that opens offline."""
    res = results_for(request, s, campaign_id)
    html = build_report(request.app.state.templates, s, settings, res)
    return Response(html, media_type="text/html", headers={"Content-Disposition": f"attachment; filename=heedmap-report-campaign-{campaign_id}.html"})


@router.get("/agreement")
def agreement(request: Request, campaign_id: int, s: SessionDep, viewer: ReviewerDep) -> Response:
    """Agreement on the main entity and on each concept, per annotator, and the most disputed regions."""
    c = campaigns.get_campaign(s, campaign_id)
    found = agreement_summary(s, c, cache=request.app.state.results_cache)
    progress = {p.name: p for p in campaign_progress(s, c, cache=request.app.state.results_cache)[0]}
    context = {"campaign": c, "report": found.report, "concepts": found.concepts, "reliability": found.reliability, "progress": progress,
               "reliability_note": found.reliability_note}
    return render(request, "agreement.html", context, viewer=viewer)


@router.get("/synonyms")
def synonyms(request: Request, campaign_id: int, s: SessionDep, viewer: ReviewerDep, error: str = "") -> Response:
    """The campaign's merges and splits, with suggested duplicates to accept or reject."""
    c = campaigns.get_campaign(s, campaign_id)
    rules, rejected = campaigns.synonym_rules(s, c.id)
    raw_counts, raw_attributes = campaigns.label_counts(s, c.id)
    merged_counts, merged_attributes = campaigns.label_counts(s, c.id, rules)
    context = {
        "campaign": c, "rules": campaigns.synonym_rule_rows(s, c.id), "suggestions": suggest_merges(raw_counts, rules=rules, rejected=rejected, attributes=[*raw_attributes, *merged_attributes])[:30],
        "counts": merged_counts.most_common(60), "classes": campaigns.run_classes(s, c.run_id), "error": error[:300],
    }
    return render(request, "synonyms.html", context, viewer=viewer)


@router.post("/synonyms")
def add_synonym(
    campaign_id: int, s: WriteSessionDep, viewer: AnalystDep,
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


@router.post("/synonyms/{rule_id}/delete", dependencies=[Depends(require_analyst)])
def delete_synonym(campaign_id: int, rule_id: int, s: WriteSessionDep) -> Response:
    """Undo a merge, split or rejection."""
    campaigns.delete_synonym_rule(s, campaign_id=campaign_id, rule_id=rule_id)
    return RedirectResponse(f"/campaigns/{campaign_id}/synonyms", status_code=303)
