"""`heedmap demo`: generate scenes, train, saliency and regions, simulated labels, rules."""

from __future__ import annotations

import json
import time
import uuid
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image
from sqlalchemy import select

from analysis.images import find_images
from analysis.model_io import load_model
from analysis.rules import to_csv
from demo_data.annotators import demo_crowd, simulate_label, visible_parts
from demo_data.scenes import CUE_CONCEPTS, CueName, SceneConfig, generate_dataset, load_scenes
from demo_data.train import train_demo_model

from . import store
from .db import make_engine, session_factory, write_session
from .errors import ConflictError
from .jobs import register_images, run_saliency
from .models import ImageRow, Prediction, RegionRow


@dataclass(frozen=True)
class DemoSize:
    n_train: int
    n_test: int
    n_counterfactual: int
    epochs: int


SIZES = {"default": DemoSize(1200, 300, 300, 6), "small": DemoSize(600, 150, 150, 6)}


def simulate_annotations(factory, project_dir: Path, data_root: Path, run_id: int, n_annotators: int, seed: int = 0) -> int:  # type: ignore[no-untyped-def]
    """Label every region of the run by ``n_annotators`` simulated people reading the part masks."""
    scenes = load_scenes(data_root)["scenes"]
    crowd = demo_crowd(n_annotators, seed)
    rng = np.random.default_rng(seed)
    stored = 0
    with write_session(factory) as s:
        ids = {a.name: store.annotator_id(s, a.name) for a in crowd}
        rows = s.execute(
            select(RegionRow.id, RegionRow.rank, Prediction.image_id, ImageRow.path)
            .join(Prediction, RegionRow.prediction_id == Prediction.id).join(ImageRow, Prediction.image_id == ImageRow.id)
            .where(Prediction.run_id == run_id).order_by(RegionRow.id)
        ).all()
        for region_id, rank, image_id, path in rows:
            rel = Path(path).relative_to(data_root.resolve()).as_posix()
            scene = scenes[rel]  # type: ignore[index]
            part_mask = np.asarray(Image.open(data_root / scene["mask"]))
            labels = np.load(project_dir / f"runs/{run_id}/maps/{image_id}_regions.npy")
            truth = visible_parts(labels == rank + 1, part_mask)
            for a in crowd:
                entities = simulate_label(a, truth, scene["parts"], rng)
                try:
                    store.save_annotation(s, region_id=region_id, annotator=ids[a.name], entities=entities, client_id=f"sim-{uuid.uuid4().hex}", seconds_spent=None)
                    stored += 1
                except ConflictError:  # this simulated person labelled the region in an earlier demo run
                    pass
    return stored


def run_demo(out: Path, *, size: str = "default", cue: CueName = "tag", seed: int = 0, annotators: int = 3, min_support: float = 0.02) -> dict[str, object]:
    """Run the demo headless into ``out``; returns what demo.json holds."""
    timings: dict[str, float] = {}
    t = time.perf_counter()
    sz = SIZES[size]
    data_root = out / "data"
    project = out / "project"
    config = SceneConfig(seed=seed, n_train=sz.n_train, n_test=sz.n_test, n_counterfactual=sz.n_counterfactual, cue=cue)
    generate_dataset(data_root, config)
    timings["generate_s"] = time.perf_counter() - t
    t = time.perf_counter()
    trained = train_demo_model(data_root, out / "model", epochs=sz.epochs, seed=seed)
    timings["train_s"] = time.perf_counter() - t
    t = time.perf_counter()
    engine = make_engine(project)
    factory = session_factory(engine)
    audit = [r for r in find_images(data_root / "manifest.csv") if r.split != "train"]
    register_images(factory, audit)
    model = load_model(trained.model_path, trained.sidecar_path)
    report = run_saliency(factory, project, model)
    timings["saliency_s"] = time.perf_counter() - t
    t = time.perf_counter()
    n_labels = simulate_annotations(factory, project, data_root, report.run_id, annotators, seed) if annotators else 0
    timings["annotate_s"] = time.perf_counter() - t
    t = time.perf_counter()
    cue_info = {"class": config.cue_class, "concept": CUE_CONCEPTS[cue]} if cue != "none" else None
    summary: dict[str, object] = {
        "injected_cue": cue_info,
        "accuracy": {"test": trained.accuracy["test"], "counterfactual": trained.accuracy["counterfactual"], "train": trained.accuracy["train"]},
        "images_audited": report.processed + report.already_done,
        "regions": report.regions,
        "labels": n_labels,
    }
    if annotators:
        with factory() as s:
            res = store.compute_results(s, report.run_id, min_support=min_support)
        rules = res.rules.rules
        (out / "rules.csv").write_text(to_csv(rules), encoding="utf-8")
        if cue_info:
            mine = rules[(rules["class"] == cue_info["class"]) & (rules["concepts"] == cue_info["concept"])]
            summary["cue_rule"] = None if mine.empty else {"rank": int(mine["rank"].iloc[0]), "lift": float(mine["lift"].iloc[0]), "confidence": float(mine["confidence"].iloc[0]), "n_images": int(mine["n_images"].iloc[0])}
    timings["rules_s"] = time.perf_counter() - t
    summary["timings"] = {k: round(v, 2) for k, v in timings.items()}
    (out / "demo.json").write_text(json.dumps(summary, indent=2), encoding="utf-8")
    engine.dispose()
    return summary
