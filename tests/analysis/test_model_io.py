from __future__ import annotations

import json
from pathlib import Path

import pytest
import torch
from torch import nn

from analysis.architectures import SorterCNN
from analysis.errors import ModelInputError
from analysis.images import find_images
from analysis.layer_taps import infer_token_grid
from analysis.model_io import Sidecar, load_checkpoint, load_model, prepare_model, write_sidecar
from analysis.sidecar import sidecar_from_dict

from .model_zoo import DictOutput, TinyViT

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


# --- formats, checkpoints and sidecar checks ---------------------------------------------------

FACTORY = "tests.analysis.model_zoo:residual_flatten"


def _sidecar_file(path: Path, **extra: object) -> Path:
    path.write_text(json.dumps({"classes": ["a", "b", "c"], "input_size": [32, 32], **extra}))
    return path


def test_checkpoint_shapes_load_to_the_same_model(tmp_path: Path) -> None:
    from safetensors.torch import save_file

    from .model_zoo import residual_flatten

    torch.manual_seed(1)
    state = {k: v + 0.01 for k, v in residual_flatten().state_dict().items()}
    torch.save({f"model.{k}": v for k, v in state.items()}, tmp_path / "prefixed.pt")
    torch.save({"state_dict": state}, tmp_path / "wrapped.pt")
    save_file(state, str(tmp_path / "w.safetensors"))
    sidecar = _sidecar_file(tmp_path / "s.json")
    x = torch.randn(2, 3, 32, 32)
    outs = []
    for name in ("prefixed.pt", "wrapped.pt", "w.safetensors"):
        loaded = load_model(tmp_path / name, sidecar, factory=FACTORY)
        assert loaded.kind == "factory"
        with torch.no_grad():
            outs.append(loaded.module(x))
    assert any("'model.'" in n for n in load_model(tmp_path / "prefixed.pt", sidecar, factory=FACTORY).notes)
    for out in outs[1:]:
        torch.testing.assert_close(out, outs[0])
    assert set(load_checkpoint(tmp_path / "w.safetensors")) == set(state)


def test_checkpoint_that_does_not_fit_gives_a_short_message(tmp_path: Path) -> None:
    torch.save({"module.conv.weight": torch.zeros(1), **{f"extra{i}": torch.zeros(1) for i in range(500)}}, tmp_path / "bad.pt")
    with pytest.raises(ModelInputError, match=r"missing key\(s\).*unexpected") as info:
        load_model(tmp_path / "bad.pt", _sidecar_file(tmp_path / "s.json"), factory=FACTORY)
    assert len(str(info.value)) < 600
    with pytest.raises(ModelInputError, match="package.module:function"):
        load_model(None, tmp_path / "s.json", factory="no_colon")
    with pytest.raises(ModelInputError, match="cannot import"):
        load_model(None, tmp_path / "s.json", factory="not_a_module_here:build")


def test_dict_output_needs_its_logits_key() -> None:
    with pytest.raises(ModelInputError, match=r"keys \['embedding', 'logits'\].*\"output\""):
        prepare_model(DictOutput(), sidecar_from_dict({"classes": ["a", "b", "c"], "input_size": [32, 32]}))
    loaded = prepare_model(DictOutput(), sidecar_from_dict({"classes": ["a", "b", "c"], "input_size": [32, 32], "output": "logits"}))
    assert loaded.module(torch.randn(2, 3, 32, 32)).shape == (2, 3)


def test_tokens_that_do_not_form_a_grid_are_refused_and_a_stated_grid_is_used() -> None:
    # 4 register tokens + a class token + 8x8 patches; a 3-token prefix guess cannot lay them out.
    vit = TinyViT(registers=4)
    base = {"classes": ["a", "b", "c"], "input_size": [32, 32], "target_layer": "blocks.0"}
    with pytest.raises(ModelInputError, match=r"do not form a patch grid.*token_grid"):
        prepare_model(vit, sidecar_from_dict({**base, "prefix_tokens": 3}))
    loaded = prepare_model(vit, sidecar_from_dict({**base, "token_grid": [8, 8]}))
    assert loaded.grid is not None and (loaded.grid.prefix, loaded.grid.rows, loaded.grid.cols) == (5, 8, 8)
    assert infer_token_grid(69, (32, 32)) == loaded.grid  # also inferred: 69 = 5 + 8 x 8
    assert infer_token_grid(70, (32, 32)) is None  # 70 - k is never a whole-patch grid for k <= 5


def test_sidecar_checks_scale_keys_and_policies() -> None:
    with pytest.raises(ModelInputError, match="0-255"):
        sidecar_from_dict({"classes": ["a", "b"], "input_size": [32, 32], "mean": [123.7, 116.3, 103.5], "std": [58.4, 57.1, 57.4]})
    sc = sidecar_from_dict({"classes": ["a", "b"], "input_size": 32, "mean": [127.5] * 3, "std": [255, 255, 255], "mean_std_scale": "0-255"})
    assert sc.mean == (0.5, 0.5, 0.5) and sc.std == (1.0, 1.0, 1.0) and sc.input_size == (32, 32)
    with pytest.raises(ModelInputError, match="unknown key"):
        sidecar_from_dict({"classes": ["a", "b"], "input_size": 32, "target": "x"})
    with pytest.raises(ModelInputError, match="'resize'"):
        sidecar_from_dict({"classes": ["a", "b"], "input_size": 32, "resize": "stretch"})


def test_torchscript_that_cannot_be_tapped_says_what_to_do(tmp_path: Path) -> None:
    torch.jit.script(SorterCNN(3)).save(str(tmp_path / "m.pt"))
    with pytest.raises(ModelInputError, match=r"torch\.export\.export.*--model-factory"):
        load_model(tmp_path / "m.pt", _sidecar_file(tmp_path / "s.json", target_layer="backbone.7"))


def test_device_without_cuda_is_refused(tmp_path: Path) -> None:
    if torch.cuda.is_available():
        pytest.skip("this machine has CUDA")
    torch.jit.script(SorterCNN(3)).save(str(tmp_path / "m.pt"))
    with pytest.raises(ModelInputError, match="--device cpu"):
        load_model(tmp_path / "m.pt", _sidecar_file(tmp_path / "s.json"), device="cuda")


def test_model_that_fails_on_the_input_size_is_a_clear_error() -> None:
    model = nn.Sequential(nn.Conv2d(3, 4, 3), nn.Flatten(), nn.Linear(4 * 30 * 30, 3))
    with pytest.raises(ModelInputError, match=r"3 x 64 x 64.*input_size"):
        prepare_model(model, sidecar_from_dict({"classes": ["a", "b", "c"], "input_size": [64, 64]}))
