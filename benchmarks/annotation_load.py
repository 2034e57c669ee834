"""50 simulated annotators at once against a served app on loopback: latency of next-task and submit,
requests per second, and labels lost or stored twice (must be 0).

    .venv/bin/python -m benchmarks.annotation_load             # 50 annotators, 30 s
    .venv/bin/python -m benchmarks.annotation_load --quick     # 50 annotators, 8 s
    .venv/bin/python -m benchmarks.annotation_load --compare-sync   # the cost of syncing each commit (NORMAL vs FULL)
    .venv/bin/python -m benchmarks.annotation_load --against main   # this tree against a git revision, rounds taken in turn
    .venv/bin/python -m benchmarks.annotation_load --quick --db "$HEEDMAP_TEST_POSTGRES_URL"   # SQLite and PostgreSQL side by side

With ``--against REV`` the same load runs against a server from the revision's files and one from this
tree, in alternating rounds (A B B A A B ...), so that other work on a shared machine weighs on both sides alike.

Each annotator signs in through its own invite link, then loops: fetch the next task, submit a
label (JSON API, with the anti-forgery header); one submit in twenty is sent twice, as a browser
retrying after a dropped connection would. The project is synthetic (rows only, no images):
the benchmark measures the server, not image decoding.
"""

from __future__ import annotations

import argparse
import asyncio
import io
import json
import os
import random
import socket
import subprocess
import sys
import tarfile
import tempfile
import time
import uuid
from collections import Counter
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import httpx
import numpy as np
from sqlalchemy import func, select

from app.campaigns import create_campaign
from app.db import dispose_engines, make_engine, session_factory, set_project_database, write_session
from app.deps import COOKIE
from app.models import ImageRow, Label, Prediction, RegionRow, SaliencyRun
from app.people import create_invite

from .measure import print_table

CLASSES = ("bottle", "can", "carton")
ROOT = Path(__file__).resolve().parent.parent


def make_project(root: Path, n_images: int, n_people: int, k: int, database_url: str | None = None) -> tuple[int, list[str]]:
    """A project with one run of ``n_images`` images x 2 regions, a campaign, and invite tokens (in PostgreSQL given ``database_url``)."""
    if database_url is not None:
        root.mkdir(mode=0o700)
        set_project_database(root, database_url)
    engine = make_engine(root)
    with write_session(session_factory(engine)) as s:
        run = SaliencyRun(config_key="bench", provenance={"method": "synthetic"})
        s.add(run)
        s.flush()
        s.execute(ImageRow.__table__.insert(), [{"id": i + 1, "path": f"/synthetic/{i}.png", "label": CLASSES[i % 3], "split": "test"} for i in range(n_images)])
        s.execute(Prediction.__table__.insert(), [{"id": i + 1, "run_id": run.id, "image_id": i + 1, "predicted": CLASSES[i % 3], "confidence": 0.9,
                                                   "empty_map": False, "map_path": "none"} for i in range(n_images)])
        s.execute(RegionRow.__table__.insert(), [{"prediction_id": i // 2 + 1, "rank": i % 2, "x0": 0, "y0": 0, "x1": 8, "y1": 8, "area": 64,
                                                  "mass_share": 0.5, "crop_path": "none", "outline_path": "none"} for i in range(2 * n_images)])
        cid = create_campaign(s, name="load", run_id=run.id, labels_per_region=k)
        tokens = [create_invite(s, name=f"annotator {i:02d}", role="annotator", campaign_id=cid)[1] for i in range(n_people)]
    engine.dispose()
    return cid, tokens


