"""Handing out the next group: the index walk heedmap uses against grouping the whole campaign, side by side.

A synthetic project (no images: rows only, as benchmarks/annotation_load.py makes them) of N images x 2
regions in one campaign (k=3), its regions in groups of 12 by id. Some people have judged groups already, so
the least-labelled regions are not all open to the person asking. For each size it times, in the same
process and alternating, the statement heedmap runs to find the next group (walk the (campaign, n_labels,
region) index, stop at the first open region) and the one it replaced (count each group's open crops over
the whole campaign, then take the largest), and prints the ratio. Both answer "a group with a crop open to
this person"; they may pick different groups (least-labelled region first against most open crops).

    nice -n 10 .venv/bin/python -m benchmarks.group_assignment [--sizes 2000 20000] [--repeat 7]
"""

from __future__ import annotations

import argparse
import tempfile
import time
from datetime import datetime
from pathlib import Path

from sqlalchemy import and_, exists, func, insert, select
from sqlalchemy.orm import Session

from app import campaigns
from app.campaigns.assignment import _unseen
from app.campaigns.groups import first_open_group
from app.db import make_engine, session_factory, write_session
from app.models import CampaignRegion, GroupLabel, Lease, RegionGroup, RegionGroupMember, utcnow
from app.people import ensure_person

from .annotation_load import make_project
from .measure import print_table

GROUP = 12


def _grouped_project(root: Path, n_images: int, judged_groups: int) -> tuple[campaigns.CampaignInfo, int, int]:
    """The project, its campaign grouped in twelves, ``judged_groups`` groups judged by two people; returns (campaign, asker, judge)."""
    cid, _ = make_project(root, n_images, n_people=0, k=3)
    engine = make_engine(root)
    factory = session_factory(engine)
    with write_session(factory) as s:
        c = campaigns.get_campaign(s, cid)
        regions = list(s.scalars(select(CampaignRegion.region_id).where(CampaignRegion.campaign_id == cid).order_by(CampaignRegion.region_id)))
        groups = []
        for position in range(0, len(regions), GROUP):
            g = RegionGroup(campaign_id=cid, position=position // GROUP)
            s.add(g)
            groups.append(g)
        s.flush()
        s.execute(insert(RegionGroupMember), [{"campaign_id": cid, "group_id": groups[i // GROUP].id, "region_id": r} for i, r in enumerate(regions)])
        people = [ensure_person(s, name, "annotator") for name in ("judge one", "judge two", "asker")]
    for person in people[:2]:
        for _ in range(judged_groups):
            with write_session(factory) as s:
                task = campaigns.lease_group(s, campaign=c, person_id=person)
                if task is None:
                    break
                campaigns.save_group_label(s, campaign=c, person_id=person, group_id=task.group_id, ticked=[t.region_id for t in task.crops],
                                           entities=[("body", [])], unsure=False, client_id=f"bench-{person}-{task.group_id}", seconds_spent=None)
    engine.dispose()
    return c, people[2], people[0]


def _whole_campaign(s: Session, c: campaigns.CampaignInfo, person_id: int, now: datetime) -> int | None:
    """The statement heedmap used before: every group's open crops counted over the campaign, the largest first."""
    held_by_others = (
        select(func.count()).where(Lease.campaign_id == c.id, Lease.region_id == CampaignRegion.region_id, Lease.expires_at > now, Lease.person_id != person_id)
        .scalar_subquery()
    )
    open_place = and_(
        CampaignRegion.campaign_id == c.id, CampaignRegion.region_id == RegionGroupMember.region_id, CampaignRegion.n_labels < c.labels_per_region,
        CampaignRegion.check_answer.is_(None), CampaignRegion.example_answer.is_(None), CampaignRegion.n_labels + held_by_others < c.labels_per_region,
        _unseen(c.id, person_id, now, CampaignRegion.region_id),
    )
    judged = exists().where(GroupLabel.campaign_id == c.id, GroupLabel.group_id == RegionGroupMember.group_id, GroupLabel.person_id == person_id)
    n = func.count().label("n")
    best = s.execute(
        select(RegionGroupMember.group_id, n).join(CampaignRegion, open_place)
        .where(RegionGroupMember.campaign_id == c.id, ~judged).group_by(RegionGroupMember.group_id)
        .order_by(n.desc(), RegionGroupMember.group_id).limit(1)
    ).first()
    return None if best is None else int(best[0])


def _index_walk(s: Session, c: campaigns.CampaignInfo, person_id: int, now: datetime) -> int | None:
    found = s.execute(first_open_group(c, person_id, now)).first()
    return None if found is None else int(found[0])


def measure(n_images: int, *, repeat: int, judged_groups: int) -> list[list[object]]:
    rows: list[list[object]] = []
    with tempfile.TemporaryDirectory(prefix="heedmap-groups-") as tmp:
        c, asker, judge = _grouped_project(Path(tmp) / "project", n_images, judged_groups)
        engine = make_engine(Path(tmp) / "project")
        factory = session_factory(engine)
        for who, person in (("a new person", asker), (f"a person who judged {judged_groups} groups", judge)):
            times: dict[str, list[float]] = {"walk": [], "whole": []}
            with factory() as s:
                now = utcnow()
                for _ in range(repeat):  # alternating, so load from others falls on both sides
                    for name, fn in (("walk", _index_walk), ("whole", _whole_campaign)):
                        t = time.perf_counter()
                        got = fn(s, c, person, now)
                        times[name].append(time.perf_counter() - t)
                        if got is None:
                            raise RuntimeError(f"{name}: no group found for {who}; the benchmark's project is wrong")
            walk, whole = sorted(times["walk"])[repeat // 2], sorted(times["whole"])[repeat // 2]
            rows.append([f"{n_images:,} images ({2 * n_images:,} regions)", who, walk * 1000, whole * 1000, whole / walk])
        engine.dispose()
    return rows


def main(argv: list[str] | None = None) -> str:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0] if __doc__ else "")
    ap.add_argument("--sizes", type=int, nargs="+", default=[2_000, 20_000])
    ap.add_argument("--repeat", type=int, default=7)
    ap.add_argument("--judged-groups", type=int, default=50)
    args = ap.parse_args(argv)
    rows = [row for n in args.sizes for row in measure(n, repeat=args.repeat, judged_groups=args.judged_groups)]
    return print_table(["campaign", "asking", "index walk ms (median)", "whole campaign ms (median)", "x faster"], rows)


if __name__ == "__main__":
    main()
