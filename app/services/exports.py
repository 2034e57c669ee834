"""The exports use case: a campaign's rules, concept table and labels as files to download or write."""

from __future__ import annotations

import json
from dataclasses import dataclass, replace
from pathlib import Path

from sqlalchemy.orm import Session

from analysis.exports import FORMATS, concept_table_csv, export_frame, rules_document
from analysis.rules import to_csv

from .. import campaigns
from ..errors import NotFoundError
from .campaign_analysis import Results, campaign_rules, main_labels
from .reliance import rules_with_reliance

MEDIA = {"csv": "text/csv", "json": "application/json", "parquet": "application/vnd.apache.parquet"}


@dataclass(frozen=True)
class Export:
    """A file's bytes, its name and its media type."""

    body: bytes
    filename: str
    media_type: str


def _format(fmt: str) -> str:
    if fmt not in FORMATS:
        raise NotFoundError(f"no export as {fmt!r}; choose {', '.join(FORMATS)}.")
    return fmt


def rules_export(res: Results, fmt: str, *, target: str = "predicted", max_len: int = 2, min_support: float, prune: bool = True,
                 project: Path | None = None) -> Export:
    """The rule table (with stored intervention figures when ``project`` is given) as CSV, JSON or Parquet."""
    fmt = _format(fmt)
    rules = campaign_rules(res, target=target, max_len=max_len, min_support=min_support, prune=prune)
    if project is not None:
        rules = replace(rules, rules=rules_with_reliance(project, res, rules.rules))
    about: dict[str, object] = {"campaign": res.campaign.name, "target": target, "aggregation": res.method}
    if res.table.sampled:  # the rates are weighted estimates for this many images
        about["sample_stands_for_images"] = res.table.stands_for
    body = json.dumps(rules_document(rules, **about), indent=1).encode() if fmt == "json" else export_frame(rules.rules, fmt, about=about)
    return Export(body, f"rules-campaign-{res.campaign.id}-{target}.{fmt}", MEDIA[fmt])


def concepts_export(res: Results, fmt: str) -> Export:
    """The image-by-concept table (presence and saliency share per concept) as CSV, JSON or Parquet."""
    fmt = _format(fmt)
    about = {"campaign": res.campaign.name, "aggregation": res.method}
    body = concept_table_csv(res.table) if fmt == "csv" else export_frame(res.table.frame().reset_index(), fmt, about=about)
    return Export(body, f"concepts-campaign-{res.campaign.id}.{fmt}", MEDIA[fmt])


def cached_concepts_export(res: Results, fmt: str) -> Export:
    """:func:`concepts_export`, kept with the results it is written from (per state of the campaign's labels)."""
    if res.cache is None or not res.version:
        return concepts_export(res, fmt)
    return res.cache.get_or_make(("concepts-export", _format(fmt), *res.version), lambda: concepts_export(res, fmt))


def main_labels_export(s: Session, campaign_id: int) -> Export:
    """Each usable judgment's main entity as item,annotator,label (CSV)."""
    return Export(to_csv(main_labels(s, campaign_id)).encode("utf-8"), f"main-labels-campaign-{campaign_id}.csv", MEDIA["csv"])


def raw_labels_export(s: Session, campaign_id: int) -> Export:
    """Every raw label of the campaign, one row per named entity (CSV)."""
    c = campaigns.get_campaign(s, campaign_id)
    return Export(to_csv(campaigns.raw_labels(s, c.id)).encode("utf-8"), f"labels-campaign-{c.id}.csv", MEDIA["csv"])
