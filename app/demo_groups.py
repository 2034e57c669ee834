"""The demo's simulated annotators labelling a campaign in groups, through the same functions the group page uses.

Each person takes the next group handed to them (leases and all), judges it from the part masks of
its crops only (demo_data.group_annotators; never from other people's answers), and submits what the
group shares with what each ticked crop shows besides; crops left over after the groups (unticked
by everyone, or whose group a person skipped) are labelled one at a time, as a person would on the
single-crop page.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from sqlalchemy.orm import Session, sessionmaker

from demo_data.annotators import demo_crowd, simulate_label
from demo_data.group_annotators import DEFAULT_ERRORS, GroupErrors, judge_group

from . import campaigns
from .db import write_session
from .demo import region_truths
from .embeddings import load_embeddings
from .errors import ConflictError
from .people import ensure_person


@dataclass(frozen=True)
class GroupSimulation:
    group_judgments: int
    labels_from_groups: int
    single_labels: int
    skipped_groups: int


def group_campaign(factory: sessionmaker[Session], project_dir: Path, campaign_id: int, *, size: int = 12, max_class_share: float = 0.5,
                   seed: int = 0) -> campaigns.GroupingSummary:
    """Group the campaign's regions on the run's stored embeddings (`heedmap embed` made them)."""
    with write_session(factory) as s:
        c = campaigns.get_campaign(s, campaign_id)
        emb = load_embeddings(project_dir, c.run_id)
        return campaigns.make_groups(s, campaign=c, region_ids=list(emb.region_ids), vectors=emb.vectors, size=size,
                                     max_class_share=max_class_share, seed=seed)


def simulate_group_annotations(factory: sessionmaker[Session], project_dir: Path, data_root: Path, campaign_id: int, n_annotators: int, *,
                               seed: int = 0, errors: GroupErrors = DEFAULT_ERRORS) -> GroupSimulation:
    """``n_annotators`` simulated people label the grouped campaign group by group, then what is left one crop at a time."""
    crowd = demo_crowd(n_annotators, seed)
    rng = np.random.default_rng(seed)
    with write_session(factory) as s:
        c = campaigns.get_campaign(s, campaign_id)
        ids = {a.name: ensure_person(s, a.name, "annotator") for a in crowd}
        truths: dict[int, tuple[list[str], dict[str, Any]]] = {r: (t, scene) for r, t, scene in region_truths(s, project_dir, data_root, c)}
    judged = from_groups = singles = skipped = 0
    active = list(crowd)
    while active:  # people take turns, a group each, so groups are shared out as among real people
        for a in list(active):
            with write_session(factory) as s:
                task = campaigns.lease_group(s, campaign=c, person_id=ids[a.name])
                if task is None:
                    active.remove(a)
                    continue
                crops = [t.region_id for t in task.crops]
                got = judge_group(a, [truths[r][0] for r in crops], [truths[r][1]["parts"] for r in crops], rng, errors)
                if got is None:
                    campaigns.skip_group(s, campaign=c, person_id=ids[a.name], group_id=task.group_id)
                    skipped += 1
                    continue
                result = campaigns.save_group_label(s, campaign=c, person_id=ids[a.name], group_id=task.group_id,
                                                    ticked=[r for r, t in zip(crops, got.ticked) if t], entities=got.entities, unsure=False,
                                                    client_id=f"simg-{campaign_id}-{task.group_id}-{a.name}", seconds_spent=None,
                                                    extras={r: e for r, t, e in zip(crops, got.ticked, got.extras) if t and e})
                judged += 1
                from_groups += len(result.labelled)
    for a in crowd:
        while True:
            with write_session(factory) as s:
                tasks = campaigns.lease_tasks(s, campaign=c, person_id=ids[a.name], want=1)
                if not tasks:
                    break
                r = tasks[0].region_id
                entities = simulate_label(a, truths[r][0], truths[r][1]["parts"], rng)
                try:
                    singles += campaigns.save_label(s, campaign=c, region_id=r, person_id=ids[a.name], entities=entities, unsure=False,
                                                    client_id=f"sim-{campaign_id}-{r}-{a.name}", seconds_spent=None)
                except ConflictError:
                    break
    return GroupSimulation(judged, from_groups, singles, skipped)
