"""Reading the labels back as plain data: judgments, label counts, the raw table, each region's class."""

from __future__ import annotations

import json

import pandas as pd
from sqlalchemy import String, select, type_coerce
from sqlalchemy.orm import Session

from analysis.concepts import Judgment

from ..models import CampaignRegion, ImageRow, Label, Person, Prediction, RegionRow, StoredEntities
from ..store import plain_rows


def region_classes(s: Session, campaign_id: int) -> dict[int, str]:
    """Predicted class of every region in the campaign."""
    return dict(plain_rows(s,
        select(CampaignRegion.region_id, Prediction.predicted)
        .join(RegionRow, RegionRow.id == CampaignRegion.region_id).join(Prediction, Prediction.id == RegionRow.prediction_id)
        .where(CampaignRegion.campaign_id == campaign_id)
    ))


def entities_of(raw: StoredEntities | None) -> tuple[tuple[str, tuple[str, ...]], ...]:
    return tuple((str(e[0]), tuple(str(a) for a in e[1])) for e in (raw or []))


def judgments(s: Session, campaign_id: int) -> list[Judgment]:
    """The campaign's labels as judgments, oldest first.

    The entities are read as stored text and each distinct text is decoded once: most labels repeat
    a few texts, and decoding every row's JSON was most of the time at tens of thousands of labels.
    """
    rows = s.connection().execute(
        select(Label.region_id, Person.name, type_coerce(Label.entities, String), Label.unsure).join(Person, Person.id == Label.person_id)
        .where(Label.campaign_id == campaign_id).order_by(Label.id)
    )
    decoded: dict[object, tuple[tuple[str, tuple[str, ...]], ...]] = {}
    out = []
    for r, name, raw, unsure in rows:
        key = raw if isinstance(raw, str) else json.dumps(raw)  # a database driver that decodes JSON itself gives lists
        ents = decoded.get(key)
        if ents is None:
            ents = decoded[key] = entities_of(json.loads(raw) if isinstance(raw, str) else raw)
        out.append(Judgment(r, name, ents, bool(unsure)))
    return out


def raw_labels(s: Session, campaign_id: int) -> pd.DataFrame:
    """Every label as long rows: one per entity named (a row with an empty entity for nothing recognisable)."""
    rows = s.execute(
        select(Label.id, Label.region_id, Prediction.image_id, ImageRow.path, Prediction.predicted, Person.name, Label.entities,
               Label.unsure, Label.submitted_at, Label.seconds_spent, CampaignRegion.check_answer)
        .join(Person, Person.id == Label.person_id).join(RegionRow, RegionRow.id == Label.region_id)
        .join(Prediction, Prediction.id == RegionRow.prediction_id).join(ImageRow, ImageRow.id == Prediction.image_id)
        .join(CampaignRegion, (CampaignRegion.region_id == Label.region_id) & (CampaignRegion.campaign_id == Label.campaign_id))
        .where(Label.campaign_id == campaign_id).order_by(Label.id)
    ).all()
    out = []
    for label_id, region, image, path, predicted, name, ents, unsure, at, secs, answer in rows:
        base = {"label_id": label_id, "region": region, "image": image, "image_path": path, "predicted": predicted, "annotator": name}
        tail = {"unsure": int(bool(unsure)), "check_item": int(answer is not None), "submitted_at": at.isoformat(sep=" ", timespec="seconds"), "seconds_spent": secs}
        for e, attrs in entities_of(ents) or (("", ()),):
            out.append({**base, "entity": e, "attributes": ", ".join(attrs), **tail})
    columns = ["label_id", "region", "image", "image_path", "predicted", "annotator", "entity", "attributes", "unsure", "check_item", "submitted_at", "seconds_spent"]
    return pd.DataFrame(out, columns=columns)
