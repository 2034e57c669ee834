"""One real browser flow: headless Chromium labels regions with the keyboard against a served app."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text

from app.campaigns import create_campaign
from app.db import make_engine, session_factory, write_session
from app.people import create_invite

from .serving import BROWSER_MARKS, launch, sign_in
from .serving import served as serve_project

pytestmark = BROWSER_MARKS


@pytest.fixture()
def served(project: Path) -> Iterator[tuple[str, str]]:
    """The app served by uvicorn in a subprocess over a project with a campaign; yields (url, invite token)."""
    engine = make_engine(project)
    with write_session(session_factory(engine)) as s:
        cid = create_campaign(s, name="browser", run_id=1, labels_per_region=2)
        _, token = create_invite(s, name="kim", role="annotator", campaign_id=cid)
    engine.dispose()
    with serve_project(project) as url:
        yield url, token


def test_invite_link_then_keyboard_labelling_suggestions_and_undo(served: tuple[str, str], project: Path) -> None:
    from playwright.sync_api import sync_playwright

    url, token = served
    dialogs: list[str] = []
    with sync_playwright() as p:
        browser = launch(p)
        page = browser.new_page()
        page.on("dialog", lambda d: (dialogs.append(d.message), d.dismiss()))
        sign_in(page, url, token)  # opening the link asks; the button signs in
        page.click("[data-start]")  # showing the page takes nothing; the button hands out a region
        page.wait_for_selector("body[data-ready]")
        # The crop is cut from the original image when asked: wait until it has arrived (or failed), then check it shows.
        page.wait_for_function("() => { const img = document.querySelector('[data-crop]'); return img && img.complete; }")
        assert page.locator("[data-crop]").evaluate("img => img.naturalWidth") > 0

        def saved(n: int) -> None:
            page.wait_for_selector(f"[data-progress]:has-text('{n} of')")
            page.wait_for_selector("body[data-ready]")

        page.keyboard.type("cap: red; label band: torn, white")
        page.keyboard.press("Enter")
        saved(1)
        page.keyboard.type("<img src=x onerror=alert(1)>")
        page.keyboard.press("Enter")
        saved(2)
        page.keyboard.press("Alt+n")
        saved(3)
        # Suggestions come from the campaign's own words: Tab takes the first.
        page.wait_for_selector("[data-label-form][data-vocabulary]")
        page.keyboard.type("lab")
        page.wait_for_selector("[data-suggestion='label band']")
        page.keyboard.press("Tab")
        page.keyboard.type(": wh")
        page.wait_for_selector("[data-suggestion='white']")
        page.keyboard.press("Tab")
        assert page.input_value("[data-labels]") == "label band: white"
        page.keyboard.press("Enter")
        saved(4)
        page.keyboard.press("Alt+z")
        saved(3)
        assert page.input_value("[data-labels]") == "label band: white"  # the undone label comes back to edit
        page.keyboard.press("Alt+o")
        assert page.get_attribute("[data-outline]", "data-showing") == "overlay"
        browser.close()
    assert dialogs == []  # the label text never ran as script
    engine = create_engine(f"sqlite:///{project / 'heedmap.db'}")
    with engine.connect() as c:
        rows = c.execute(text("select l.entities from labels l join people p on p.id = l.person_id where p.name = 'kim' order by l.id")).all()
    engine.dispose()
    assert [r[0] for r in rows] == ['[["cap", ["red"]], ["label band", ["torn", "white"]]]', '[["<img src=x onerror=alert(1)>", []]]', "[]"]
