"""The group flow in a real browser, keyboard only: name what a grid of crops shares, untick a misfit, save.

It also times one group and one single crop through the pages (keys typed at a stated pace) and prints
seconds per judgment: a rough figure for people-hours in benchmarks/label_budget.py, not a measurement
of people (they also look, think and move their eyes across the grid). Nothing here asserts on time.
"""

from __future__ import annotations

import time
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text

from analysis.model_io import LoadedModel
from app import campaigns
from app.db import make_engine, session_factory, write_session
from app.embeddings import embed_run, load_embeddings
from app.people import create_invite

from .serving import BROWSER_MARKS, launch, served, sign_in

pytestmark = BROWSER_MARKS
KEY_DELAY_MS = 120  # a steady typist's pace between keys, stated so the timing below can be read


@pytest.fixture()
def served_groups(project: Path, varied_model: LoadedModel) -> Iterator[tuple[str, str, int]]:
    """The app served over a project whose campaign is grouped in eights; yields (url, invite token, campaign id)."""
    engine = make_engine(project)
    factory = session_factory(engine)
    embed_run(factory, project, 1, varied_model)
    emb = load_embeddings(project, 1)
    with write_session(factory) as s:
        cid = campaigns.create_campaign(s, name="browser groups", run_id=1, labels_per_region=2)
        campaigns.make_groups(s, campaign=campaigns.get_campaign(s, cid), region_ids=list(emb.region_ids), vectors=emb.vectors, size=8)
        _, token = create_invite(s, name="gus", role="annotator", campaign_id=cid)
    engine.dispose()
    with served(project) as url:
        yield url, token, cid


def test_group_flow_keyboard_only_with_rough_timing(served_groups: tuple[str, str, int], project: Path) -> None:
    from playwright.sync_api import sync_playwright

    url, token, cid = served_groups
    with sync_playwright() as p:
        browser = launch(p)
        page = browser.new_page()
        sign_in(page, url, token)
        page.goto(f"{url}/campaigns/{cid}/groups")
        page.wait_for_selector("[data-start]")
        page.keyboard.press("Enter")  # "Next group" has the focus
        page.wait_for_selector("[data-group-form]")
        page.wait_for_selector("body[data-ready]")
        started = time.perf_counter()
        crops = page.locator("[data-tick]").count()
        assert 2 <= crops <= 16
        assert page.locator("[data-crop]").first.evaluate("img => img.naturalWidth") > 0
        page.keyboard.type("body: blue", delay=KEY_DELAY_MS)
        page.keyboard.press("Escape")  # to the grid: each crop's key ticks or unticks it
        page.keyboard.press("2")
        assert page.get_attribute("[data-crop-cell]:nth-of-type(2)", "data-unticked") == "1"
        page.keyboard.press("3")
        page.keyboard.press("3")  # ticked again
        page.keyboard.press("/")  # back to the text box
        page.keyboard.type(", shiny", delay=KEY_DELAY_MS)
        page.keyboard.press("Enter")
        page.wait_for_selector(f"[data-progress]:has-text('{crops - 1} of')")
        group_seconds = time.perf_counter() - started
        # Undo takes back the whole group judgment and shows the group again with its text; this time the first crop gets
        # what it shows besides (+, its key, the text; Enter goes back to the grid) and the second is unticked again.
        page.wait_for_selector("body[data-ready]")
        page.keyboard.press("Alt+z")
        page.wait_for_selector("[data-progress]:has-text('0 of')")
        page.wait_for_selector("body[data-ready]")
        assert page.input_value("[data-labels]") == "body: blue, shiny"
        page.keyboard.press("Escape")
        page.keyboard.press("2")
        first_crop = int(page.get_attribute("[data-tick][data-key='1']", "value") or 0)
        page.keyboard.press("+")
        page.keyboard.press("1")
        page.keyboard.type("tag: yellow", delay=KEY_DELAY_MS)
        page.keyboard.press("Enter")  # back to the grid, nothing saved yet
        assert page.get_attribute("[data-group-form]", "data-mode") == "grid"
        page.keyboard.press("Enter")
        page.wait_for_selector(f"[data-progress]:has-text('{crops - 1} of')")

        page.goto(f"{url}/campaigns/{cid}/label")  # the next group's crops are held for gus: the single page shows the first
        page.wait_for_selector("[data-label-form]")
        page.wait_for_selector("body[data-ready]")
        started = time.perf_counter()
        page.keyboard.type("cap: red", delay=KEY_DELAY_MS)
        page.keyboard.press("Enter")
        page.wait_for_selector(f"[data-progress]:has-text('{crops} of')")
        single_seconds = time.perf_counter() - started
        browser.close()
    engine = create_engine(f"sqlite:///{project / 'heedmap.db'}")
    with engine.connect() as c:
        rows = c.execute(text("select l.region_id, l.entities, l.group_label_id from labels l join people p on p.id = l.person_id "
                              "where p.name = 'gus' order by l.id")).all()
        group = c.execute(text("select ticked, unticked from group_labels")).one()
    engine.dispose()
    grouped = [r for r in rows if r[2] is not None]
    assert len(grouped) == crops - 1 and len({r[2] for r in grouped}) == 1
    by_region = {r[0]: r[1] for r in grouped}
    assert by_region.pop(first_crop) == '[["body", ["blue", "shiny"]], ["tag", ["yellow"]]]'
    assert all(v == '[["body", ["blue", "shiny"]]]' for v in by_region.values())
    assert len(rows) == crops and rows[-1][2] is None and rows[-1][1] == '[["cap", ["red"]]]'
    assert len(eval(group[1])) == 1  # noqa: S307 - a JSON list of one region id from our own database
    print(f"\nrough timing (machine, keys every {KEY_DELAY_MS} ms, no looking time): group of {crops} crops {group_seconds:.1f} s "
          f"= {group_seconds / (crops - 1):.2f} s per crop labelled; single crop {single_seconds:.1f} s per judgment")
