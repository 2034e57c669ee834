"""`heedmap demo`: generate scenes, train, saliency and regions, simulated labels, rules, and the
covering and pasting tests of each class's top rules and of the demo's expectations."""

from __future__ import annotations

import json
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from PIL import Image
from sqlalchemy import select
from sqlalchemy.orm import Session, sessionmaker

from analysis.evaluation import PointingGame, pointing_game
from analysis.expectations import check_expectations, read_expectations
from analysis.images import find_images
from analysis.model_io import LoadedModel, load_model
from analysis.reliance import RuleTests, VerdictSettings, judge_family
from analysis.rules import to_csv, top_rules
from demo_data.annotators import demo_crowd, simulate_label, visible_parts
from demo_data.scenes import CUE_CONCEPTS, PARTS, CueName, SceneConfig, generate_dataset, load_scenes
from demo_data.train import train_demo_model

from . import campaigns
from .db import make_engine, session_factory, write_session
from .errors import ConflictError, InvalidRequestError
from .jobs import register_images, run_saliency
from .layout import ProjectLayout
from .maps import read_region_labels, read_saliency
from .models import Campaign, CampaignRegion, ImageRow, Prediction, RegionRow
from .people import ensure_person
from .reliance import rule_reliance
from .services.campaign_analysis import Results, campaign_results


@dataclass(frozen=True)
class DemoSize:
    n_train: int
    n_test: int
    n_counterfactual: int
    epochs: int


SIZES = {"default": DemoSize(1200, 300, 300, 6), "small": DemoSize(600, 150, 150, 6)}


def region_truths(s: Session, project_dir: Path, data_root: Path, campaign: campaigns.CampaignInfo) -> Iterator[tuple[int, list[str], dict[str, Any]]]:
    """Each campaign region in id order with the parts it truly shows (from the scene's part mask) and its scene."""
    scenes = load_scenes(data_root)["scenes"]
    layout = ProjectLayout(project_dir)
    rows = s.execute(
        select(RegionRow.id, RegionRow.rank, Prediction.image_id, ImageRow.path, Prediction.map_path)
        .join(CampaignRegion, CampaignRegion.region_id == RegionRow.id)
        .join(Prediction, RegionRow.prediction_id == Prediction.id).join(ImageRow, Prediction.image_id == ImageRow.id)
        .where(CampaignRegion.campaign_id == campaign.id).order_by(RegionRow.id)
    ).all()
    for region_id, rank, _image_id, path, map_ref in rows:
        scene = scenes[Path(path).relative_to(data_root.resolve()).as_posix()]
        part_mask = np.asarray(Image.open(data_root / scene["mask"]))
        labels = read_region_labels(layout, map_ref)
        yield region_id, visible_parts(labels == rank + 1, part_mask), scene


def simulate_annotations(factory: sessionmaker[Session], project_dir: Path, data_root: Path, campaign_id: int, n_annotators: int, seed: int = 0) -> int:
    """Label every region of the campaign by ``n_annotators`` simulated people reading the part masks."""
    crowd = demo_crowd(n_annotators, seed)
    rng = np.random.default_rng(seed)
    stored = 0
    with write_session(factory) as s:
        campaign = campaigns.get_campaign(s, campaign_id)
        ids = {a.name: ensure_person(s, a.name, "annotator") for a in crowd}
        for region_id, truth, scene in region_truths(s, project_dir, data_root, campaign):
            for a in crowd:
                entities = simulate_label(a, truth, scene["parts"], rng)
                try:
                    # The same client id on a re-run makes storing idempotent.
                    stored += campaigns.save_label(s, campaign=campaign, region_id=region_id, person_id=ids[a.name], entities=entities, unsure=False,
                                                   client_id=f"sim-{campaign_id}-{region_id}-{a.name}", seconds_spent=None)
                except ConflictError:  # the region's places are taken (a re-run over an edited campaign)
                    pass
    return stored


DEMO_INSTRUCTIONS = """Name what you see inside the highlighted region of a sorter-belt photo: the object's parts
(cap, neck, label band, body, rim, pull tab, dent, gable top, spout, print) and anything else (tag, paper scrap, belt).
Add attributes after a colon, e.g. "cap: red; label band: torn, white"."""


