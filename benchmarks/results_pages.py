"""The results page, the concepts CSV and the rules CSV of an already built project: processor and wall-clock
seconds of each request, first load on a fresh app and first load after one new label in a running app.

    .venv/bin/python -m benchmarks.results_pages PROJECT_COPY [--campaign N] [--profile OUT_DIR]

PROJECT_COPY is changed (invites and one label per page are stored): give a copy, never the original, e.g.
``cp -a /work/data/p20k/project /tmp/mine_p20k``. Processor time (``time.process_time``, every thread of
this process: the app runs in-process behind FastAPI's test client) is what to compare on a shared machine;
wall-clock seconds are inflated by other people's load. To compare two versions of the code side by side,
run this script from each tree on its own copy of the project, one after the other, and put the rows beside
each other (processor time is not affected by the other's load).

"First load" opens a fresh app, waits until its start-up has finished (``app.state.warmed`` when the app
warms its results in the background) and then requests the page; the seconds start-up spent before that are
shown in their own row. "After a new label" is a running app that has shown every page once; a new
annotator stores one label and the page is requested again.
"""

from __future__ import annotations

import argparse
import contextlib
import cProfile
import re
import sys
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

PAGES = {"results": "results", "concepts_csv": "exports/concepts.csv", "rules_csv": "exports/rules.csv"}


def main(argv: list[str] | None = None) -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("project", type=Path, help="a COPY of a project directory (it is written to)")
    p.add_argument("--campaign", type=int, default=1)
    p.add_argument("--profile", type=Path, help="write a cProfile file per request here")
    args = p.parse_args(argv)

    from fastapi.testclient import TestClient

    from app.db import make_engine, session_factory, write_session
    from app.deps import COOKIE, CSRF_HEADER
    from app.main import create_app
    from app.people import create_invite, csrf_token
    from app.settings import Settings

    project, cid = args.project, args.campaign
    engine = make_engine(project)
    with write_session(session_factory(engine)) as s:
        tokens = {who: create_invite(s, name=f"bench {who} {uuid.uuid4().hex[:6]}", role=role, campaign_id=campaign)[1]
                  for who, role, campaign in (("analyst", "admin", None), ("later", "annotator", cid))}
    engine.dispose()
    if args.profile:
        args.profile.mkdir(parents=True, exist_ok=True)

    def join(client: TestClient, who: str) -> None:
        page = client.get(f"/join/{tokens[who]}")
        found = re.search(r'name="join" value="([^"]+)"', page.text)
        r = client.post(f"/join/{tokens[who]}", data={"join": found.group(1) if found else ""}, follow_redirects=False)
        if r.status_code != 303:
            raise SystemExit(f"sign-in as {who} failed: {r.status_code} {r.text[:200]}")
        client.headers[CSRF_HEADER] = csrf_token(client.app.state.key, client.cookies[COOKIE])  # type: ignore[attr-defined]

    @contextlib.contextmanager
    def fresh_app() -> Iterator[tuple[TestClient, float, float]]:
        cpu, wall = time.process_time(), time.perf_counter()
        with TestClient(create_app(Settings(project_dir=project))) as client:
            warmed = getattr(client.app.state, "warmed", None)  # type: ignore[attr-defined]
            if warmed is not None:
                warmed.wait()
            yield client, time.process_time() - cpu, time.perf_counter() - wall

    def get(client: TestClient, url: str, name: str) -> tuple[float, float]:
        prof = cProfile.Profile() if args.profile else None
        cpu, wall = time.process_time(), time.perf_counter()
        if prof:
            prof.enable()
        r = client.get(url)
        if prof:
            prof.disable()
            prof.dump_stats(str(args.profile / f"{name}.prof"))
        took = (time.process_time() - cpu, time.perf_counter() - wall)
        if r.status_code != 200:
            raise SystemExit(f"GET {url} gave {r.status_code}: {r.text[:300]}")
        return took

    rows: list[tuple[str, float, float]] = []
    for key, page in PAGES.items():
        with fresh_app() as (client, start_cpu, start_wall):
            join(client, "analyst")
            rows.append((f"{key}: app start-up (before the first request)", start_cpu, start_wall))
            rows.append((f"{key}: first load", *get(client, f"/campaigns/{cid}/{page}", f"{key}_first")))
    with fresh_app() as (client, _, _):
        join(client, "analyst")
        for page in PAGES.values():
            get(client, f"/campaigns/{cid}/{page}", "warm")
        for key, page in PAGES.items():
            join(client, "later")
            task = client.post(f"/api/campaigns/{cid}/tasks/next").json().get("task")
            if task is None:
                raise SystemExit("no task left for the new label before each page")
            r = client.post(f"/api/campaigns/{cid}/regions/{task['region_id']}/labels",
                            json={"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap", "attributes": ["red"]}]})
            if r.status_code != 201:
                raise SystemExit(f"submit gave {r.status_code}: {r.text[:300]}")
            join(client, "analyst")
            rows.append((f"{key}: first load after a new label", *get(client, f"/campaigns/{cid}/{page}", f"{key}_after_label")))
    print(f"{'request':<52} {'cpu s':>8} {'wall s':>8}")
    for name, cpu, wall in rows:
        print(f"{name:<52} {cpu:8.3f} {wall:8.3f}")
    sys.stdout.flush()


if __name__ == "__main__":
    main()
