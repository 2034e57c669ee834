from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from app.main import create_app
from app.settings import Settings


@pytest.fixture()
def client(project: Path) -> Iterator[TestClient]:
    with TestClient(create_app(Settings(project_dir=project, labels_per_region=2))) as c:
        yield c