def demo_expectations(cue_class: str, cue_concept: str | None) -> str:
    """What a team would write for the demo: the class relies on its body, and must not rely on the cue."""
    lines = ["# Verdicts are decided by covering each concept (see the README).", f"[classes.{cue_class}]", 'relies_on = ["body"]']
    if cue_concept:
        # A multi-word concept is quoted inside the question ("green belt"); a TOML literal string keeps the quotes.
        question = f'"{cue_concept}"' if " " in cue_concept else cue_concept
        lines.append(f"must_not_rely_on = ['{question}']")
    return "\n".join(lines) + "\n"


def run_demo_reliance(factory: sessionmaker[Session], project: Path, res: Results, model: LoadedModel, rules: pd.DataFrame, *, top: int = 3) -> list[dict[str, object]]:
    """Covering and pasting for the top rules of each class and the campaign's expectations (kept in the
    project, so pages and the report show them); returns the judged rules, one family."""
    todo = [(str(r["class"]), str(r["concepts"]).split(" & ")) for _, r in top_rules(rules, top).iterrows()]
    expectations = read_expectations(res.campaign.expectations) if res.campaign.expectations.strip() else None
    found: list[RuleTests] = []
    with factory() as s:
        def lookup(cls: str, concepts: list[str]) -> RuleTests | None:
            if any(c not in res.table.concepts for c in concepts) or cls not in model.classes:
                return None
            return rule_reliance(s, project, res, model, cls, concepts)

        for cls, concepts in todo:
            r = lookup(cls, concepts)
            if r is not None:
                found.append(r)
        if expectations is not None:
            for v in check_expectations(expectations, res.table):
                asked = v.expectation.concepts
                r = lookup(v.expectation.cls, asked) if asked and v.verdict != "not enough evidence" else None
                if r is not None:
                    found.append(r)
    judged = judge_family(found, expectations.settings if expectations else VerdictSettings())
    out: list[dict[str, object]] = []
    for f in judged.values():
        t = f.decided_by
        out.append({"class": f.cls, "concepts": f.concepts, "reliance": f.reliance, "steering": f.steering,
                    "decided_by": t.name if t else "none", "effect": t.effect if t else None,
                    "interval": list(t.interval) if t else None, "adjusted_p": t.adjusted_p if t else None,
                    "pasting_effect": f.pasting.effect if f.pasting else None, "family": f.family})
    return out


def names_cue(concepts: str, cue: str, family: str = "") -> bool:
    """Whether a rule names the injected cue: the cue itself, or a refinement of it on its own ("yellow tag"
    is in the family of "tag"); a rule of the cue's entity does not ("belt" does not name the green belt)."""
    return concepts == cue or (" & " not in concepts and family == cue)


def simulate_grouped(factory: sessionmaker[Session], project: Path, data_root: Path, campaign_id: int, model: LoadedModel, *, annotators: int,
                     group_size: int, seed: int) -> dict[str, int]:
    """The campaign's regions embedded with the run's model and grouped; simulated people label group by group (each from the
    crops' part masks only, never from other people's answers), then what is left one crop at a time."""
    from .demo_groups import group_campaign, simulate_group_annotations
    from .embeddings import embed_run

    with factory() as s:
        c = campaigns.get_campaign(s, campaign_id)
        grouped = campaigns.group_counts(s, campaign_id)
    embed_run(factory, project, c.run_id, model)
    groups = grouped.groups if grouped else group_campaign(factory, project, campaign_id, size=group_size, seed=seed).groups
    sim = simulate_group_annotations(factory, project, data_root, campaign_id, annotators, seed=seed)
    return {"groups": groups, "group_size": group_size, "group_judgments": sim.group_judgments, "labels_from_groups": sim.labels_from_groups,
            "single_labels": sim.single_labels, "skipped_groups": sim.skipped_groups}


