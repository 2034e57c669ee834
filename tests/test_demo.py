"""The demo end to end at a small size: trained model, pointing game, and the injected cue found."""

from __future__ import annotations

import json
import re
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image

from analysis.evaluation import pointing_game
from analysis.images import find_images, read_rgb, to_model_input
from analysis.interventions import FILLS
from analysis.model_io import load_model
from analysis.reliance import RuleTests, judge_family
from analysis.saliency import compute_saliency
from app.cli import main
from demo_data.scenes import CUE_PARTS, PARTS, SceneConfig, generate_dataset, load_scenes, render_scene, write_without_cue


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
    # The demo ran the covering test itself: the cue's rule reads "relies on", decided by covering.
    cue = summary["cue_reliance"]
    assert cue["reliance"] == "relies on" and cue["decided_by"] == "covering (ring fill)" and cue["adjusted_p"] <= 0.05
    assert any(r["reliance"] != "not tested" for r in summary["reliance"] if r["class"] != "can")
    header = (demo_out / "rules.csv").read_text().splitlines()[0].split(",")
    assert header[:8] == ["class", "concepts", "size", "n_images", "support", "confidence", "confidence_low", "lift"]


@pytest.mark.slow
def test_questions_expectations_exports_and_report_on_the_demo(demo_out: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    project = str(demo_out / "project")
    assert main(["ask", project, "tag and not cap", "--json"]) == 0
    answer = json.loads(capsys.readouterr().out)
    assert answer["by_class"][0]["cls"] == "can" and answer["by_class"][0]["q_value"] < 0.001  # tagged images are called cans
    (tmp_path / "exp.toml").write_text('[classes.can]\nrelies_on = ["body"]\nmust_not_rely_on = ["tag"]\n[classes.carton]\nmust_not_rely_on = ["tag"]\n')
    assert main(["check", project, str(tmp_path / "exp.toml"), "--fail-on-violation"]) == 3
    out = capsys.readouterr().out
    # Reliance is decided by covering: the tag is confirmed, body is decided by its own covering test,
    # and carton (no image shows the tag) is not tested rather than judged from co-occurrence.
    assert "[violated] can must not rely on tag: can relies on tag: decided by covering" in out
    assert re.search(r"\[(met|violated|inconclusive)\] can relies on body: .*decided by covering", out)
    assert "[not tested] carton must not rely on tag" in out and "Holm correction over the" in out
    assert main(["check", project, str(tmp_path / "exp.toml"), "--json"]) == 0
    checked = json.loads(capsys.readouterr().out)
    tag = next(v for v in checked["verdicts"] if v["expectation"]["kind"] == "must_not_rely_on" and v["expectation"]["cls"] == "can")
    assert tag["decided_by"].startswith("covering") and tag["effect"] >= checked["min_effect"] and tag["adjusted_p"] <= 0.05
    assert tag["interval"][0] > 0 and tag["confirmed"] is True
    assert main(["export", project, "--what", "concepts", "--format", "json", "--out", str(tmp_path / "c.json")]) == 0
    rows = json.loads((tmp_path / "c.json").read_text())["rows"]
    assert {"concept: tag", "saliency share: tag", "correct"} <= set(rows[0])
    assert main(["report", project, "--out", str(tmp_path / "r.html")]) == 0
    html = (tmp_path / "r.html").read_text()
    assert "evidence for a human review" in html and html.count("data:image/png;base64,") > 5
    assert 'data-reliance="relies on"' in html and "Holm correction over the" in html  # the demo's own tests show


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
    a, _b = generate_dataset(tmp_path / "a", cfg), generate_dataset(tmp_path / "b", cfg)
    assert (tmp_path / "a" / "scenes.json").read_bytes() == (tmp_path / "b" / "scenes.json").read_bytes()
    assert (tmp_path / "a/images/train/can/train_00001.png").read_bytes() == (tmp_path / "b/images/train/can/train_00001.png").read_bytes()
    assert a.cue_counts["counterfactual"]["can"] == 0 and a.cue_counts["counterfactual"]["bottle"] + a.cue_counts["counterfactual"]["carton"] > 0
    scenes = load_scenes(tmp_path / "a")["scenes"]
    for _rel, sc in scenes.items():
        mask = np.asarray(Image.open(tmp_path / "a" / sc["mask"]))
        assert set(sc["parts"]) == {PARTS[i] for i in np.unique(mask)}
        assert ("tag" in sc["parts"]) == sc["cue"]


@pytest.mark.parametrize("cue", ["tag", "belt", "object", "patch"])
def test_scenes_drawn_again_without_their_cue_differ_only_on_the_cue(cue: str, tmp_path: Path) -> None:
    # The ground truth of the covering benchmark: the same scene (seed, pose, noise) without its cue.
    cfg = SceneConfig(seed=3, n_train=12, n_test=3, n_counterfactual=3, cue=cue)  # type: ignore[arg-type]
    cued = 0
    for i in range(12):
        shown, hidden = render_scene(cfg, "train", i), render_scene(cfg, "train", i, draw_cue=False)
        assert not hidden.cue and hidden.label == shown.label
        changed = (np.asarray(shown.image, dtype=int) != np.asarray(hidden.image, dtype=int)).any(axis=2)
        if not shown.cue:
            assert not changed.any()
            continue
        cued += 1
        cue_pixels = shown.mask == PARTS.index(CUE_PARTS[cue])
        assert not (changed & ~cue_pixels).any() and changed[cue_pixels].mean() > 0.8  # only the cue's own pixels changed
        assert CUE_PARTS[cue] not in hidden.parts or cue == "belt"
    assert cued >= 3
    info = generate_dataset(tmp_path, cfg)
    written = write_without_cue(tmp_path)
    assert len(written) == sum(info.cue_counts[s].get(c, 0) for s in info.cue_counts for c in info.cue_counts[s])
    assert all(w.relative_to(tmp_path).parts[0] == "images_without_cue" for w in written)


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
    # Judged with every fill as one family, nothing is confirmed: the model never learned the tag.
    covering = tuple(ablation_test(model, x, masks, can, concept="tag", fill=f, seed=0) for f in FILLS)  # type: ignore[arg-type]
    found = judge_family([RuleTests("can", f"tag ({c.fill})", (c,), insertion if c.fill == "ring" else None) for c in covering])
    assert not any(f.confirmed for f in found.values()) and found[("can", "tag (ring)")].steering != "steered"


@pytest.mark.slow
def test_covering_the_whole_belt_is_not_testable_rather_than_confirmed(control_model: tuple[object, Path]) -> None:
    # On the cue-less model the ring fill over the whole belt of each can (most of the image) once read
    # "relies on" against a true effect below zero: matched controls mean nothing when a mask covers
    # most of the image. The test refuses instead, saying how much of the image the belt covers.
    from analysis.interventions import NotTestableError, ablation_test

    model, root = control_model
    scenes = load_scenes(root)["scenes"]
    cans = [r for r in find_images(root / "manifest.csv") if r.split == "test" and r.label == "can"]
    sc = model.sidecar  # type: ignore[attr-defined]
    x = to_model_input([read_rgb(r.path) for r in cans], size=sc.input_size, mean=sc.mean, std=sc.std)
    belt = np.stack([np.asarray(Image.open(root / scenes[r.path.relative_to(root).as_posix()]["mask"])) == PARTS.index("belt") for r in cans])
    assert belt.reshape(len(belt), -1).mean() > 0.5
    with pytest.raises(NotTestableError, match="of the image"):
        ablation_test(model, x, belt, model.classes.index("can"), concept="belt", fill="ring", seed=0)  # type: ignore[arg-type, attr-defined]


def _tagged_pairs(demo_out: Path) -> tuple[object, torch.Tensor, torch.Tensor, np.ndarray]:
    """The demo model, its tagged test cans as inputs, the same scenes drawn again without the tag
    (same seed, pose and noise), and their part masks."""
    model = load_model(demo_out / "model" / "model.pt", demo_out / "model" / "model.json")
    meta = load_scenes(demo_out / "data")
    config = SceneConfig(**meta["config"])  # type: ignore[arg-type]
    shown, hidden, parts = [], [], []
    for rel, scene in meta["scenes"].items():  # type: ignore[attr-defined]
        if rel.startswith("images/test/can/") and scene["cue"]:
            index = int(Path(rel).stem.split("_")[-1])
            shown.append(render_scene(config, "test", index).image)
            hidden.append(render_scene(config, "test", index, draw_cue=False).image)
            parts.append(np.asarray(Image.open(demo_out / "data" / scene["mask"])))
    sc = model.sidecar
    x, x0 = (to_model_input(ims, size=sc.input_size, mean=sc.mean, std=sc.std) for ims in (shown, hidden))
    return model, x, x0, np.stack(parts)


def _true_effect(model: object, x: torch.Tensor, x0: torch.Tensor, cls: int) -> float:
    with torch.inference_mode():
        return float((torch.softmax(model.module(x), 1)[:, cls] - torch.softmax(model.module(x0), 1)[:, cls]).mean())  # type: ignore[attr-defined]


@pytest.mark.slow
def test_covering_estimate_is_near_the_true_effect_of_removing_the_tag(demo_out: Path) -> None:
    # Ground truth: each tagged can of the demo's test split drawn again without its tag (same seed,
    # pose and noise); the default fill's estimate should be within 25% of the true mean effect.
    from analysis.interventions import DEFAULT_FILLS, ablation_test

    model, x, x0, parts = _tagged_pairs(demo_out)
    can = model.classes.index("can")  # type: ignore[attr-defined]
    true = _true_effect(model, x, x0, can)
    est = ablation_test(model, x, parts == PARTS.index("tag"), can, concept="tag", fill=DEFAULT_FILLS[0], seed=0)  # type: ignore[arg-type]
    assert len(x) > 30 and true > 0.2
    assert abs(est.effect - true) <= 0.25 * true, (est.effect, true)


@pytest.mark.slow
def test_covering_the_regions_the_app_covers_is_near_the_true_effect(demo_out: Path) -> None:
    # The app covers saliency regions, not the cue's exact pixels: a region often holds the tag and a
    # piece of the can beside it. Regions get the parts a careful annotator names there, the app's own
    # plan chooses among them, and the default fill's estimate must stay within 25% of the truth on
    # the images it used (the same scenes drawn without the tag).
    from analysis.interventions import DEFAULT_FILLS, ablation_test, plan_regions
    from analysis.regions import extract_regions
    from demo_data.annotators import visible_parts

    model, x, x0, parts = _tagged_pairs(demo_out)
    can = model.classes.index("can")  # type: ignore[attr-defined]
    labelled = [extract_regions(m)[1] for m in compute_saliency(model, x).maps]  # type: ignore[arg-type]
    named = [[visible_parts(lab == k, parts[i]) for k in range(1, int(lab.max()) + 1)] for i, lab in enumerate(labelled)]
    plan = plan_regions(named, ["tag"])
    masks = np.stack([np.isin(lab, [k + 1 for k in chosen]) for lab, chosen in zip(labelled, plan.regions)])
    used = torch.from_numpy(masks.reshape(len(masks), -1).any(axis=1))
    true = _true_effect(model, x[used], x0[used], can)
    est = ablation_test(model, x[used], masks[used.numpy()], can, concept="tag", fill=DEFAULT_FILLS[0], seed=0)  # type: ignore[arg-type]
    assert plan.alone and int(used.sum()) > 20 and true > 0.2
    assert abs(est.effect - true) <= 0.25 * true, (est.effect, true)


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


@pytest.mark.parametrize("cue", ["tag", "belt", "object"])
def test_the_demo_expectations_read_for_every_cue(cue: str) -> None:
    from analysis.expectations import read_expectations
    from app.demo import demo_expectations
    from demo_data.scenes import CUE_CONCEPTS

    found = read_expectations(demo_expectations("can", CUE_CONCEPTS[cue]))
    assert [e.kind for e in found.items] == ["relies_on", "must_not_rely_on"]


@pytest.fixture(scope="module")
def belt_demo_out(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("belt_demo")
    # The demo's default grouped labelling: few groups may name the belt's other attribute ("grey"), and bare "belt"
    # donors can be green belts whose colour the group left out; the donor screen drops those.
    assert main(["demo", "--no-serve", "--size", "small", "--cue", "belt", "--simulate-annotators", "3", "--out", str(out)]) == 0
    return out


@pytest.mark.slow
def test_the_green_belt_is_decided_by_recolouring_near_the_true_effect(belt_demo_out: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # The green belt covers most of each image, so covering has no matched control. The demo decides it by
    # recolouring the belt to its plain look; ground truth: the same scenes drawn again with a plain belt
    # (same seed, pose and noise), on exactly the images the test used. Within 25% of the true mean fall.
    from sqlalchemy import select

    from app.db import open_project, session_factory
    from app.models import ImageRow
    from app.reliance import _inputs, _plan, cached_reliance, model_for_run
    from app.services.campaign_analysis import campaign_results

    summary = json.loads((belt_demo_out / "demo.json").read_text())
    cue = summary["cue_reliance"]
    assert cue["decided_by"] == "recolouring (to the entity's plain look)" and cue["reliance"] == "relies on", cue
    assert cue["adjusted_p"] <= 0.05 and "Holm correction" in cue["family"]
    project = belt_demo_out / "project"
    write_without_cue(belt_demo_out / "data")
    engine = open_project(project)
    factory = session_factory(engine)
    with factory() as s:
        res = campaign_results(s, summary["campaign"])
        model = model_for_run(s, res.campaign.run_id)
        _, image_ids, _ = _plan(res, model.sha256, "can", ["green belt"], 5, 200, 0)
        _, masks, _, kept = _inputs(s, project, res, model, image_ids, ["green belt"])
        paths = dict(s.execute(select(ImageRow.id, ImageRow.path).where(ImageRow.id.in_(kept))).all())
    engine.dispose()
    found = cached_reliance(project, res, "can", ["green belt"])
    assert found is not None and found.coverings[0].fill == "recolour" and found.coverings[0].n_images == len(kept) >= 10
    assert np.median(masks.reshape(len(masks), -1).mean(axis=1)) > 0.5  # covering would have had no room
    shown = [Path(paths[i]) for i in kept]
    hidden = [Path(str(p).replace(f"{Path('data') / 'images'}", f"{Path('data') / 'images_without_cue'}")) for p in shown]
    sc = model.sidecar
    x, x0 = (to_model_input([read_rgb(p) for p in ps], size=sc.input_size, mean=sc.mean, std=sc.std) for ps in (shown, hidden))
    true = _true_effect(model, x, x0, model.classes.index("can"))
    assert true > 0.2 and abs(found.coverings[0].effect - true) <= 0.25 * true, (found.coverings[0].effect, true)
    # The command says which test decided.
    assert main(["interventions", str(project), "--class", "can", "--concepts", "green belt"]) == 0
    out = capsys.readouterr().out
    assert "decided by recolouring (to the entity's plain look)" in out and "sham recolourings that keep it" in out


@pytest.mark.slow
def test_recolouring_the_green_belt_tracks_the_truth_on_the_model_that_never_saw_it(control_model: tuple[object, Path], tmp_path: Path) -> None:
    # The cue-less model never saw a green belt. Recolouring each can's belt to the plain look (donors:
    # plain belts of scenes without any cue) is set beside the truth (the same scenes with a plain belt):
    # the estimate tracks it within 25% (or 0.05 where the truth is small), and reliance is confirmed only
    # where the true fall reaches the minimum effect.
    from analysis.interventions import plain_colours, recolour_test
    from analysis.reliance import VerdictSettings

    model, _ = control_model
    sc = model.sidecar  # type: ignore[attr-defined]
    cfg = SceneConfig(seed=4, n_train=0, n_test=90, n_counterfactual=0, cue="belt", cue_class="can", cue_rate=1.0, leak_rate=0.0)
    cans = [i for i in range(90) if render_scene(cfg, "test", i).label == "can"]
    scenes = [render_scene(cfg, "test", i) for i in cans]
    x = to_model_input([s_.image for s_ in scenes], size=sc.input_size, mean=sc.mean, std=sc.std)
    x0 = to_model_input([render_scene(cfg, "test", i, draw_cue=False).image for i in cans], size=sc.input_size, mean=sc.mean, std=sc.std)
    belt = np.stack([s_.mask == PARTS.index("belt") for s_ in scenes])
    plain_scenes = [render_scene(SceneConfig(seed=5, cue="none"), "test", i) for i in range(30)]
    plain = plain_colours(to_model_input([s_.image for s_ in plain_scenes], size=sc.input_size, mean=sc.mean, std=sc.std),
                          np.stack([s_.mask == PARTS.index("belt") for s_ in plain_scenes]))
    can = model.classes.index("can")  # type: ignore[attr-defined]
    true = _true_effect(model, x, x0, can)
    found = recolour_test(model, x, belt, can, plain=plain, concept="green belt", seed=0)  # type: ignore[arg-type]
    assert abs(found.effect - true) <= max(0.05, 0.25 * abs(true)), (found.effect, true)
    verdict = judge_family([RuleTests("can", "green belt", (found,))])[("can", "green belt")]
    assert not verdict.confirmed or true >= VerdictSettings().min_effect
