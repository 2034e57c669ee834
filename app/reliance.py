"""Interventions on a project's images: build the inputs and masks for a rule, run ablation and
insertion, and keep the results per model version so a re-run is instant."""

from __future__ import annotations

import hashlib
import json
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import torch
from sqlalchemy import select
from sqlalchemy.orm import Session

from analysis.errors import ImageInputError
from analysis.expectations import Verdict, with_confirmation
from analysis.images import read_rgb, to_model_input
from analysis.interventions import Fill, InterventionResult, ablation_test, insertion_test
from analysis.model_io import LoadedModel, load_model
from analysis.questions import And, Concept, parse_question

from .errors import AppError
from .models import ImageRow, Prediction, RegionRow, SaliencyRun
from .layout import ProjectLayout
from .services.campaign_analysis import Results

ALPHA = 0.05


@dataclass(frozen=True)
class Reliance:
    """Ablation and insertion results for one rule (class and concept set)."""

    cls: str
    concepts: str  # "a & b", as in the rule table
    ablation: InterventionResult
    insertion: InterventionResult | None

    @property
    def confirmed(self) -> bool:
        """Either intervention moves the model beyond its matched control (p <= 0.05, interval above 0)."""
        return any(r is not None and r.p_value <= ALPHA and r.interval[0] > 0 for r in (self.ablation, self.insertion))

    def evidence(self) -> str:
        parts = [self.ablation.summary()] + ([self.insertion.summary()] if self.insertion else [])
        return "; ".join(parts)


def model_for_run(s: Session, run_id: int, model: Path | None = None, sidecar: Path | None = None) -> LoadedModel:
    """The run's model, from the paths it recorded unless others are given; checked against the run's hash."""
    run = s.get(SaliencyRun, run_id)
    if run is None:
        raise AppError(f"saliency run {run_id} does not exist.")
    model = model or (Path(run.model_path) if run.model_path else None)
    sidecar = sidecar or (Path(run.sidecar_path) if run.sidecar_path else None)
    if model is None or sidecar is None:
        raise AppError("this run did not record where its model is; give --model and --sidecar.")
    loaded = load_model(model, sidecar)
    expected = run.provenance.get("model_sha256")
    if expected and loaded.sha256 != expected:
        raise AppError(f"{model} is not the model this run was made with (its sha256 differs); give the same file, or run saliency again.")
    return loaded


def _inputs(s: Session, project: Path, res: Results, model: LoadedModel, image_ids: list[int], concepts: list[str]) -> tuple[torch.Tensor, np.ndarray]:
    """Model inputs of the images and, per image, the mask of its regions carrying any of the concepts."""
    table = res.table
    cols = [table.concepts.index(c) for c in concepts]
    carries = np.asarray(table.regions.carries[:, cols].sum(axis=1)).ravel() > 0
    row_of = {int(i): k for k, i in enumerate(table.meta.index)}
    wanted = {row_of[i] for i in image_ids}
    region_ids = [int(table.regions.ids[r]) for r in np.nonzero(carries)[0] if table.regions.region_image[r] in wanted]  # type: ignore[index]
    found = s.execute(
        select(RegionRow.id, RegionRow.rank, Prediction.image_id).join(Prediction, Prediction.id == RegionRow.prediction_id)
        .where(RegionRow.id.in_(region_ids))
    ).all()
    ranks: dict[int, list[int]] = {}
    for _, rank, image_id in found:
        ranks.setdefault(image_id, []).append(rank + 1)
    masks: dict[int, np.ndarray] = {}
    for image_id in image_ids:
        mask = np.isin(np.load(ProjectLayout(project).path(ProjectLayout.region_labels(res.campaign.run_id, image_id))), ranks.get(image_id, []))
        if mask.any():
            masks[image_id] = mask
    x, kept = _read_inputs(s, model, list(masks))
    return x, np.stack([masks[i] for i in kept]) if kept else np.zeros((0, *model.sidecar.input_size), dtype=bool)


