"""What both browser tests share: the app served by uvicorn in a subprocess, headless Chromium, signing in by invite link."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
import urllib.request
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest

CHROMIUM = "/usr/bin/chromium"
BROWSER_MARKS = [
    pytest.mark.browser,
    pytest.mark.skipif(not Path(CHROMIUM).exists(), reason="Debian's chromium is not installed (./dev test installs it as root)"),
]
_CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update", "--disable-sync",
                  "--no-first-run"]


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@contextmanager
def served(project: Path) -> Iterator[str]:
    """`heedmap serve` over the project on a free port; yields its URL once it answers, stops it afterwards."""
    port = _free_port()
    proc = subprocess.Popen([sys.executable, "-m", "app.cli", "serve", str(project), "--port", str(port)], stdout=subprocess.PIPE,
                            stderr=subprocess.STDOUT, text=True, env={**os.environ, "PYTHONUNBUFFERED": "1"})
    url = f"http://127.0.0.1:{port}"
    deadline = time.monotonic() + 60
    try:
        while True:
            try:
                with urllib.request.urlopen(url + "/", timeout=1):
                    break
            except OSError:
                if proc.poll() is not None or time.monotonic() > deadline:
                    proc.kill()
                    output = proc.stdout.read() if proc.stdout else ""
                    raise RuntimeError("server did not start:\n" + output) from None
                time.sleep(0.2)
        yield url
    finally:
        if proc.poll() is None:
            proc.terminate()
            proc.wait(timeout=10)
        if proc.stdout:
            proc.stdout.close()


def launch(playwright: Any) -> Any:
    """Headless Debian chromium with nothing that reaches out to the network."""
    return playwright.chromium.launch(executable_path=CHROMIUM, headless=True, args=_CHROMIUM_ARGS)


def sign_in(page: Any, url: str, token: str) -> None:
    """Open the invite link and sign in from the keyboard: the page asks first, and its button has the focus."""
    page.goto(f"{url}/join/{token}")
    page.wait_for_selector("[data-join-confirm]:focus")
    with page.expect_navigation():
        page.keyboard.press("Enter")
