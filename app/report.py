"""The self-contained HTML report: plots, rules, expectations and confident errors, images inline."""

from __future__ import annotations

import base64
from datetime import UTC, datetime
from pathlib import Path

from fastapi.templating import Jinja2Templates
from sqlalchemy import select
from sqlalchemy.orm import Session

from analysis.confident_errors import confident_errors
from analysis.errors import InvalidInputError
from analysis.expectations import Verdict
from analysis.images import thumbnail_png
from analysis.plots import frequency_plot, lift_plot

from . import region_images, store
from .errors import AppError
from .layout import ProjectLayout
from .models import ImageRow, SaliencyRun
from .routes.common import CAUTION
from .services.campaign_analysis import Results
from .services.reliance import audit
from .settings import Settings


def _data_uri(png: bytes) -> str:
    return "data:image/png;base64," + base64.b64encode(png).decode()


def _crop(s: Session, settings: Settings, region_id: int) -> str | None:
    """The region's crop inline (cut from the original image, or an older project's stored file); None when it cannot be made."""
    try:
        return _data_uri(region_images.crop_png(s, ProjectLayout(Path(settings.project_dir)), store.region_files(s, region_id), region_id))
    except AppError:
        return None


def build_report(templates: Jinja2Templates, s: Session, settings: Settings, res: Results, *, threshold: float = 0.8) -> str:
    """Render the report for a campaign's results; every image is embedded, nothing is fetched."""
    table = res.table
    rules = table.rules(min_support=settings.min_support, max_len=2)
    project = Path(settings.project_dir)
    shown = rules.rules.groupby("class").head(10)
    verdicts: list[Verdict] = []
    expectation_error = ""
    try:  # the rules shown and the expectations are one family of tests
        frame, verdicts, family = audit(project, res, shown, res.campaign.expectations)
    except InvalidInputError as exc:
        expectation_error = str(exc)
        frame, _, family = audit(project, res, shown)
    by_class = []
    for cls, group in frame.groupby("class"):
        top = group.to_dict("records")
        for r in top[:3]:
            rows = (table.meta["predicted_class"].astype(str) == cls) & table.presence[r["concepts"].split(" & ")].all(axis=1)
            r["crops"] = [u for u in (_crop(s, settings, rid) for rid in table.example_regions(r["concepts"].split(" & "), rows, limit=4)) if u]
        by_class.append((cls, top))
    errors = confident_errors(table, threshold=threshold)
    paths = dict(s.execute(select(ImageRow.id, ImageRow.path).where(ImageRow.id.in_([i for g in errors.groups[:5] for i in g.images[:6]]))).all())
    thumbs = {}
    for image_id, path in paths.items():
        try:
            thumbs[image_id] = _data_uri(thumbnail_png(Path(path), side=96))
        except (InvalidInputError, OSError):
            continue
    run = s.get(SaliencyRun, res.campaign.run_id)
    context = {
        "campaign": res.campaign, "table": table, "rules": rules, "by_class": by_class, "verdicts": verdicts, "expectation_error": expectation_error, "family": family,
        "errors": errors, "thumbs": thumbs, "provenance": run.provenance if run else {}, "caution": CAUTION, "n_regions": res.n_labelled_regions,
        "accuracy": float(table.meta["correct"].mean()) if len(table) else None,
        "generated": datetime.now(UTC).strftime("%Y-%m-%d %H:%M UTC"),
        "frequency_png": _data_uri(frequency_plot(table)), "lift_png": _data_uri(lift_plot(table)),
    }
    return templates.get_template("report.html").render(context)
