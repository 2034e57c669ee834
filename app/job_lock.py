"""One saliency job per project at a time: a lock file held with flock, naming its holder.

The operating system drops the lock when the holding process ends, however it ends, so a
crashed job never leaves the project locked.
"""

from __future__ import annotations

import fcntl
import json
import os
import socket
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path

from .errors import ConflictError

LOCK_FILE = ".saliency.lock"


@contextmanager
def saliency_job_lock(project_dir: Path) -> Iterator[None]:
    """Hold the project's job lock for the duration; a second job is refused with who holds it."""
    path = Path(project_dir) / LOCK_FILE
    fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o600)
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            raise ConflictError(f"another saliency job is running on {project_dir}: {_holder(path)}. Wait for it to finish (it resumes "
                                "where it stopped if interrupted), or stop that process first.") from None
        holder = {"pid": os.getpid(), "host": socket.gethostname(), "started": datetime.now(UTC).isoformat(timespec="seconds"),
                  "command": " ".join(sys.argv[:6])[:200]}
        os.ftruncate(fd, 0)
        os.pwrite(fd, json.dumps(holder).encode(), 0)
        yield
    finally:
        os.close(fd)  # closing the descriptor releases the lock


def _holder(path: Path) -> str:
    try:
        found = json.loads(path.read_text(encoding="utf-8") or "{}")
        return f"process {found['pid']} on {found['host']}, started {found['started']} UTC ({found['command']})"
    except (OSError, ValueError, KeyError, TypeError):
        return "a process that has not said who it is yet"