def run_demo(out: Path, *, size: str = "default", cue: CueName = "tag", seed: int = 0, annotators: int = 3, min_support: float = 0.02,
             method: str = "majority", group_size: int = 0) -> dict[str, object]:
    """Run the demo headless into ``out``; returns what demo.json holds. ``method`` aggregates the labels. The simulated
    annotators label similar regions in groups of ``group_size`` (8-16; `heedmap demo` uses 12), or one region at a time with 0
    (the default here, which the benchmarks built on the demo keep)."""
    if group_size and not 8 <= group_size <= 16:
        raise InvalidRequestError(f"the group size (--group-size) must be 8-16 crops, or 0 for one region at a time; got {group_size}.")
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
    report = run_saliency(factory, project, model, model_files=(trained.model_path, trained.sidecar_path))
    timings["saliency_s"] = time.perf_counter() - t
    t = time.perf_counter()
    with write_session(factory) as s:
        found = s.scalar(select(Campaign.id).where(Campaign.name == "demo"))
        # Simulated people give each region their labels; two more places are left for real ones.
        campaign_id = found or campaigns.create_campaign(s, name="demo", run_id=report.run_id, labels_per_region=annotators + 2,
                                                          instructions=DEMO_INSTRUCTIONS, method=method)
        if not found:
            campaigns.update_campaign(s, campaign_id, expectations=demo_expectations(config.cue_class, CUE_CONCEPTS.get(cue)))
    grouping: dict[str, int] | None = None
    if annotators and group_size:
        grouping = simulate_grouped(factory, project, data_root, campaign_id, model, annotators=annotators, group_size=group_size, seed=seed)
        n_labels = grouping["labels_from_groups"] + grouping["single_labels"]
    else:
        n_labels = simulate_annotations(factory, project, data_root, campaign_id, annotators, seed) if annotators else 0
    timings["annotate_s"] = time.perf_counter() - t
    t = time.perf_counter()
    cue_info = {"class": config.cue_class, "concept": CUE_CONCEPTS[cue]} if cue != "none" else None
    summary: dict[str, object] = {
        "injected_cue": cue_info,
        "aggregation": method,
        "accuracy": {"test": trained.accuracy["test"], "counterfactual": trained.accuracy["counterfactual"], "train": trained.accuracy["train"]},
        "images_audited": report.processed + report.already_done,
        "regions": report.regions,
        "campaign": campaign_id,
        "labels": n_labels,
        "grouped_labelling": grouping,
    }
    if annotators:
        with factory() as s:
            res = campaign_results(s, campaign_id)
        rules = res.table.rules(min_support=min_support).rules
        (out / "rules.csv").write_text(to_csv(rules), encoding="utf-8")
        if cue_info:
            named = [names_cue(str(c), str(cue_info["concept"]), str(f)) for c, f in zip(rules["concepts"], rules["family"])]
            mine = rules[(rules["class"] == cue_info["class"]) & pd.Series(named, index=rules.index, dtype=bool)]
            summary["cue_rule"] = None if mine.empty else {
                "rank": int(mine["rank"].iloc[0]), "concepts": str(mine["concepts"].iloc[0]), "lift": float(mine["lift"].iloc[0]),
                "confidence": float(mine["confidence"].iloc[0]), "n_images": int(mine["n_images"].iloc[0]),
            }
    timings["rules_s"] = time.perf_counter() - t
    if annotators:
        # Covering decides reliance, so the served results, comparison and report show it from the start.
        t = time.perf_counter()
        tested = run_demo_reliance(factory, project, res, model, rules)
        summary["reliance"] = tested
        if cue_info:
            cue_found = [r for r in tested if r["class"] == cue_info["class"] and names_cue(str(r["concepts"]), str(cue_info["concept"]))]
            summary["cue_reliance"] = cue_found[0] if cue_found else None
        timings["interventions_s"] = time.perf_counter() - t
    summary["timings"] = {k: round(v, 2) for k, v in timings.items()}
    (out / "demo.json").write_text(json.dumps(summary, indent=2), encoding="utf-8")
    engine.dispose()
    return summary


def demo_pointing_game(out: Path, *, tolerance: int = 2) -> PointingGame:
    """Pointing game of the demo run's stored maps on the generated part masks (any part but the belt)."""
    data_root = out / "data"
    scenes = load_scenes(data_root)["scenes"]
    engine = make_engine(out / "project")
    with session_factory(engine)() as s:
        rows = s.execute(select(Prediction.map_path, ImageRow.path).join(ImageRow, ImageRow.id == Prediction.image_id).order_by(ImageRow.id)).all()
    engine.dispose()
    maps, masks = [], []
    for map_path, path in rows:
        scene = scenes[Path(path).relative_to(data_root.resolve()).as_posix()]
        maps.append(read_saliency(ProjectLayout(out / "project"), map_path))
        masks.append(np.asarray(Image.open(data_root / scene["mask"])) != PARTS.index("belt"))
    return pointing_game(np.stack(maps), np.stack(masks), tolerance=tolerance)
