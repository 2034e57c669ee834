"""A campaign's progress counted in the database: labels, unsure ones, skips and each person's median time per
label, against the same figures computed in Python from the stored rows (statistics.median for the medians)."""

from __future__ import annotations

import statistics
from pathlib import Path

import numpy as np
import pytest
from sqlalchemy import select

from app import campaigns
from app.db import make_engine, session_factory, write_session
from app.models import Label, Person
from app.people import ensure_person

pytestmark = pytest.mark.both_databases


def test_progress_counts_and_median_times_match_the_stored_labels(project: Path) -> None:
    engine = make_engine(project)
    factory = session_factory(engine)
    with write_session(factory) as s:
        cid = campaigns.create_campaign(s, name="timed", run_id=1, labels_per_region=3)
        c = campaigns.get_campaign(s, cid)
    rng = np.random.default_rng(0)
    # Odd and even numbers of timed labels, tied times, labels without a time, an unsure label, someone who only skips.
    plan = {"ann": 7, "bob": 6, "cy": 5, "dee": 1}
    for name, n in plan.items():
        with write_session(factory) as s:
            pid = ensure_person(s, name, "annotator")
        for k in range(n):
            with write_session(factory) as s:
                task = campaigns.lease_tasks(s, campaign=c, person_id=pid)[0]
                spent = None if (name == "cy" and k % 2) else float(rng.choice([1.5, 2.0, 2.0, 7.25, 30.0]))
                campaigns.save_label(s, campaign=c, region_id=task.region_id, person_id=pid, entities=[("cap", [])], unsure=(name == "bob" and k == 0),
                                     client_id=f"{name}-{k}", seconds_spent=spent)
    with write_session(factory) as s:
        pid = ensure_person(s, "eve", "annotator")
        task = campaigns.lease_tasks(s, campaign=c, person_id=pid)[0]
        campaigns.skip_region(s, campaign=c, region_id=task.region_id, person_id=pid)
    with factory() as s:
        annotators, _ = campaigns.campaign_progress(s, c)
        rows = s.execute(select(Person.name, Label.seconds_spent, Label.unsure).join(Person, Person.id == Label.person_id)
                         .where(Label.campaign_id == cid)).all()
    engine.dispose()
    got = {a.name: a for a in annotators}
    assert set(got) == {*plan, "eve"}
    for name, n in plan.items():
        times = [t for who, t, _ in rows if who == name and t is not None]
        assert got[name].labels == n and got[name].unsure == sum(1 for who, _, u in rows if who == name and u)
        assert got[name].median_seconds == (statistics.median(times) if times else None)
    assert got["bob"].unsure == 1 and len([t for who, t, _ in rows if who == "cy" and t is not None]) == 3
    assert (got["eve"].labels, got["eve"].skips, got["eve"].median_seconds) == (0, 1, None)
