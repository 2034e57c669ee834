from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from analysis.images import find_images
from analysis.model_io import LoadedModel
from app.db import make_engine, session_factory
from app.jobs import register_images, run_saliency
from app.main import create_app
from app.settings import Settings


@pytest.fixture()
def project(tmp_path: Path, small_scenes: Path, tiny_model: LoadedModel) -> Path:
    proj = tmp_path / "project"
    engine = make_engine(proj)
    factory = session_factory(engine)
    register_images(factory, find_images(small_scenes / "manifest.csv"))
    run_saliency(factory, proj, tiny_model, progress=None)
    engine.dispose()
    return proj


@pytest.fixture()
def client(project: Path) -> Iterator[TestClient]:
    with TestClient(create_app(Settings(project_dir=project, labels_per_region=2))) as c:
        yield c