def _cpu_seconds(pid: int) -> float:
    """User + system processor seconds of process ``pid`` and its live children (server workers) so far (Linux /proc; 0 elsewhere)."""
    total = 0.0
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            fields = stat.read_text().rsplit(")", 1)[1].split()
        except (OSError, IndexError):
            continue
        if stat.parent.name == str(pid) or fields[1] == str(pid):
            total += (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")
    return total


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


async def annotator(base: str, token: str, cid: int, start: asyncio.Event, seconds: float, think: float, timings: dict[str, list[float]],
                    outcome: Counter[str], seed: int) -> None:
    rng = random.Random(seed)
    async with httpx.AsyncClient(base_url=base, timeout=60, follow_redirects=True) as client:
        page = await client.get(f"/join/{token}")  # the invite page, then its sign-in button
        join = page.text.split('name="join" value="', 1)[1].split('"', 1)[0] if page.status_code == 200 else ""
        r = await client.post(f"/join/{token}", data={"join": join})
        cookie = client.cookies.get(COOKIE)
        if r.status_code != 200 or cookie is None:
            outcome["sign-in failed"] += 1
            return
        # The label page carries the anti-forgery token; read it from the form like a browser would.
        csrf = r.text.split('name="csrf" value="', 1)[1].split('"', 1)[0]
        headers = {"X-CSRF-Token": csrf}
        outcome["signed in"] += 1
        await start.wait()  # measure the steady state, not 50 sign-ins at once
        await asyncio.sleep(rng.uniform(0, think))  # people do not start in step
        deadline = time.perf_counter() + seconds
        while time.perf_counter() < deadline:
            t = time.perf_counter()
            r = await client.post(f"/api/campaigns/{cid}/tasks/next", headers=headers)
            timings["next task"].append(time.perf_counter() - t)
            task = r.json().get("task") if r.status_code == 200 else None
            if task is None:
                outcome["no task"] += 1
                break
            if think:  # looking at the crop and typing, 0.5x to 1.5x the mean
                await asyncio.sleep(think * rng.uniform(0.5, 1.5))
            body = {"client_id": uuid.uuid4().hex, "entities": [{"entity": rng.choice(["cap", "tag", "rim", "label band"]), "attributes": ["red"]}],
                    "seconds_spent": 1.0}
            for _attempt in range(2 if rng.random() < 0.05 else 1):
                t = time.perf_counter()
                r = await client.post(f"/api/campaigns/{cid}/regions/{task['region_id']}/labels", json=body, headers=headers)
                timings["submit"].append(time.perf_counter() - t)
                if r.status_code == 201:
                    outcome["stored" if r.json()["stored"] else "retry recognised"] += 1
                else:
                    outcome[f"submit {r.status_code}"] += 1


async def run_load(base: str, tokens: list[str], cid: int, seconds: float, think: float) -> tuple[dict[str, list[float]], Counter[str], float]:
    timings: dict[str, list[float]] = {"next task": [], "submit": []}
    outcome: Counter[str] = Counter()
    start = asyncio.Event()
    people = [asyncio.create_task(annotator(base, t, cid, start, seconds, think, timings, outcome, i)) for i, t in enumerate(tokens)]
    while outcome["signed in"] + outcome["sign-in failed"] < len(tokens):
        await asyncio.sleep(0.05)
    t0 = time.perf_counter()
    start.set()
    await asyncio.gather(*people)
    return timings, outcome, time.perf_counter() - t0


def _make_project_in(tree: Path, project: Path, n_people: int, k: int) -> tuple[int, list[str]]:
    """The benchmark's project made by the code in ``tree`` (another revision makes its own schema)."""
    code = ("import json, sys; from pathlib import Path; from benchmarks.annotation_load import make_project; "
            "print(json.dumps(make_project(Path(sys.argv[1]), 5000, int(sys.argv[2]), int(sys.argv[3]))))")
    out = subprocess.run([sys.executable, "-c", code, str(project), str(n_people), str(k)], cwd=tree, check=True, capture_output=True, text=True).stdout
    cid, tokens = json.loads(out.strip().splitlines()[-1])
    return int(cid), [str(t) for t in tokens]


@contextmanager
def fresh_database(server: str | None) -> Iterator[str | None]:
    """A new empty database on the PostgreSQL server ``server`` (dropped afterwards); None for SQLite."""
    if server is None:
        yield None
        return
    import psycopg
    from sqlalchemy.engine import make_url

    name = f"heedmap_bench_{uuid.uuid4().hex[:12]}"
    admin_url = make_url(server).set(drivername="postgresql").render_as_string(hide_password=False)
    with psycopg.connect(admin_url, autocommit=True) as admin:
        admin.execute(f'CREATE DATABASE "{name}"')
    try:
        yield make_url(server).set(database=name).render_as_string(hide_password=False)
    finally:
        dispose_engines()
        with psycopg.connect(admin_url, autocommit=True) as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def run_once(args: argparse.Namespace, seconds: float, synchronous: str | None, tree: Path | None = None, *, server: str | None = None,
             workers: int = 1) -> tuple[dict[str, list[float]], Counter[str], float, int, int, int]:
    """One served project under load; ``synchronous`` overrides SQLite's sync level in the server (for the side-by-side cost);
    ``tree`` serves the code of another checkout (its own project schema too); ``server`` (a PostgreSQL URL) puts the
    project's data in a fresh database there, served by ``workers`` processes."""
    with tempfile.TemporaryDirectory() as tmp, fresh_database(server) as database_url:
        project = Path(tmp) / "project"
        if tree is None:
            cid, tokens = make_project(project, 5000, args.annotators, args.per_region, database_url)
        else:
            cid, tokens = _make_project_in(tree, project, args.annotators, args.per_region)
        port = free_port()
        serve = ["serve", str(project), "--port", str(port)] + (["--workers", str(workers)] if workers > 1 else [])
        code = "import sys, app.db, app.cli; " + (f"app.db.SYNCHRONOUS = {synchronous!r}; " if synchronous else "") + "sys.exit(app.cli.main(sys.argv[1:]))"
        # The server imports ``app`` from its working folder: this tree's, or the other revision's.
        server = subprocess.Popen([sys.executable, "-c", code, *serve], stdout=open(os.environ.get("HEEDMAP_BENCH_LOG", os.devnull), "w"),
                                  stderr=subprocess.STDOUT, env={**os.environ, "PYTHONUNBUFFERED": "1"}, cwd=tree or ROOT)
        base = f"http://127.0.0.1:{port}"
        try:
            for _ in range(200):
                try:
                    httpx.get(base + "/", timeout=1)
                    break
                except httpx.HTTPError:
                    time.sleep(0.1)
            cpu = _cpu_seconds(server.pid)
            timings, outcome, wall = asyncio.run(run_load(base, tokens, cid, seconds, args.think))
            # The server's own processor time over the run (sign-ins included): what a request costs, whatever else the machine runs.
            outcome["server cpu ms"] = round(1000 * (_cpu_seconds(server.pid) - cpu))
        finally:
            server.terminate()
            server.wait(timeout=10)
        engine = make_engine(project)
        with session_factory(engine)() as s:
            in_db = s.scalar(select(func.count(Label.id))) or 0
            per_region = select(func.count().label("n")).select_from(Label).group_by(Label.region_id).subquery()
            worst = s.scalar(select(func.max(per_region.c.n))) or 0
            repeats = s.scalar(select(func.count()).select_from(select(Label.region_id, Label.person_id).group_by(Label.region_id, Label.person_id).having(func.count() > 1).subquery())) or 0
        engine.dispose()
    return timings, outcome, wall, in_db, worst, repeats


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="8 seconds instead of 30")
    p.add_argument("--annotators", type=int, default=50)
    p.add_argument("--per-region", type=int, default=3)
    p.add_argument("--think", type=float, default=2.0, help="mean seconds an annotator spends on a region (0 = hammer the server)")
    p.add_argument("--compare-sync", action="store_true", help="run once with SQLite synchronous=NORMAL and once with FULL (what heedmap uses), side by side")
    p.add_argument("--against", metavar="REV", help="also serve the files of git revision REV (e.g. main, HEAD~3) and compare, in alternating rounds")
    p.add_argument("--rounds", type=int, default=4, help="rounds per side with --against")
    p.add_argument("--db", default=None, metavar="URL",
                   help="a PostgreSQL server (postgresql://USER@HOST/ANY_DB): run SQLite and PostgreSQL (1 process and --workers) side by side")
    p.add_argument("--workers", type=int, default=2, help="server processes on the PostgreSQL side with --db")
    args = p.parse_args(argv)
    seconds = 8.0 if args.quick else 30.0
    if args.compare_sync:
        return _compare_sync(args, seconds)
    if args.against:
        return _compare_revision(args, seconds)
    if args.db:
        return _compare_databases(args, seconds)
    return _one_table(args, run_once(args, seconds, None), "one uvicorn process")