def _plan(res: Results, model_sha: str, cls: str, concepts: list[str], fill: str, draws: int, max_images: int, seed: int) -> tuple[str, list[int], list[int]]:
    """The cache key of an intervention, the images of the rule, and the other-class images to paste into."""
    table = res.table
    rows = (table.meta["predicted_class"].astype(str) == cls) & table.presence[concepts].all(axis=1)
    image_ids = [int(i) for i in table.meta.index[rows]][:max_images]
    others = [int(i) for i in table.meta.index[table.meta["predicted_class"].astype(str) != cls]]
    targets = sorted(np.random.default_rng(seed).choice(others, size=min(max_images, len(others)), replace=False).tolist()) if others else []
    key = hashlib.sha256(json.dumps(
        {"model": model_sha, "run": res.campaign.run_id, "cls": cls, "concepts": sorted(concepts), "fill": fill, "draws": draws, "seed": seed,
         "images": image_ids, "targets": targets, "method": res.method, "version": 1}, sort_keys=True).encode()).hexdigest()[:20]
    return key, image_ids, targets


def _load(path: Path, cls: str, name: str) -> Reliance | None:
    raw = json.loads(path.read_text(encoding="utf-8"))
    if raw is None:
        return None
    return Reliance(cls, name, _result(raw["ablation"]), _result(raw["insertion"]) if raw["insertion"] else None)


def rule_reliance(s: Session, project: Path, res: Results, model: LoadedModel, cls: str, concepts: list[str], *, fill: Fill = "blur", draws: int = 5,
                  max_images: int = 200, seed: int = 0, progress: bool = False) -> Reliance | None:
    """Ablation and insertion for "concepts => cls" on the campaign's images, cached by model version.

    Returns None when fewer than two images of the class carry the concepts.
    """
    table = res.table
    missing = [c for c in concepts if c not in table.concepts]
    if missing:
        raise AppError(f"no concept {missing} in campaign {res.campaign.name!r}; its concepts include {table.concepts[:12]}.")
    if cls not in model.classes:
        raise AppError(f"the model has no class {cls!r}; its classes are {list(model.classes)}.")
    key, image_ids, targets_ids = _plan(res, model.sha256, cls, concepts, fill, draws, max_images, seed)
    cache = ProjectLayout(project).intervention_file(key)
    name = " & ".join(sorted(concepts))
    if cache.is_file():
        return _load(cache, cls, name)
    x, masks = _inputs(s, project, res, model, image_ids, concepts)
    out: Reliance | None = None
    if len(x) >= 2:
        bar = _bar(f"{cls} / {name}") if progress else None
        ablation = ablation_test(model, x, masks, model.classes.index(cls), concept=name, fill=fill, draws=draws, seed=seed, progress=bar)
        insertion = None
        if len(targets_ids) >= 2:
            tx, _ = _read_inputs(s, model, targets_ids)
            if len(tx) >= 2:
                insertion = insertion_test(model, tx, x, masks, model.classes.index(cls), concept=name, draws=draws, seed=seed, progress=bar)
        out = Reliance(cls, name, ablation, insertion)
    cache.parent.mkdir(parents=True, exist_ok=True)
    cache.write_text(json.dumps(None if out is None else {"ablation": out.ablation.to_json(), "insertion": out.insertion.to_json() if out.insertion else None}),
                     encoding="utf-8")
    return out


def _read_inputs(s: Session, model: LoadedModel, image_ids: list[int]) -> tuple[torch.Tensor, list[int]]:
    """Model inputs of the images that can be read, and their ids (unreadable ones are left out)."""
    paths = dict(s.execute(select(ImageRow.id, ImageRow.path).where(ImageRow.id.in_(image_ids))).all())
    images, kept = [], []
    for i in image_ids:
        try:
            images.append(read_rgb(Path(paths[i])))
        except (ImageInputError, KeyError):
            continue
        kept.append(i)
    sc = model.sidecar
    return (to_model_input(images, size=sc.input_size, mean=sc.mean, std=sc.std) if images else torch.zeros((0, 3, *sc.input_size))), kept


def _result(raw: dict[str, object]) -> InterventionResult:
    raw = dict(raw)
    raw["interval"] = tuple(raw["interval"])  # type: ignore[arg-type]
    return InterventionResult(**raw)  # type: ignore[arg-type]


