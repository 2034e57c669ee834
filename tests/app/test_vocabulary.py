"""The vocabulary's word counts, kept with every label stored and undone, equal a recount of the labels."""

from __future__ import annotations

import sqlite3
import uuid
from collections import Counter
from pathlib import Path

import pytest
from sqlalchemy import select

from analysis.concepts import normalise_label
from analysis.synonyms import SynonymRules
from app import campaigns
from app.db import make_engine, session_factory, write_session
from app.models import Label, WordCount
from app.people import ensure_person

from .conftest import as_schema_3

pytestmark = pytest.mark.both_databases


def recount(s, campaign_id: int, rules: SynonymRules | None = None) -> tuple[Counter[str], Counter[str]]:  # type: ignore[no-untyped-def]
    """Every label read again and counted, as the vocabulary counted before it kept its counts."""
    rules = rules or SynonymRules()
    entities: Counter[str] = Counter()
    attributes: Counter[str] = Counter()
    for (raw,) in s.execute(select(Label.entities).where(Label.campaign_id == campaign_id)):
        for e in raw or []:
            if name := rules.entity(normalise_label(str(e[0]))):
                entities[name] += 1
            for a in e[1]:
                if attr := rules.attribute(normalise_label(str(a))):
                    attributes[attr] += 1
    return entities, attributes


LABELS = [
    [("cap", ["red"])], [("Cap ", ["Red", "shiny"]), ("label band", ["torn"])], [], [("tag", ["yellow"]), ("lid", [])],
    [("bottle cap", ["red"])], [("lid", ["red", "red"])],
]


def test_counts_after_submit_and_undo_equal_a_recount(project: Path, campaign_id: int) -> None:
    engine = make_engine(project)
    factory = session_factory(engine)
    with write_session(factory) as s:
        c = campaigns.get_campaign(s, campaign_id)
        people = [ensure_person(s, n, "annotator") for n in ("ann", "bob")]
        for i, entities in enumerate(LABELS):
            person = people[i % 2]
            task = campaigns.lease_tasks(s, campaign=c, person_id=person)[0]
            campaigns.save_label(s, campaign=c, region_id=task.region_id, person_id=person, entities=entities, unsure=False,
                                 client_id=uuid.uuid4().hex, seconds_spent=None)
        assert campaigns.label_counts(s, campaign_id) == recount(s, campaign_id)
        assert campaigns.label_counts(s, campaign_id)[0]["cap"] == 2
        # A retried submit stores nothing and counts nothing.
        first = s.scalar(select(Label).where(Label.campaign_id == campaign_id).order_by(Label.id).limit(1))
        assert first is not None
        assert not campaigns.save_label(s, campaign=c, region_id=first.region_id, person_id=first.person_id, entities=[("cap", ["red"])],
                                        unsure=False, client_id=first.client_id, seconds_spent=None)
        campaigns.undo_last(s, campaign=c, person_id=people[1])
        campaigns.undo_last(s, campaign=c, person_id=people[0])
        assert campaigns.label_counts(s, campaign_id) == recount(s, campaign_id)
        campaigns.add_synonym_rule(s, campaign_id=campaign_id, kind="merge", source="lid", target="cap")
        rules, _ = campaigns.synonym_rules(s, campaign_id)
        merged = campaigns.label_counts(s, campaign_id, rules)
        assert merged == recount(s, campaign_id, rules) and "lid" not in merged[0]
    engine.dispose()


@pytest.mark.sqlite_only
def test_an_older_project_gets_its_counts_when_opened(project: Path, campaign_id: int) -> None:
    engine = make_engine(project)
    with write_session(session_factory(engine)) as s:
        c = campaigns.get_campaign(s, campaign_id)
        person = ensure_person(s, "ann", "annotator")
        for entities in LABELS[:3]:
            task = campaigns.lease_tasks(s, campaign=c, person_id=person)[0]
            campaigns.save_label(s, campaign=c, region_id=task.region_id, person_id=person, entities=entities, unsure=False,
                                 client_id=uuid.uuid4().hex, seconds_spent=None)
    engine.dispose()
    db = sqlite3.connect(project / "heedmap.db")  # what schema 2 looked like: labels, no counts
    as_schema_3(db)  # made before Alembic managed the schema
    db.execute("DROP TABLE word_counts")
    db.execute("UPDATE schema_info SET version = 2")
    db.commit()
    db.close()
    engine = make_engine(project)
    with session_factory(engine)() as s:
        assert s.scalar(select(WordCount.id).limit(1)) is not None
        assert campaigns.label_counts(s, campaign_id) == recount(s, campaign_id)
        assert s.connection().exec_driver_sql("SELECT version FROM schema_info").scalar() == 4  # upgraded through Alembic
    engine.dispose()