def _one_table(args: argparse.Namespace, found: tuple[dict[str, list[float]], Counter[str], float, int, int, int], setup: str) -> str:
    """The latency table and the checks of one run."""
    timings, outcome, wall, in_db, worst, repeats = found
    requests = sum(len(v) for v in timings.values())
    head = (f"{args.annotators} annotators, {args.think:g} s per region on average, for {wall:.1f} s on loopback, {setup}; "
            f"{requests} requests, {requests / wall:.0f} per second.")
    print(head)
    print(f"outcomes: {dict(outcome)}")
    rows = [[name, len(v), *(1000 * np.percentile(v, q) for q in (50, 95, 99))] for name, v in timings.items()]
    table = print_table(["request", "count", "p50 ms", "p95 ms", "p99 ms"], rows)
    lost = outcome["stored"] - in_db
    checks = print_table(
        ["check", "value"],
        [["labels acknowledged as stored", outcome["stored"]], ["labels in the database", in_db], ["lost (acknowledged, not stored)", lost],
         ["stored twice (same person and region)", repeats], ["retries recognised (stored once)", outcome["retry recognised"]],
         ["most labels on one region (limit)", f"{worst} ({args.per_region})"]],
    )
    return head + "\n\n" + table + "\n\n" + checks


def _compare_databases(args: argparse.Namespace, seconds: float) -> str:
    """The same load on SQLite (one process) and on PostgreSQL (one process, then ``--workers``), one after the other."""
    sides = {"SQLite, 1 process": run_once(args, seconds, None), "PostgreSQL, 1 process": run_once(args, seconds, None, server=args.db)}
    if args.workers > 1:
        sides[f"PostgreSQL, {args.workers} workers"] = run_once(args, seconds, None, server=args.db, workers=args.workers)
    parts = [f"#### {name}\n\n" + _one_table(args, found, name) for name, found in sides.items()]
    names = list(sides)
    rows: list[list[object]] = []
    for request in ("next task", "submit"):
        for q in (50, 95):
            values = [1000 * float(np.percentile(sides[n][0][request], q)) for n in names]
            rows.append([f"{request} p{q} ms", *values, *(v / values[0] for v in values[1:])])
    rates = [sum(len(v) for v in sides[n][0].values()) / sides[n][2] for n in names]
    rows.append(["requests per second", *rates, *(r / rates[0] for r in rates[1:])])
    rows.append(["lost + stored twice", *(sides[n][1]["stored"] - sides[n][3] + sides[n][5] for n in names), *([float("nan")] * (len(names) - 1))])
    table = print_table(["measure", *names, *(f"{n} / SQLite" for n in names[1:])], rows)
    return "\n\n".join(parts) + "\n\n#### side by side\n\n" + table


