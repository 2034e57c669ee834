"""A run made with --model-factory records the function, its import folder, the checkpoint and the
sidecar, so interventions and 'heedmap layers --project' build the same model again from another
folder without the user giving any model flag."""

from __future__ import annotations

import json
import sys
import uuid
from pathlib import Path

import pytest
import torch
from sqlalchemy import func, select

from analysis.architectures import SorterCNN
from app import campaigns
from app.cli import main
from app.db import make_engine, session_factory, write_session
from app.models import Prediction, SaliencyRun
from app.people import ensure_person
from demo_data.scenes import CLASSES


def _user_package(root: Path) -> str:
    """A package of the user's own code, importable only from ``root``; returns its factory spec."""
    name = f"user_models_{uuid.uuid4().hex[:8]}"
    (root / name).mkdir(parents=True)
    (root / name / "__init__.py").write_text("")
    (root / name / "nets.py").write_text(
        "from analysis.architectures import SorterCNN\n\n\n"
        "def build_classifier():\n"
        "    return SorterCNN(num_classes=3, width=8)\n"
    )
    return f"{name}.nets:build_classifier"


def _label_everything(project: Path, concept: str) -> None:
    """Two people label every region of the latest campaign with the same concept."""
    engine = make_engine(project)
    with write_session(session_factory(engine)) as s:
        c = campaigns.list_campaigns(s)[-1]
        for name in ("ann", "bob"):
            person = ensure_person(s, name, "annotator")
            while tasks := campaigns.lease_tasks(s, campaign=c, person_id=person):
                campaigns.save_label(s, campaign=c, region_id=tasks[0].region_id, person_id=person, entities=[(concept, [])], unsure=False,
                                     client_id=uuid.uuid4().hex, seconds_spent=None)
    engine.dispose()


def test_intervention_and_layers_on_a_factory_run_reload_the_model(tmp_path: Path, small_scenes: Path, monkeypatch: pytest.MonkeyPatch,
                                                                   capsys: pytest.CaptureFixture[str]) -> None:
    code = tmp_path / "code"
    spec = _user_package(code)
    torch.manual_seed(4)
    trained = SorterCNN(num_classes=3, width=8)
    torch.save({"state_dict": trained.state_dict(), "epoch": 9}, tmp_path / "best.pt")
    sidecar = tmp_path / "model.json"
    sidecar.write_text(json.dumps({"classes": list(CLASSES), "input_size": [64, 64], "mean": [0.4] * 3, "std": [0.2] * 3}))
    proj = tmp_path / "project"

    monkeypatch.chdir(code)
    assert main(["saliency", str(proj), "--model-factory", spec, "--model", str(tmp_path / "best.pt"), "--sidecar", str(sidecar),
                 "--images", str(small_scenes / "manifest.csv"), "--name", "test"]) == 0
    engine = make_engine(proj)
    with session_factory(engine)() as s:
        run = s.scalars(select(SaliencyRun)).one()
        assert run.provenance["model_factory"] == spec and run.provenance["model_factory_folder"] == str(code.resolve())
        assert run.model_path == str((tmp_path / "best.pt").resolve()) and run.sidecar_path == str(sidecar.resolve())
        cls, n = s.execute(select(Prediction.predicted, func.count()).group_by(Prediction.predicted).order_by(func.count().desc())).first()  # type: ignore[misc]
    engine.dispose()
    assert n >= 2

    # Somewhere else, with the user's package forgotten: only the project is named from here on.
    elsewhere = tmp_path / "elsewhere"
    elsewhere.mkdir()
    monkeypatch.chdir(elsewhere)
    package = spec.split(".")[0]
    for mod in [m for m in sys.modules if m == package or m.startswith(package + ".")]:
        monkeypatch.delitem(sys.modules, mod)
    monkeypatch.setattr(sys, "path", [p for p in sys.path if Path(p).resolve() != code.resolve()])
    capsys.readouterr()

    assert main(["campaign", str(proj), "--name", "audit", "--per-region", "2"]) == 0
    _label_everything(proj, "cap")
    capsys.readouterr()
    assert main(["interventions", str(proj), "--class", cls, "--concepts", "cap", "--json", "--draws", "3"]) == 0
    (found,) = json.loads(capsys.readouterr().out)
    assert found["class"] == cls and found["ablation"] is not None and found["ablation"]["n_images"] >= 2

    assert main(["layers", "--project", str(proj), "--run", "test"]) == 0
    listing = capsys.readouterr().out.splitlines()
    assert listing[0] == "layer,type,output,map,default" and any(line.startswith("features,") and line.endswith("*") for line in listing)

    # A checkpoint that changed since the run is refused, naming what to do.
    torch.save(SorterCNN(num_classes=3, width=8).state_dict(), tmp_path / "best.pt")
    assert main(["layers", "--project", str(proj)]) != 0
    assert "not the model this run was made with" in capsys.readouterr().err
