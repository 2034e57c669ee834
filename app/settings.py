"""Settings: defaults < HEEDMAP_* environment < command-line flags; validated at start-up."""

from __future__ import annotations

import os
from dataclasses import dataclass, replace
from pathlib import Path


class SettingsError(ValueError):
    pass


@dataclass(frozen=True)
class Settings:
    project_dir: Path = Path("heedmap-demo/project")
    host: str = "127.0.0.1"
    port: int = 8000
    labels_per_region: int = 3
    min_support: float = 0.02
    session_days: int = 30
    careless_seconds: float = 2.0  # median seconds per label below which an annotator is flagged
    debug: bool = False
    api_docs: bool = False  # serve /docs and /openapi.json (off: they map every route for anyone who can reach the port)
    database_url: str | None = None  # a PostgreSQL database for this run; None: the project's own (database.url or heedmap.db)
    workers: int = 1  # server processes; more than one needs PostgreSQL
    warm_campaigns: int = 3  # recent labelled campaigns whose results are computed at start-up (0: none, pages compute on first view)

    def __post_init__(self) -> None:
        if not 1 <= self.port <= 65535:
            raise SettingsError(f"port must be 1..65535; got {self.port}.")
        if not 1 <= self.labels_per_region <= 50:
            raise SettingsError(f"labels_per_region must be 1..50; got {self.labels_per_region}.")
        if not 1 <= self.session_days <= 365:
            raise SettingsError(f"session_days must be 1..365; got {self.session_days}.")
        if not 0 <= self.careless_seconds <= 600:
            raise SettingsError(f"careless_seconds must be 0..600; got {self.careless_seconds}.")
        if not 1 <= self.workers <= 64:
            raise SettingsError(f"workers must be 1..64; got {self.workers}.")
        if not 0 <= self.warm_campaigns <= 20:
            raise SettingsError(f"warm_campaigns must be 0..20; got {self.warm_campaigns}.")
        if not 0 < self.min_support <= 1:
            raise SettingsError(f"min_support must be in (0, 1]; got {self.min_support}.")


def get_settings(**overrides: object) -> Settings:
    """Defaults, then HEEDMAP_PROJECT / HEEDMAP_PORT / HEEDMAP_DATABASE_URL / HEEDMAP_LABELS_PER_REGION /
    HEEDMAP_WARM_CAMPAIGNS, then ``overrides``."""
    s = Settings()
    env = os.environ
    try:
        if "HEEDMAP_PROJECT" in env:
            s = replace(s, project_dir=Path(env["HEEDMAP_PROJECT"]))
        if "HEEDMAP_PORT" in env:
            s = replace(s, port=int(env["HEEDMAP_PORT"]))
        if env.get("HEEDMAP_DATABASE_URL"):
            s = replace(s, database_url=env["HEEDMAP_DATABASE_URL"])
        if "HEEDMAP_LABELS_PER_REGION" in env:
            s = replace(s, labels_per_region=int(env["HEEDMAP_LABELS_PER_REGION"]))
        if "HEEDMAP_WARM_CAMPAIGNS" in env:
            s = replace(s, warm_campaigns=int(env["HEEDMAP_WARM_CAMPAIGNS"]))
    except ValueError as exc:
        raise SettingsError(f"a HEEDMAP_* environment variable is not a number: {exc}") from None
    return replace(s, **{k: v for k, v in overrides.items() if v is not None})  # type: ignore[arg-type]
