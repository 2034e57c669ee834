from __future__ import annotations

import json
from pathlib import Path

import pytest
import torch

from analysis.architectures import SorterCNN
from analysis.errors import ModelInputError
from analysis.images import find_images
from analysis.model_io import Sidecar, load_model, write_sidecar

SC = Sidecar(classes=("bottle", "can", "carton"), input_size=(32, 32), mean=(0.5, 0.5, 0.5), std=(0.2, 0.2, 0.2), target_layer="features", stages=("features", "head"), architecture="sorter_cnn")


def test_torchscript_and_state_dict_load_to_the_same_outputs(tmp_path: Path) -> None:
    torch.manual_seed(0)
    m = SorterCNN(3).eval()
    torch.jit.script(m).save(str(tmp_path / "m.pt"))
    torch.save(m.state_dict(), tmp_path / "s.pt")
    write_sidecar(SC, tmp_path / "m.json")
    a, b = load_model(tmp_path / "m.pt", tmp_path / "m.json"), load_model(tmp_path / "s.pt", tmp_path / "m.json")
    assert (a.kind, b.kind) == ("torchscript", "state_dict") and len(a.sha256) == 64
    x = torch.randn(2, 3, 32, 32)
    with torch.no_grad():
        torch.testing.assert_close(a.module(x), b.module(x))


def test_bad_sidecars_and_weights(tmp_path: Path) -> None:
    torch.save(SorterCNN(4).state_dict(), tmp_path / "s.pt")
    write_sidecar(SC, tmp_path / "m.json")
    with pytest.raises(ModelInputError, match="do not fit"):
        load_model(tmp_path / "s.pt", tmp_path / "m.json")
    (tmp_path / "bad.json").write_text(json.dumps({**SC.to_json(), "architecture": "nope"}))
    with pytest.raises(ModelInputError, match="not known"):
        load_model(tmp_path / "s.pt", tmp_path / "bad.json")
    (tmp_path / "bad2.json").write_text(json.dumps({"classes": ["a"]}))
    with pytest.raises(ModelInputError, match="lacks"):
        load_model(tmp_path / "s.pt", tmp_path / "bad2.json")


def test_image_sources(tmp_path: Path) -> None:
    (tmp_path / "can").mkdir()
    (tmp_path / "can" / "x.png").write_bytes(b"")
    assert [r.label for r in find_images(tmp_path)] == ["can"]
    (tmp_path / "m.csv").write_text("path,label\ncan/x.png,can\n")
    assert find_images(tmp_path / "m.csv")[0].path == tmp_path / "can" / "x.png"
    (tmp_path / "bad.csv").write_text("file,class\n")
    with pytest.raises(ValueError, match="path,label"):
        find_images(tmp_path / "bad.csv")