def _bar(label: str):  # type: ignore[no-untyped-def]
    def show(done: int, total: int) -> None:
        filled = int(30 * done / max(1, total))
        sys.stderr.write(f"\r{label[:40]:<40} [{'#' * filled}{'.' * (30 - filled)}] {done}/{total}")
        if done >= total:
            sys.stderr.write("\n")
        sys.stderr.flush()

    return show


def cached_reliance(project: Path, res: Results, cls: str, concepts: list[str], *, fill: str = "blur", draws: int = 5, max_images: int = 200,
                    seed: int = 0) -> Reliance | None:
    """A stored result for the run's model and the campaign's current images, or None (pages never run the model)."""
    if any(c not in res.table.concepts for c in concepts):
        return None
    key, _, _ = _plan(res, res.model_sha256, cls, concepts, fill, draws, max_images, seed)
    path = ProjectLayout(project).intervention_file(key)
    return _load(path, cls, " & ".join(sorted(concepts))) if path.is_file() else None


def stored_for_rules(project: Path, res: Results, frame: pd.DataFrame) -> dict[tuple[str, str], Reliance]:
    """Stored intervention results for the rules of a table, keyed by (class, concepts)."""
    if not ProjectLayout(project).interventions.is_dir() or frame.empty:
        return {}
    out = {}
    for cls, concepts in zip(frame["class"], frame["concepts"]):
        found = cached_reliance(project, res, str(cls), str(concepts).split(" & "))
        if found is not None:
            out[(str(cls), str(concepts))] = found
    return out


def with_reliance(project: Path, res: Results, frame: pd.DataFrame) -> pd.DataFrame:
    """The rule table with the stored intervention figures beside each rule (NaN where none was run)."""
    return reliance_columns(frame, stored_for_rules(project, res, frame))


def reliance_columns(frame: pd.DataFrame, found: dict[tuple[str, str], Reliance]) -> pd.DataFrame:
    """The rule table with the intervention figures beside each rule that has them (NaN elsewhere)."""
    def col(f):  # type: ignore[no-untyped-def]
        return [f(found[(c, k)]) if (c, k) in found else np.nan for c, k in zip(frame["class"], frame["concepts"])]

    return frame.assign(
        ablation_effect=col(lambda r: r.ablation.effect), ablation_low=col(lambda r: r.ablation.interval[0]),
        ablation_high=col(lambda r: r.ablation.interval[1]), ablation_p=col(lambda r: r.ablation.p_value), ablation_flips=col(lambda r: r.ablation.flip_rate),
        insertion_effect=col(lambda r: r.insertion.effect if r.insertion else np.nan), insertion_p=col(lambda r: r.insertion.p_value if r.insertion else np.nan),
        confirmed=col(lambda r: r.confirmed),
    )


def concept_set(question: str) -> list[str] | None:
    """The concepts of a question that is one concept or several joined by 'and' (what an intervention can test)."""
    node = parse_question(question)
    out = []
    stack = [node]
    while stack:
        n = stack.pop()
        if isinstance(n, Concept):
            out.append(n.name)
        elif isinstance(n, And):
            stack += [n.left, n.right]
        else:
            return None
    return out


def confirm_verdicts(verdicts: list[Verdict], lookup) -> list[Verdict]:  # type: ignore[no-untyped-def]
    """Apply interventions to "must not rely on" violations: confirmed, or "co-occurs, not confirmed"."""
    out = []
    for v in verdicts:
        if v.expectation.kind != "must_not_rely_on" or v.verdict != "violated":
            out.append(v)
            continue
        concepts = concept_set(v.expectation.question)
        found = lookup(v.expectation.cls, concepts) if concepts else None
        if found is None:
            why = ("no intervention can test this expression; write one concept or concepts joined by 'and'" if not concepts
                   else "no intervention was run for it yet (heedmap interventions, or heedmap check on the project)")
            out.append(with_confirmation(v, False, why))
        else:
            out.append(with_confirmation(v, found.confirmed, found.evidence()))
    return out
