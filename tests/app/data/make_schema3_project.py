"""How ``schema3_project/heedmap.db`` was made: a real project of schema 3, the last hand-versioned schema.

It was run once with heedmap at commit 5370aea (before Alembic managed the schema), as
``python -m tests.app.data.make_schema3_project OUT``; the database it made is kept in the
repository, so the upgrade test opens a file written by that code, not by today's. Run today,
this makes a database at the newest revision instead. Its contents: a saliency run of a tiny
untrained model over 12 demo scenes, a campaign with a check item and an example, labels by two
people (one undone), a skip, live leases, synonym rules, invites and the word counts.
"""

from __future__ import annotations

import sys
import uuid
from datetime import datetime, timedelta
from pathlib import Path

import torch

from analysis.architectures import SorterCNN
from analysis.images import find_images
from analysis.model_io import Sidecar, prepare_model
from app import campaigns
from app.db import make_engine, session_factory, write_session
from app.jobs import register_images, run_saliency
from app.people import create_invite, ensure_person
from app.store import latest_run_id
from demo_data.scenes import CLASSES, SceneConfig, generate_dataset

NOW = datetime(2026, 12, 3, 12, 0, 0)


def make(out: Path) -> None:
    scenes = out / "scenes"
    generate_dataset(scenes, SceneConfig(seed=3, n_train=0, n_test=12, n_counterfactual=0))
    torch.manual_seed(0)
    sidecar = Sidecar(classes=CLASSES, input_size=(64, 64), mean=(0.4, 0.4, 0.4), std=(0.2, 0.2, 0.2), target_layer="features")
    model = prepare_model(SorterCNN(num_classes=3, width=8), sidecar)
    project = out / "project"
    engine = make_engine(project)
    factory = session_factory(engine)
    register_images(factory, find_images(scenes / "manifest.csv"))
    run_saliency(factory, project, model, progress=None)
    with write_session(factory) as s:
        cid = campaigns.create_campaign(s, name="belt audit", run_id=latest_run_id(s) or 0, labels_per_region=2, instructions="Name the parts.")
        campaigns.set_check_answer(s, campaign_id=cid, region_id=1, entities=[("cap", ["red"])])
        campaigns.set_example(s, campaign_id=cid, region_id=2, entities=[("body", ["green"])])
    with write_session(factory) as s:
        c = campaigns.get_campaign(s, cid)
        create_invite(s, name="admin", role="admin", campaign_id=None, now=NOW)
        create_invite(s, name="ann", role="annotator", campaign_id=cid, now=NOW)
        texts = {"ann": [("cap", ["red"]), ("label band", ["torn"])], "bob": [("lid", [])], "cy": [("tag", ["yellow"])]}
        for name, entities in texts.items():
            person = ensure_person(s, name, "annotator")
            for i in range(4):
                task = campaigns.lease_tasks(s, campaign=c, person_id=person, now=NOW)[0]
                campaigns.save_label(s, campaign=c, region_id=task.region_id, person_id=person, entities=entities if i else [],
                                     unsure=(i == 3), client_id=uuid.uuid4().hex, seconds_spent=1.5 + i, now=NOW)
        bob = ensure_person(s, "bob", "annotator")
        campaigns.undo_last(s, campaign=c, person_id=bob, now=NOW)
        task = campaigns.lease_tasks(s, campaign=c, person_id=bob, now=NOW + timedelta(seconds=1))[0]
        campaigns.skip_region(s, campaign=c, region_id=task.region_id, person_id=bob)
        campaigns.lease_tasks(s, campaign=c, person_id=ensure_person(s, "cy", "annotator"), now=NOW)
        campaigns.add_synonym_rule(s, campaign_id=cid, kind="merge", source="lid", target="cap", by="admin")
    engine.dispose()


if __name__ == "__main__":
    make(Path(sys.argv[1]))
