from __future__ import annotations

from pathlib import Path

import pytest
import torch

from analysis.architectures import SorterCNN
from analysis.images import find_images
from analysis.model_io import LoadedModel, Sidecar, prepare_model
from app.db import make_engine, session_factory
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
def project(tmp_path: Path, small_scenes: Path, tiny_model: LoadedModel) -> Path:
    proj = tmp_path / "project"
    engine = make_engine(proj)
    factory = session_factory(engine)
    register_images(factory, find_images(small_scenes / "manifest.csv"))
    run_saliency(factory, proj, tiny_model, progress=None)
    engine.dispose()
    return proj
