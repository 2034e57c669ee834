from __future__ import annotations

import os
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
import torch

from analysis.architectures import SorterCNN
from analysis.images import find_images, read_rgb, to_model_input
from analysis.model_io import LoadedModel, Sidecar, prepare_model
from app.db import make_engine, session_factory, set_project_database
from app.jobs import register_images, run_saliency
from demo_data.scenes import CLASSES, SceneConfig, generate_dataset


@pytest.fixture(scope="session")
def small_scenes(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("scenes")
    generate_dataset(root, SceneConfig(seed=3, n_train=0, n_test=12, n_counterfactual=6))
    return root


@pytest.fixture()
def tiny_model() -> LoadedModel:
    torch.manual_seed(0)
    sidecar = Sidecar(classes=CLASSES, input_size=(64, 64), mean=(0.4, 0.4, 0.4), std=(0.2, 0.2, 0.2), target_layer="features")
    return prepare_model(SorterCNN(num_classes=3, width=8), sidecar)


@pytest.fixture()
def varied_model(tiny_model: LoadedModel, small_scenes: Path) -> LoadedModel:
    """The tiny model with its output layer centred and sharpened on the test scenes, so that it
    predicts every class, with confidences spread out (an untrained model says "bottle" to all)."""
    records = find_images(small_scenes / "manifest.csv")
    x = to_model_input([read_rgb(r.path) for r in records], size=(64, 64), mean=(0.4, 0.4, 0.4), std=(0.2, 0.2, 0.2))
    last = [m for m in tiny_model.module.modules() if isinstance(m, torch.nn.Linear)][-1]
    with torch.no_grad():
        logits = tiny_model.module(x)
        last.bias -= logits.mean(0)
        spread = float((logits - logits.mean(0)).std())
        last.weight *= 2.0 / spread
        last.bias *= 2.0 / spread
    return tiny_model


POSTGRES_ENV = "HEEDMAP_TEST_POSTGRES_URL"
DATABASES = ("sqlite", "postgresql")


def pytest_configure(config: pytest.Config) -> None:
    config.addinivalue_line("markers", "both_databases: the module's tests that use a project run on SQLite and on PostgreSQL")
    config.addinivalue_line("markers", "postgresql_only: tests of PostgreSQL itself; their projects and databases live there")
    config.addinivalue_line("markers", "sqlite_only: a test of SQLite's own file (older schemas, damage) in a both_databases module")


def pytest_generate_tests(metafunc: pytest.Metafunc) -> None:
    """Tests marked both_databases run once per database (the ``db_kind`` fixture, which ``project`` uses)."""
    if "db_kind" not in metafunc.fixturenames:
        return
    if metafunc.definition.get_closest_marker("postgresql_only"):
        metafunc.parametrize("db_kind", ["postgresql"], indirect=True)
    elif metafunc.definition.get_closest_marker("both_databases") and not metafunc.definition.get_closest_marker("sqlite_only"):
        metafunc.parametrize("db_kind", DATABASES, indirect=True)


@pytest.fixture()
def db_kind(request: pytest.FixtureRequest) -> str:
    """Which database the test's project uses: SQLite unless the test is marked both_databases."""
    return str(getattr(request, "param", "sqlite"))


@pytest.fixture(scope="session")
def postgres_server() -> str:
    """The URL of the test PostgreSQL server (any database on it; the tests make their own)."""
    url = os.environ.get(POSTGRES_ENV, "").strip()
    if not url:
        if os.environ.get("CI"):
            pytest.fail(f"CI must run the PostgreSQL tests: .ci/run starts a server and sets {POSTGRES_ENV}")
        pytest.skip(f"no PostgreSQL test server: set {POSTGRES_ENV} (eval \"$(./dev postgres start)\" starts a throwaway one; CI does)")
    return url


def _server_admin(server: str):  # type: ignore[no-untyped-def]
    import psycopg

    return psycopg.connect(server.replace("postgresql+psycopg://", "postgresql://"), autocommit=True)


@pytest.fixture()
def database_url(db_kind: str, request: pytest.FixtureRequest) -> Iterator[str | None]:
    """None for SQLite; for PostgreSQL a fresh database on the test server, dropped afterwards."""
    if db_kind == "sqlite":
        yield None
        return
    from sqlalchemy.engine import make_url

    server = request.getfixturevalue("postgres_server")
    name = f"heedmap_test_{uuid.uuid4().hex[:16]}"
    with _server_admin(server) as admin:
        admin.execute(f'CREATE DATABASE "{name}"')
    try:
        yield make_url(server).set(database=name).render_as_string(hide_password=False)
    finally:
        with _server_admin(server) as admin:
            admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


@pytest.fixture()
def project(tmp_path: Path, small_scenes: Path, varied_model: LoadedModel, database_url: str | None) -> Path:
    """A project with a saliency run of the tiny model over the small scenes, in SQLite or (both_databases) PostgreSQL."""
    proj = tmp_path / "project"
    if database_url is not None:
        proj.mkdir(mode=0o700)
        set_project_database(proj, database_url)
    engine = make_engine(proj)
    factory = session_factory(engine)
    register_images(factory, find_images(small_scenes / "manifest.csv"))
    run_saliency(factory, proj, varied_model, progress=None)
    engine.dispose()
    return proj
