"""One real browser flow: headless Chromium labels regions with the keyboard against a served app."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
import urllib.request
from collections.abc import Iterator
from pathlib import Path

import pytest
from sqlalchemy import create_engine, text

CHROMIUM = "/usr/bin/chromium"
pytestmark = [
    pytest.mark.browser,
    pytest.mark.skipif(not Path(CHROMIUM).exists(), reason="Debian's chromium is not installed (./dev test installs it as root)"),
]


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture()
def server(project: Path) -> Iterator[str]:
    port = _free_port()
    proc = subprocess.Popen([sys.executable, "-m", "app.cli", "serve", str(project), "--port", str(port)], stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True, env={**os.environ, "PYTHONUNBUFFERED": "1"})
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 60
    while True:
        try:
            with urllib.request.urlopen(url + "/", timeout=1):
                break
        except OSError:
            if proc.poll() is not None or time.monotonic() > deadline:
                proc.kill()
                output = proc.stdout.read() if proc.stdout else ""
                if proc.stdout:
                    proc.stdout.close()
                raise RuntimeError("server did not start:\n" + output) from None
            time.sleep(0.2)
    yield url
    proc.terminate()
    proc.wait(timeout=10)
    if proc.stdout:
        proc.stdout.close()


def test_keyboard_labelling_end_to_end(server: str, project: Path) -> None:
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=CHROMIUM, headless=True, args=["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update", "--disable-sync", "--no-first-run"])
        page = browser.new_page()
        page.goto(server + "/annotate")
        page.fill("[data-name]", "kim")
        page.keyboard.press("Enter")
        page.wait_for_selector("[data-label-form][data-ready]")
        assert page.locator("[data-crop]").evaluate("img => img.naturalWidth") > 0
        page.keyboard.type("cap: red; label band: torn, white")
        page.keyboard.press("Enter")
        page.wait_for_selector("[data-progress]:has-text('1 of')")
        page.wait_for_selector("[data-label-form][data-ready]")
        page.keyboard.type("<img src=x onerror=alert(1)>")
        page.keyboard.press("Enter")
        page.wait_for_selector("[data-progress]:has-text('2 of')")
        page.wait_for_selector("[data-label-form][data-ready]")
        page.keyboard.press("Alt+n")
        page.wait_for_selector("[data-progress]:has-text('3 of')")
        browser.close()
    engine = create_engine(f"sqlite:///{project / 'heedmap.db'}")
    with engine.connect() as c:
        rows = c.execute(text("select a.entities from annotations a join annotators p on p.id = a.annotator_id where p.name = 'kim' order by a.id")).all()
    engine.dispose()
    assert [r[0] for r in rows] == ['[["cap", ["red"]], ["label band", ["torn", "white"]]]', '[["<img src=x onerror=alert(1)>", []]]', "[]"]
