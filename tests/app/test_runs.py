"""Saliency runs keyed by everything that changes them, named runs, campaigns over a named run,
and degenerate saliency caught before the long run (through the command line, in-process)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest
import torch
from sqlalchemy import func, select
from torch import nn

from analysis.architectures import ResNet18, SorterCNN
from app.cli import main
from app.db import make_engine, session_factory
from app.models import Campaign, Prediction

pytestmark = pytest.mark.both_databases


def _split_manifests(scenes: Path, out: Path) -> dict[str, Path]:
    lines = (scenes / "manifest.csv").read_text().splitlines()
    header, rows = lines[0], lines[1:]
    paths = {}
    for split in ("test", "counterfactual"):
        keep = [r for r in rows if r.split(",")[2] == split]
        text = header + "\n" + "\n".join(r.replace("images/", f"{scenes}/images/", 1) for r in keep) + "\n"
        paths[split] = out / f"{split}.csv"
        paths[split].write_text(text)
    return paths


def _model_files(tmp: Path, *, classes: list[str]) -> tuple[Path, Path]:
    torch.manual_seed(0)
    model = SorterCNN(num_classes=3, width=8).eval()
    program = torch.export.export(model, (torch.randn(2, 3, 64, 64),), dynamic_shapes=({0: torch.export.Dim("batch")},))
    torch.export.save(program, tmp / "model.pt2")
    (tmp / "sidecar.json").write_text(json.dumps({"classes": classes, "input_size": [64, 64], "mean": [0.4] * 3, "std": [0.2] * 3}))
    return tmp / "model.pt2", tmp / "sidecar.json"


def _predictions(project: Path, run_id: int) -> list[str]:
    factory = session_factory(make_engine(project))
    with factory() as s:
        return list(s.scalars(select(Prediction.predicted).where(Prediction.run_id == run_id).order_by(Prediction.image_id)))


def test_run_key_covers_sidecar_and_image_set_and_runs_are_named(tmp_path: Path, small_scenes: Path, capsys: pytest.CaptureFixture[str]) -> None:
    sets = _split_manifests(small_scenes, tmp_path)
    model, sidecar = _model_files(tmp_path, classes=["bottle", "can", "carton"])
    proj = tmp_path / "project"
    base = ["saliency", str(proj), "--model", str(model), "--sidecar", str(sidecar)]
    n_test = len(sets["test"].read_text().splitlines()) - 1
    n_cf = len(sets["counterfactual"].read_text().splitlines()) - 1

    assert main([*base, "--images", str(sets["test"])]) == 0
    assert f"run 1 'test' (new run): {n_test} images processed, 0 already done" in capsys.readouterr().out
    assert main([*base, "--images", str(sets["test"])]) == 0
    assert f"run 1 'test' (continued): 0 images processed, {n_test} already done" in capsys.readouterr().out

    # A corrected sidecar (class order) is a new run whose predictions carry the new names.
    first = _predictions(proj, 1)
    sidecar.write_text(json.dumps({"classes": ["carton", "can", "bottle"], "input_size": [64, 64], "mean": [0.4] * 3, "std": [0.2] * 3}))
    assert main([*base, "--images", str(sets["test"])]) == 0
    assert f"run 2 'test' (new run): {n_test} images processed" in capsys.readouterr().out
    swap = {"bottle": "carton", "carton": "bottle", "can": "can"}
    assert _predictions(proj, 2) == [swap[p] for p in first]

    # A second image folder is its own run with only its own images, not merged into the first.
    assert main([*base, "--images", str(sets["counterfactual"])]) == 0
    assert f"run 3 'counterfactual' (new run): {n_cf} images processed, 0 already done" in capsys.readouterr().out
    assert len(_predictions(proj, 3)) == n_cf and len(_predictions(proj, 2)) == n_test

    assert main(["runs", str(proj)]) == 0
    listing = capsys.readouterr().out.splitlines()
    assert listing[0].startswith("id,name,") and [line.split(",")[1] for line in listing[1:]] == ["test", "test", "counterfactual"]
    assert [line.split(",")[3:5] for line in listing[1:]] == [[str(n_test)] * 2, [str(n_test)] * 2, [str(n_cf)] * 2]

    assert main(["campaign", str(proj), "--name", "cf audit", "--run", "counterfactual"]) == 0
    assert "over run 3" in capsys.readouterr().out
    assert main(["campaign", str(proj), "--name", "other", "--run", "holdout"]) == 1
    assert "no saliency run 'holdout'" in capsys.readouterr().err
    with session_factory(make_engine(proj))() as s:
        assert s.scalar(select(Campaign.run_id).where(Campaign.name == "cf audit")) == 3
        assert s.scalar(select(func.count(Campaign.id))) == 1


def test_one_by_one_map_warns_before_the_run_and_names_larger_layers(tmp_path: Path, small_scenes: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # ResNet-18 at 32 px with layer4: a 1x1 map, every region the whole image.
    torch.manual_seed(0)
    torch.jit.script(ResNet18(3).eval()).save(str(tmp_path / "r18.pt"))
    (tmp_path / "r18.json").write_text(json.dumps({"classes": ["bottle", "can", "carton"], "input_size": [32, 32], "target_layer": "layer4"}))
    sets = _split_manifests(small_scenes, tmp_path)
    code = main(["saliency", str(tmp_path / "p"), "--model", str(tmp_path / "r18.pt"), "--sidecar", str(tmp_path / "r18.json"), "--images", str(sets["counterfactual"])])
    err = capsys.readouterr().err
    assert code == 0
    warning = err.index("warning: layer 'layer4' gives a 1x1 map")
    assert "layer2 (4x4)" in err[warning:] and warning < err.index("saliency [")
    assert "top region covers 90% of the image" in err


class _NaNModel(nn.Module):
    def __init__(self) -> None:
        super().__init__()
        self.features = nn.Conv2d(3, 4, 3, padding=1)
        self.fc = nn.Linear(4, 3)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        f = torch.relu(self.features(x))
        return self.fc(f.mean(dim=(2, 3))) + torch.log(x.mean(dim=(1, 2, 3)) - 0.45)[:, None]


def test_model_returning_nan_is_refused_naming_the_image(tmp_path: Path, small_scenes: Path, capsys: pytest.CaptureFixture[str]) -> None:
    torch.manual_seed(0)
    torch.jit.script(_NaNModel().eval()).save(str(tmp_path / "nan.pt"))
    (tmp_path / "nan.json").write_text(json.dumps({"classes": ["bottle", "can", "carton"], "input_size": [32, 32], "target_layer": "features"}))
    sets = _split_manifests(small_scenes, tmp_path)
    code = main(["saliency", str(tmp_path / "p"), "--model", str(tmp_path / "nan.pt"), "--sidecar", str(tmp_path / "nan.json"), "--images", str(sets["test"])])
    err = capsys.readouterr().err
    assert code == 1 and "NaN or infinite logits for" in err and ".png" in err and "Traceback" not in err
    assert not (tmp_path / "p" / "heedmap.db").exists()  # refused before anything was written


def test_layers_and_sidecar_commands(tmp_path: Path, small_scenes: Path, capsys: pytest.CaptureFixture[str]) -> None:
    model, _ = _model_files(tmp_path, classes=["bottle", "can", "carton"])
    out = tmp_path / "written.json"
    assert main(["sidecar", str(out), "--classes", "bottle,can,carton", "--input-size", "64", "--mean", "102,102,102", "--std", "51,51,51",
                 "--mean-std-scale", "0-255", "--model", str(model)]) == 0
    written = json.loads(out.read_text())
    assert written["target_layer"] == "features" and written["mean"] == pytest.approx([0.4] * 3) and written["mean_std_scale"] == "0-1"
    assert main(["sidecar", str(out), "--classes", "a,b", "--input-size", "64", "--model", str(model)]) == 1
    assert "exists" in capsys.readouterr().err
    assert main(["sidecar", str(out), "--classes", "a,b", "--input-size", "64", "--model", str(model), "--force"]) == 1
    assert "lists 2 classes" in capsys.readouterr().err
    image = next((small_scenes / "images" / "test").rglob("*.png"))
    assert main(["layers", str(model), "--sidecar", str(out), "--image", str(image), "--preview", str(tmp_path / "layers.png")]) == 0
    cap = capsys.readouterr()
    rows = {line.split(",")[0]: line.split(",") for line in cap.out.splitlines()[1:]}
    assert rows["features"][3:] == ["16x16", "*"] and rows["head.0"][3] == "1x1"
    from PIL import Image

    with Image.open(tmp_path / "layers.png") as sheet:
        assert sheet.width >= 160 and sheet.height >= 176