def _compare_sync(args: argparse.Namespace, seconds: float) -> str:
    """The cost of syncing every commit: the same load with synchronous=NORMAL and =FULL, one after the other."""
    found = {mode: run_once(args, seconds, mode) for mode in ("NORMAL", "FULL")}
    head = f"{args.annotators} annotators, {args.think:g} s per region on average, {seconds:g} s per side on loopback; SQLite WAL, synchronous NORMAL vs FULL."
    print(head)
    rows = []
    for name in ("next task", "submit"):
        for q in (50, 95, 99):
            normal, full = (1000 * float(np.percentile(found[m][0][name], q)) for m in ("NORMAL", "FULL"))
            rows.append([f"{name} p{q} ms", normal, full, full / normal])
    for mode in ("NORMAL", "FULL"):
        _, outcome, wall, in_db, _, repeats = found[mode]
        print(f"{mode}: outcomes {dict(outcome)}; {in_db} labels in the database; lost {outcome['stored'] - in_db}; stored twice {repeats}")
    rows.append(["lost (acknowledged, not stored)", found["NORMAL"][1]["stored"] - found["NORMAL"][3], found["FULL"][1]["stored"] - found["FULL"][3], float("nan")])
    table = print_table(["measure", "NORMAL", "FULL", "FULL / NORMAL"], rows)
    return head + "\n\n" + table


