from __future__ import annotations

from pathlib import Path

import pytest
import torch

from analysis.architectures import SorterCNN
from analysis.images import find_images, read_rgb, to_model_input
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


@pytest.fixture()
def project(tmp_path: Path, small_scenes: Path, varied_model: LoadedModel) -> Path:
    proj = tmp_path / "project"
    engine = make_engine(proj)
    factory = session_factory(engine)
    register_images(factory, find_images(small_scenes / "manifest.csv"))
    run_saliency(factory, proj, varied_model, progress=None)
    engine.dispose()
    return proj
