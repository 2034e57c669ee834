"""The demo end to end at a small size: trained model, pointing game, and the injected cue found."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from analysis.images import find_images, read_rgb, to_model_input
from analysis.model_io import load_model
from analysis.evaluation import pointing_game
from analysis.saliency import compute_saliency
from app.cli import main
from demo_data.scenes import PARTS, SceneConfig, generate_dataset, load_scenes


@pytest.fixture(scope="module")
def demo_out(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("demo")
    assert main(["demo", "--no-serve", "--size", "small", "--simulate-annotators", "3", "--out", str(out)]) == 0
    return out


@pytest.mark.slow
def test_headless_demo_finds_the_injected_cue(demo_out: Path) -> None:
    summary = json.loads((demo_out / "demo.json").read_text())
    assert summary["injected_cue"] == {"class": "can", "concept": "tag"}
    assert summary["accuracy"]["test"] > 0.8
    assert summary["accuracy"]["counterfactual"] < summary["accuracy"]["test"] - 0.2  # the model learned the cue
    assert summary["cue_rule"]["rank"] <= 3 and summary["cue_rule"]["lift"] > 1.5
    header = (demo_out / "rules.csv").read_text().splitlines()[0].split(",")
    assert header[:8] == ["class", "concepts", "size", "n_images", "support", "confidence", "confidence_low", "lift"]


@pytest.mark.slow
def test_questions_expectations_exports_and_report_on_the_demo(demo_out: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    project = str(demo_out / "project")
    assert main(["ask", project, "tag and not cap", "--json"]) == 0
    answer = json.loads(capsys.readouterr().out)
    assert answer["by_class"][0]["cls"] == "can" and answer["by_class"][0]["q_value"] < 0.001  # tagged images are called cans
    (tmp_path / "exp.toml").write_text('[classes.can]\nrelies_on = ["rim"]\nmust_not_rely_on = ["tag"]\n[classes.carton]\nmust_not_rely_on = ["tag"]\n')
    assert main(["check", project, str(tmp_path / "exp.toml"), "--fail-on-violation"]) == 3
    out = capsys.readouterr().out
    assert "[violated] can must not rely on tag" in out and "[met] carton must not rely on tag" in out
    assert main(["export", project, "--what", "concepts", "--format", "json", "--out", str(tmp_path / "c.json")]) == 0
    rows = json.loads((tmp_path / "c.json").read_text())["rows"]
    assert {"concept: tag", "saliency share: tag", "correct"} <= set(rows[0])
    assert main(["report", project, "--out", str(tmp_path / "r.html")]) == 0
    html = (tmp_path / "r.html").read_text()
    assert "evidence for a human review" in html and html.count("data:image/png;base64,") > 5


@pytest.mark.slow
def test_pointing_game_beats_random_points(demo_out: Path) -> None:
    # Pointing game (Zhang et al., 2016): a hit when the map's maximum lies on the object or the cue
    # (any non-belt part), within a tolerance; compared with a uniformly random point.
    model = load_model(demo_out / "model" / "model.pt", demo_out / "model" / "model.json")
    scenes = load_scenes(demo_out / "data")["scenes"]
    records = [r for r in find_images(demo_out / "data" / "manifest.csv") if r.split == "test"]
    x = to_model_input([read_rgb(r.path) for r in records], size=(64, 64), mean=model.sidecar.mean, std=model.sidecar.std)
    maps = compute_saliency(model, x).maps
    masks = []
    for rec in records:
        rel = rec.path.relative_to(demo_out / "data").as_posix()
        masks.append(np.asarray(Image.open(demo_out / "data" / scenes[rel]["mask"])) != PARTS.index("belt"))
    game = pointing_game(maps, np.stack(masks), tolerance=2)  # 2-pixel tolerance at 64 px
    assert game.hit_rate > 0.85
    assert game.hit_rate > game.chance_rate + 0.4


def test_generator_is_deterministic_and_masks_match(tmp_path: Path) -> None:
    cfg = SceneConfig(seed=5, n_train=9, n_test=3, n_counterfactual=6)
    a, b = generate_dataset(tmp_path / "a", cfg), generate_dataset(tmp_path / "b", cfg)
    assert (tmp_path / "a" / "scenes.json").read_bytes() == (tmp_path / "b" / "scenes.json").read_bytes()
    assert (tmp_path / "a/images/train/can/train_00001.png").read_bytes() == (tmp_path / "b/images/train/can/train_00001.png").read_bytes()
    assert a.cue_counts["counterfactual"]["can"] == 0 and a.cue_counts["counterfactual"]["bottle"] + a.cue_counts["counterfactual"]["carton"] > 0
    scenes = load_scenes(tmp_path / "a")["scenes"]
    for rel, sc in scenes.items():
        mask = np.asarray(Image.open(tmp_path / "a" / sc["mask"]))
        assert set(sc["parts"]) == {PARTS[i] for i in np.unique(mask)}
        assert ("tag" in sc["parts"]) == sc["cue"]


def test_analysis_never_imports_the_web_stack() -> None:
    code = (
        "import sys, pkgutil, importlib, analysis\n"
        "for m in pkgutil.iter_modules(analysis.__path__): importlib.import_module('analysis.' + m.name)\n"
        "print(sorted(m for m in ('app','fastapi','starlette','sqlalchemy','jinja2') if m in sys.modules))"
    )
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip()
    assert out == "[]"


@pytest.fixture(scope="module")
def control_model(tmp_path_factory: pytest.TempPathFactory) -> tuple[object, Path]:
    """A model trained on the sorter data without any cue, and a test split where cans do carry the tag."""
    from demo_data.train import train_demo_model

    root = tmp_path_factory.mktemp("control")
    generate_dataset(root / "clean", SceneConfig(seed=1, n_train=600, n_test=30, n_counterfactual=3, cue="none"))
    trained = train_demo_model(root / "clean", root / "model", epochs=6, seed=1)
    generate_dataset(root / "tagged", SceneConfig(seed=2, n_train=0, n_test=150, n_counterfactual=0, cue="tag", leak_rate=0.0))
    return load_model(trained.model_path, trained.sidecar_path), root / "tagged"


def _tag_images(model: object, root: Path) -> tuple[object, np.ndarray, object]:
    """Inputs and tag masks (from the part masks) of the tagged cans, and inputs of the other classes."""
    scenes = load_scenes(root)["scenes"]
    records = [r for r in find_images(root / "manifest.csv") if r.split == "test"]
    tagged = [r for r in records if r.label == "can" and scenes[r.path.relative_to(root).as_posix()]["cue"]]
    others = [r for r in records if r.label != "can"]
    sc = model.sidecar  # type: ignore[attr-defined]
    x = to_model_input([read_rgb(r.path) for r in tagged], size=sc.input_size, mean=sc.mean, std=sc.std)
    masks = np.stack([np.asarray(Image.open(root / scenes[r.path.relative_to(root).as_posix()]["mask"])) == PARTS.index("tag") for r in tagged])
    targets = to_model_input([read_rgb(r.path) for r in others], size=sc.input_size, mean=sc.mean, std=sc.std)
    return x, masks, targets


@pytest.mark.slow
def test_interventions_confirm_the_injected_cue(demo_out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["interventions", str(demo_out / "project"), "--class", "can", "--concepts", "tag", "--json"]) == 0
    (found,) = json.loads(capsys.readouterr().out)
    ablation, insertion = found["ablation"], found["insertion"]
    # Covering the tag drops P(can) far more than covering matched random patches of the same shape.
    assert ablation["mean_change"] > 0.25 and ablation["control_mean_change"] < 0.05 and ablation["p_value"] < 0.01
    assert ablation["interval"][0] > 0.15 and ablation["flip_rate"] > 0.3
    # Pasting the tag into bottles and cartons moves them toward "can".
    assert insertion["effect"] > 0.1 and insertion["p_value"] < 0.01 and found["confirmed"]
    # A second run reads the stored result instead of running the model again.
    assert main(["interventions", str(demo_out / "project"), "--class", "can", "--concepts", "tag", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)[0]["ablation"] == ablation


@pytest.mark.slow
def test_interventions_find_nothing_where_the_model_never_learned_the_cue(control_model: tuple[object, Path]) -> None:
    from analysis.interventions import ablation_test, insertion_test

    model, root = control_model
    x, masks, targets = _tag_images(model, root)
    can = model.classes.index("can")  # type: ignore[attr-defined]
    ablation = ablation_test(model, x, masks, can, concept="tag", seed=0)  # type: ignore[arg-type]
    insertion = insertion_test(model, targets, x, masks, can, concept="tag", seed=0)  # type: ignore[arg-type]
    assert ablation.p_value > 0.01 or ablation.interval[0] <= 0
    assert insertion.p_value > 0.01 or insertion.interval[0] <= 0
    assert abs(ablation.effect) < 0.05 and abs(insertion.effect) < 0.05


@pytest.mark.slow
def test_deletion_curve_falls_faster_in_saliency_order(demo_out: Path) -> None:
    # Petsiuk et al. (2018), deletion metric: removing the most salient pixels first lowers the
    # predicted class's probability faster than removing random pixels.
    from analysis.interventions import deletion_curve

    model = load_model(demo_out / "model" / "model.pt", demo_out / "model" / "model.json")
    records = [r for r in find_images(demo_out / "data" / "manifest.csv") if r.split == "test"][:60]
    x = to_model_input([read_rgb(r.path) for r in records], size=(64, 64), mean=model.sidecar.mean, std=model.sidecar.std)
    sal = compute_saliency(model, x)
    by_map = deletion_curve(model, x, sal.maps, sal.predicted, steps=10)
    by_chance = deletion_curve(model, x, sal.maps, sal.predicted, steps=10, order="random")
    assert np.trapezoid(by_map) < np.trapezoid(by_chance) - 0.5
