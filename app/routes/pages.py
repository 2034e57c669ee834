"""Pages: home, the labelling page, results."""

from __future__ import annotations

import uuid
from typing import Annotated

from fastapi import APIRouter, Cookie, Form, Request
from fastapi.responses import RedirectResponse, Response

from analysis.concepts import parse_label_text
from analysis.errors import InvalidInputError

from .. import store
from ..deps import SessionDep, SettingsDep, WriteSessionDep
from ..errors import AppError, NotFoundError
from .api import check_name, region_public, run_id_or_404, store_label

router = APIRouter()
COOKIE = "heedmap_annotator"
CAUTION = (
    "A concept audit is evidence for a human review, not a certification. For medical, safety or other "
    "regulated uses, the domain's own rules and review decide."
)


def _render(request: Request, name: str, context: dict[str, object], status_code: int = 200) -> Response:
    return request.app.state.templates.TemplateResponse(request, name, {"caution": CAUTION, **context}, status_code=status_code)


@router.get("/")
def home(request: Request, s: SessionDep) -> Response:
    """Project overview."""
    run_id = store.latest_run_id(s)
    preds = store.prediction_frame(s, run_id) if run_id else None
    stats = {
        "images": 0 if preds is None else len(preds),
        "regions": 0 if preds is None else int(preds["regions"].map(len).sum()),
        "labels": len(store.judgments(s, run_id)) if run_id else 0,
    }
    return _render(request, "index.html", {"run_id": run_id, "stats": stats})


@router.post("/annotator")
def choose_name(name: Annotated[str, Form()]) -> Response:
    """Remember the annotator's name in a cookie."""
    response = RedirectResponse("/annotate", status_code=303)
    response.set_cookie(COOKIE, check_name(name), httponly=True, samesite="lax")
    return response


def _annotate_page(request: Request, s: SessionDep, settings: SettingsDep, annotator: str, *, typed: str = "", error: str = "", status_code: int = 200) -> Response:
    run_id = run_id_or_404(s)
    ident = store.annotator_id(s, annotator)
    s.commit()
    task = store.next_region(s, annotator=ident, run_id=run_id, per_region=settings.labels_per_region)
    done, total = store.region_progress(s, annotator=ident, run_id=run_id)
    return _render(
        request, "annotate.html",
        {"annotator": annotator, "region": None if task is None else region_public(task), "done": done, "total": total,
         "client_id": uuid.uuid4().hex, "typed": typed, "error": error},
        status_code=status_code,
    )


@router.get("/annotate")
def annotate(request: Request, s: SessionDep, settings: SettingsDep, heedmap_annotator: Annotated[str | None, Cookie()] = None) -> Response:
    """One crop at a time for the annotator in the cookie (asks the name first)."""
    if not heedmap_annotator:
        return _render(request, "name.html", {})
    return _annotate_page(request, s, settings, check_name(heedmap_annotator))


@router.post("/annotate")
def submit(
    request: Request,
    s: WriteSessionDep,
    settings: SettingsDep,
    region_id: Annotated[int, Form()],
    client_id: Annotated[str, Form()],
    labels: Annotated[str, Form()] = "",
    nothing: Annotated[str, Form()] = "",
    seconds_spent: Annotated[float | None, Form()] = None,
    heedmap_annotator: Annotated[str | None, Cookie()] = None,
) -> Response:
    """Save the label at once and show the next crop; bad input re-shows the form with the message."""
    if not heedmap_annotator:
        return RedirectResponse("/annotate", status_code=303)
    name = check_name(heedmap_annotator)
    try:
        entities = parse_label_text(labels)
        store_label(s, region_id, name, entities, bool(nothing), client_id, seconds_spent)
    except (InvalidInputError, AppError) as exc:
        if isinstance(exc, NotFoundError):
            raise
        s.rollback()
        return _annotate_page(request, s, settings, name, typed=labels, error=str(getattr(exc, "message", exc)), status_code=422)
    return RedirectResponse("/annotate", status_code=303)


@router.get("/results")
def results(request: Request, s: SessionDep, settings: SettingsDep) -> Response:
    """Per-class concept rules from the labels so far."""
    res = store.compute_results(s, run_id_or_404(s), min_support=settings.min_support)
    rules = res.rules.rules
    by_class = {c: g.head(15).to_dict("records") for c, g in rules.groupby("class")} if not rules.empty else {}
    return _render(request, "results.html", {"by_class": by_class, "n_images": res.rules.n_images, "n_regions": res.n_labelled_regions, "min_support": settings.min_support})