def _revision_tree(rev: str, into: Path) -> Path:
    """The files of git revision ``rev`` of this repository, unpacked under ``into``."""
    got = subprocess.run(["git", "archive", "--format=tar", rev], cwd=ROOT, check=True, capture_output=True).stdout
    with tarfile.open(fileobj=io.BytesIO(got)) as tar:
        tar.extractall(into, filter="data")
    return into


def _compare_revision(args: argparse.Namespace, seconds: float) -> str:
    """The same load against REV's server and this tree's, in alternating rounds; latencies pooled per side."""
    sides = (args.against, "this tree")
    pooled: dict[str, dict[str, list[float]]] = {side: {"next task": [], "submit": []} for side in sides}
    stored: Counter[str] = Counter()
    cpu_ms: Counter[str] = Counter()
    lost: Counter[str] = Counter()
    twice: Counter[str] = Counter()
    loads = []
    with tempfile.TemporaryDirectory() as tmp:
        trees = {args.against: _revision_tree(args.against, Path(tmp) / "rev"), "this tree": None}
        order = [sides[(r // 2 + r) % 2] for r in range(2 * args.rounds)]  # A B B A A B B A: neither side always goes first
        for side in order:
            loads.append(os.getloadavg()[0])
            timings, outcome, _, in_db, _, repeats = run_once(args, seconds, None, trees[side])
            for name, values in timings.items():
                pooled[side][name].extend(values)
            stored[side] += outcome["stored"]
            cpu_ms[side] += outcome["server cpu ms"]
            lost[side] += outcome["stored"] - in_db
            twice[side] += repeats
            print(f"{side}: {dict(outcome)}", flush=True)
    head = (f"{args.annotators} annotators, {args.think:g} s per region on average, {args.rounds} rounds of {seconds:g} s per side taken in turn "
            f"({' '.join('A' if s == sides[0] else 'B' for s in order)}; A = {args.against}, B = this tree); load average at the rounds' "
            f"start {min(loads):.1f}-{max(loads):.1f} on {os.cpu_count()} CPUs.")
    print(head)
    rows: list[list[object]] = []
    for name in ("next task", "submit"):
        for q in (50, 95, 99):
            a, b = (1000 * float(np.percentile(pooled[s][name], q)) for s in sides)
            rows.append([f"{name} p{q} ms", a, b, b / a])
    per_request = [cpu_ms[s] / max(1, sum(len(v) for v in pooled[s].values())) for s in sides]
    rows += [["server processor ms per request (sign-ins included)", per_request[0], per_request[1], per_request[1] / max(per_request[0], 1e-9)],
             ["labels stored", stored[sides[0]], stored[sides[1]], stored[sides[1]] / max(stored[sides[0]], 1)],
             ["lost (acknowledged, not stored)", lost[sides[0]], lost[sides[1]], float("nan")],
             ["stored twice (same person and region)", twice[sides[0]], twice[sides[1]], float("nan")]]
    table = print_table(["measure", f"A: {args.against}", "B: this tree", "B / A"], rows)
    return head + "\n\n" + table


if __name__ == "__main__":
    main()
