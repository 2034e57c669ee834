"""Dependency aliases: one session per request, the settings, the current annotator."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Annotated

from fastapi import Depends, Request
from sqlalchemy.orm import Session

from .db import write_session
from .settings import Settings


def _session(request: Request) -> Iterator[Session]:
    with request.app.state.sessions() as s:
        yield s


def _write_session(request: Request) -> Iterator[Session]:
    with write_session(request.app.state.sessions) as s:
        yield s


def _settings(request: Request) -> Settings:
    return request.app.state.settings  # type: ignore[no-any-return]


SessionDep = Annotated[Session, Depends(_session)]
WriteSessionDep = Annotated[Session, Depends(_write_session)]
SettingsDep = Annotated[Settings, Depends(_settings)]
