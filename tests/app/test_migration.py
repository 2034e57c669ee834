"""A project made by heedmap 0.1 (schema 1: annotators and annotations, no campaigns) opens and keeps every label."""

from __future__ import annotations

import sqlite3
from pathlib import Path

from sqlalchemy import select

from app import campaigns
from app.db import make_engine, session_factory
from app.models import Label, Person

from .conftest import as_schema_3

# The schema 1 tables that held people and labels, as that version created them.
V1_TABLES = """
CREATE TABLE annotators (id INTEGER NOT NULL, name VARCHAR NOT NULL, created_at DATETIME NOT NULL, PRIMARY KEY (id), UNIQUE (name));
CREATE TABLE annotations (
  id INTEGER NOT NULL, client_id VARCHAR NOT NULL, region_id INTEGER NOT NULL, annotator_id INTEGER NOT NULL,
  entities JSON NOT NULL, submitted_at DATETIME NOT NULL, seconds_spent FLOAT, PRIMARY KEY (id),
  UNIQUE (region_id, annotator_id), UNIQUE (client_id),
  FOREIGN KEY(region_id) REFERENCES regions (id), FOREIGN KEY(annotator_id) REFERENCES annotators (id));
"""


def _make_v1(project: Path) -> None:
    """Turn a fresh project into what schema 1 looked like, with two people's labels."""
    db = sqlite3.connect(project / "heedmap.db")
    as_schema_3(db)
    for table in ("word_counts", "withdrawn_labels", "labels", "skips", "leases", "campaign_regions", "synonym_rules", "invites", "campaigns", "people", "secrets"):
        db.execute(f"DROP TABLE IF EXISTS {table}")
    for column in ("model_path", "sidecar_path"):
        db.execute(f"ALTER TABLE saliency_runs DROP COLUMN {column}")
    db.executescript(V1_TABLES)
    db.execute("UPDATE schema_info SET version = 1")
    db.execute("INSERT INTO annotators VALUES (1, 'ann', '2026-11-01 10:00:00'), (2, 'bob', '2026-11-01 10:00:00')")
    rows = [(1, "c1", 1, 1, '[["cap", ["red"]]]', 2.5), (2, "c2", 1, 2, '[["lid", []]]', None), (3, "c3", 2, 1, "[]", 1.0)]
    db.executemany("INSERT INTO annotations VALUES (?, ?, ?, ?, ?, '2026-11-02 09:00:00', ?)", rows)
    db.commit()
    db.close()


def test_schema_1_project_keeps_people_and_labels(project: Path) -> None:
    _make_v1(project)
    engine = make_engine(project)
    with session_factory(engine)() as s:
        assert [(p.id, p.name, p.role) for p in s.scalars(select(Person).order_by(Person.id))] == [(1, "ann", "annotator"), (2, "bob", "annotator")]
        (c,) = campaigns.list_campaigns(s)
        assert c.run_id == 1 and c.labels_per_region == 3
        labels = s.scalars(select(Label).order_by(Label.id)).all()
        assert [(x.client_id, x.region_id, x.person_id, x.entities, x.seconds_spent) for x in labels] == [
            ("c1", 1, 1, [["cap", ["red"]]], 2.5), ("c2", 1, 2, [["lid", []]], None), ("c3", 2, 1, [], 1.0)]
        assert [j.annotator for j in campaigns.judgments(s, c.id)] == ["ann", "bob", "ann"]
        # The kept label counts agree, so assignment goes on where it stopped.
        task_regions = [t.region_id for t in campaigns.lease_tasks(s, campaign=c, person_id=1)]
        assert 1 not in task_regions and 2 not in task_regions
    engine.dispose()
    make_engine(project).dispose()  # opening again changes nothing
