"""Interventions on a project's images: build the inputs and masks for a rule, run covering (with
each fill of the policy) and pasting, keep each result per model version so a re-run is instant,
and judge every test behind one page, report or check as one family (analysis.reliance)."""

from __future__ import annotations

import hashlib
import json
import sys
import weakref
from collections.abc import Callable, Sequence
from dataclasses import replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import torch
from sqlalchemy import select
from sqlalchemy.orm import Session

from analysis.concept_table import ConceptTable
from analysis.errors import ImageInputError, InvalidInputError
from analysis.expectations import Verdict, decide_expectations, read_expectations
from analysis.images import read_rgb, to_model_input
from analysis.interventions import (
    DEFAULT_FILLS,
    RECOLOUR,
    CoverPlan,
    Fill,
    InterventionResult,
    NotTestableError,
    ablation_test,
    insertion_test,
    pixel_spread,
    plain_colours,
    plan_regions,
    plan_removal,
    recolour_test,
    unlike_attribute,
)
from analysis.model_io import LoadedModel, load_model
from analysis.reliance import RelianceFinding, RuleTests, VerdictSettings, concepts_key, judge_family

from .errors import AppError
from .layout import ProjectLayout
from .maps import region_labels_for
from .models import ImageRow, Prediction, RegionRow, SaliencyRun
from .services.campaign_analysis import Results

Lookup = Callable[[str, list[str]], RuleTests | None]


def model_for_run(s: Session, run_id: int, model: Path | None = None, sidecar: Path | None = None) -> LoadedModel:
    """The run's model, from what it recorded (model file or checkpoint, sidecar, and for a factory
    model the function that builds it) unless other files are given; checked against the run's hash."""
    run = s.get(SaliencyRun, run_id)
    if run is None:
        raise AppError(f"saliency run {run_id} does not exist.")
    provenance = run.provenance or {}
    factory = provenance.get("model_factory")
    folder = provenance.get("model_factory_folder")
    model = model or (Path(run.model_path) if run.model_path else None)
    sidecar = sidecar or (Path(run.sidecar_path) if run.sidecar_path else None)
    if sidecar is None or (model is None and not factory):
        raise AppError("this run did not record where its model is; give --model and --sidecar.")
    loaded = load_model(model, sidecar, factory=str(factory) if factory else None, folder=str(folder) if folder else None)
    expected = provenance.get("model_sha256")
    if expected and loaded.sha256 != expected:
        what = f"{model}" if model is not None else f"the model built by {factory}"
        raise AppError(f"{what} is not the model this run was made with (its sha256 differs); give the same file, or run saliency again.")
    return loaded


def _inputs(s: Session, project: Path, res: Results, model: LoadedModel, image_ids: list[int],
            concepts: list[str]) -> tuple[torch.Tensor, np.ndarray, CoverPlan, list[int]]:
    """Model inputs of the images and, per image, the mask of the regions to cover for the concepts
    (:func:`analysis.interventions.plan_regions`: the regions showing them alone when enough images
    have one, else every region carrying any of them), the plan that chose them, and the ids of the images
    in the order of the inputs (those with a region to cover that could be read)."""
    table = res.table
    cols = [table.concepts.index(c) for c in concepts]
    carries = table.regions.carries.tocsr()
    on = np.asarray(carries[:, cols].sum(axis=1)).ravel() > 0
    row_of = {int(i): k for k, i in enumerate(table.meta.index)}
    image_of_row = {k: i for i, k in row_of.items()}
    wanted = {row_of[i] for i in image_ids}
    ids = table.regions.ids
    if ids is None:  # a table made without region ids has nothing to cover
        return torch.zeros((0, 3, *model.sidecar.input_size)), np.zeros((0, *model.sidecar.input_size), dtype=bool), CoverPlan((), False), []
    candidates = [r for r in np.nonzero(on)[0] if int(table.regions.region_image[r]) in wanted]
    region_ids = [int(ids[r]) for r in candidates]
    found = s.execute(
        select(RegionRow.id, RegionRow.rank, Prediction.image_id).join(Prediction, Prediction.id == RegionRow.prediction_id)
        .where(RegionRow.id.in_(region_ids))
    ).all()
    rank_of = {int(rid): int(rank) + 1 for rid, rank, _ in found}
    per_image: dict[int, list[tuple[int, frozenset[str]]]] = {i: [] for i in image_ids}
    for r in candidates:
        rid = int(ids[r])
        if rid in rank_of:
            shown = frozenset(table.concepts[c] for c in carries[r].indices)
            per_image[image_of_row[int(table.regions.region_image[r])]].append((rank_of[rid], shown))
    plan = plan_regions([[c for _, c in per_image[i]] for i in image_ids], concepts, families=table.families)
    masks: dict[int, np.ndarray] = {}
    labels = region_labels_for(s, ProjectLayout(project), res.campaign.run_id, [i for i, chosen in zip(image_ids, plan.regions) if chosen])
    for image_id, chosen in zip(image_ids, plan.regions):
        if not chosen or image_id not in labels:
            continue
        ranks = [per_image[image_id][k][0] for k in chosen]
        mask = np.isin(labels[image_id], ranks)
        if mask.any():
            masks[image_id] = mask
    x, kept = _read_inputs(s, model, list(masks))
    return x, (np.stack([masks[i] for i in kept]) if kept else np.zeros((0, *model.sidecar.input_size), dtype=bool)), plan, kept


MAX_PLAIN_IMAGES = 200


def _plain_look(s: Session, project: Path, res: Results, model: LoadedModel, concept: str, tested: torch.Tensor,
                within: torch.Tensor) -> tuple[torch.Tensor | None, str]:
    """The plain look of the entity that ``concept`` refines ("belt" for "green belt"), one colour per image
    (up to MAX_PLAIN_IMAGES images, any class), and where it came from; or (None, why it cannot be found).

    The donors are regions that show the entity and nothing else, in images that do not show ``concept``
    anywhere (an image has one belt: its other regions show the same green belt). Regions carrying another
    attribute of the entity ("grey belt") are positive evidence that the attribute is absent and are used
    when at least two images have one; otherwise regions of the bare entity are used. Those can still
    hold the attribute where people named the entity but left the attribute out (a group labelled "belt"
    over green belts): every donor whose colour lies within the spread of ``tested`` (N x 3, each tested
    image's mean colour under its masks; ``within``: the spread of the tested pixels) is dropped
    (:func:`analysis.interventions.unlike_attribute`), whichever way it was labelled."""
    table = res.table
    entity = table.families.get(concept)
    if entity is None or entity not in table.concepts:
        return None, (f"recolouring needs an attribute of an entity (such as 'green belt' of 'belt'), and {concept!r} is not "
                      f"labelled as one (label it as '<entity>: <attribute>')")
    ids = table.regions.ids
    if ids is None:
        return None, "the concept table has no region ids"
    siblings = sorted(r for r, e in table.families.items() if e == entity and r != concept and r in table.concepts)
    kin = {entity, *siblings}
    carries = table.regions.carries.tocsc()

    def shows(names: list[str]) -> np.ndarray:
        return np.asarray(carries[:, [table.concepts.index(c) for c in names]].sum(axis=1)).ravel() > 0 if names else np.zeros(carries.shape[0], dtype=bool)

    image_shows_concept = table.presence[concept].to_numpy(dtype=bool)[table.regions.region_image]
    plain = shows([entity]) & ~shows([concept]) & ~shows([c for c in table.concepts if c not in kin]) & ~image_shows_concept
    image_ids = [int(i) for i in table.meta.index]

    def donors(rows: np.ndarray) -> dict[int, list[int]]:
        per_image: dict[int, list[int]] = {}
        for r in np.nonzero(rows)[0]:
            image = image_ids[int(table.regions.region_image[r])]
            if image in per_image or len(per_image) < MAX_PLAIN_IMAGES:
                per_image.setdefault(image, []).append(int(ids[r]))
        return per_image

    def colours(per_image: dict[int, list[int]]) -> torch.Tensor:
        """Each donor image's mean colour under its donor regions (K x 3; none when fewer than two can be read)."""
        wanted = [r for rs in per_image.values() for r in rs]
        rank_of = {int(rid): int(rank) + 1 for rid, rank in s.execute(select(RegionRow.id, RegionRow.rank).where(RegionRow.id.in_(wanted))).all()}
        labels = region_labels_for(s, ProjectLayout(project), res.campaign.run_id, list(per_image))
        x, kept = _read_inputs(s, model, [i for i in per_image if i in labels])
        masks = [np.isin(labels[i], [rank_of[r] for r in per_image[i] if r in rank_of]) for i in kept]
        keep = [k for k, m in enumerate(masks) if m.any()]
        if len(keep) < 2:
            return torch.zeros((0, 3))
        return plain_colours(x[keep], np.stack([masks[k] for k in keep]))

    found, source, dropped = torch.zeros((0, 3)), "", 0
    for rows, where in ((plain & shows(siblings), f"regions labelled {' or '.join(repr(c) for c in siblings)}"),
                        (plain, f"regions labelled {entity!r} alone in images without {concept!r}")):
        per_image = donors(rows) if rows.any() else {}
        candidates = colours(per_image) if len(per_image) >= 2 else torch.zeros((0, 3))
        unlike = unlike_attribute(candidates, tested, within=within) if len(candidates) else np.zeros(0, dtype=bool)
        if int(unlike.sum()) >= 2:
            found, source, dropped = candidates[torch.from_numpy(unlike)], where, int((~unlike).sum())
            break
        dropped = max(dropped, int((~unlike).sum()))
    if len(found) < 2:
        colour_note = (f"; {dropped} had the colour of the tested {concept!r} regions (within their spread, or nearer it than the "
                       f"other donors' colour), so they cannot stand for {entity!r} without it (label some with their other attribute, "
                       f"e.g. '{entity}: <colour>')") if dropped else ""
        return None, (f"recolouring needs regions labelled {entity!r} (or another attribute of it) without {concept!r} and without "
                      f"anything else, in at least two images that do not show {concept!r} (the entity's plain look){colour_note}")
    left = f", {dropped} left out: they had the tested regions' colour" if dropped else ""
    return found, f"plain look from {source}, {len(found)} images{left}"


def _plan(res: Results, model_sha: str, cls: str, concepts: list[str], draws: int, max_images: int, seed: int) -> tuple[str, list[int], list[int]]:
    """The cache key of a rule's interventions (a fill is added per test), the images of the rule,
    and the other-class images to paste into."""
    table = res.table
    facts = _region_facts(table)
    of_class = facts.predicted == cls
    rows = of_class & table.presence[concepts].to_numpy(dtype=bool).all(axis=1)
    image_ids = facts.image_ids[rows][:max_images].tolist()
    others = facts.image_ids[~of_class]
    targets = sorted(np.random.default_rng(seed).choice(others, size=min(max_images, len(others)), replace=False).tolist()) if len(others) else []
    key = hashlib.sha256(json.dumps(
        {"model": model_sha, "run": res.campaign.run_id, "cls": cls, "concepts": sorted(concepts), "draws": draws, "seed": seed,
         "images": image_ids, "targets": targets, "method": res.method, "evidence": _evidence(res, image_ids, concepts),
         "version": 6}, sort_keys=True).encode()).hexdigest()[:20]
    return key, image_ids, targets


def _evidence(res: Results, image_ids: list[int], concepts: list[str]) -> str:
    """A fingerprint of every region fact that decides what the tests cover: the regions of the rule's images
    carrying its concepts, with all they show (which decides "alone", :func:`_inputs`), and, for a concept refining
    an entity, every region showing that entity with all it shows and whether its image shows the concept (which
    decides the plain look's donors, :func:`_plain_look`). New labels that change none of these keep stored results;
    any that do run the tests again.

    What each region shows is digested once per concept table (:func:`_region_facts`: tables are made once per
    labels version) and each concept's donor facts once per table, so the stored-verdict reads behind a results
    page do array work per rule instead of walking every region of an entity in Python."""
    facts = _region_facts(res.table)
    if not facts.has_regions:
        return ""
    table = res.table
    digest = hashlib.sha256()
    cols = [facts.column[c] for c in concepts if c in facts.column]
    if cols:
        on = np.asarray(facts.carries[:, cols].sum(axis=1)).ravel() > 0
        rows = np.nonzero(on & np.isin(facts.image, np.asarray(image_ids, dtype=np.int64)))[0]
        for part in (facts.ids[rows], facts.image[rows], facts.digest[rows]):
            digest.update(np.ascontiguousarray(part).tobytes())
    for concept in concepts:
        entity = table.families.get(concept)
        if entity is not None and entity in facts.column and concept in facts.column:
            digest.update(concept.encode() + b"\0" + facts.donors(table, concept, entity))
    return digest.hexdigest()


class _RegionFacts:
    """A concept table's facts that the storage keys read, as arrays: each row's image id and predicted class, and
    what every region shows: region ids, image ids, and a digest of the set of concept names each region carries
    (two 64-bit lanes, each a sum of per-name keys taken from sha256 of the name, so it does not depend on the
    table's column order); plus each refinement's donor facts, made on first use. ``has_regions`` is False for a
    table made without region ids."""

    def __init__(self, table: ConceptTable) -> None:
        self.image_ids = np.asarray(table.meta.index, dtype=np.int64)
        self.predicted = table.meta["predicted_class"].astype(str).to_numpy()
        self.has_regions = table.regions.ids is not None
        self.ids = np.asarray(table.regions.ids if table.regions.ids is not None else np.zeros(len(table.regions.region_image)), dtype=np.int64)
        self.image = np.asarray(table.meta.index, dtype=np.int64)[table.regions.region_image]
        self.column = {c: k for k, c in enumerate(table.concepts)}
        self.carries = table.regions.carries.tocsc()
        csr = table.regions.carries.tocsr()
        keys = np.array([np.frombuffer(hashlib.sha256(c.encode()).digest()[:16], dtype="<u8") for c in table.concepts],
                        dtype=np.uint64).reshape(-1, 2)
        lanes = np.zeros((csr.shape[0], 2), dtype=np.uint64)
        counts = np.diff(csr.indptr)
        if csr.nnz:
            rows = np.repeat(np.arange(csr.shape[0]), counts)
            for lane in range(2):
                np.add.at(lanes[:, lane], rows, keys[csr.indices, lane])  # wraps modulo 2**64
        self.digest = np.column_stack([lanes, counts.astype(np.uint64)])
        self._donors: dict[str, bytes] = {}

    def donors(self, table: ConceptTable, concept: str, entity: str) -> bytes:
        found = self._donors.get(concept)
        if found is None:
            found = self._donors[concept] = self._donor_digest(table, concept, entity)
        return found

    def _donor_digest(self, table: ConceptTable, concept: str, entity: str) -> bytes:
        rows = np.nonzero(np.asarray(self.carries[:, self.column[entity]].todense()).ravel() > 0)[0]
        shows = table.presence[concept].to_numpy(dtype=bool)[table.regions.region_image][rows]
        h = hashlib.sha256()
        for part in (self.ids[rows], self.image[rows], shows, self.digest[rows]):
            h.update(np.ascontiguousarray(part).tobytes())
        return h.digest()


_FACTS: dict[int, _RegionFacts] = {}


def _region_facts(table: ConceptTable) -> _RegionFacts:
    """The table's facts, made once per table object (kept while it lives)."""
    found = _FACTS.get(id(table))
    if found is None:
        found = _FACTS[id(table)] = _RegionFacts(table)
        weakref.finalize(table, _FACTS.pop, id(table), None)
    return found


def _read_cached(path: Path) -> tuple[bool, InterventionResult | None]:
    """(found, result): a stored test, or a stored "could not run" (None); (False, None) when absent or unreadable."""
    if not path.is_file():
        return False, None
    try:
        raw = json.loads(path.read_text(encoding="utf-8"))
        return True, (None if raw is None or "not_testable" in raw else _result(raw))
    except (OSError, ValueError, TypeError, KeyError):
        return False, None  # a damaged cache file is run again


def _write_cached(path: Path, result: InterventionResult | None, *, reason: str = "") -> None:
    """Store a result, or None for "could not run" (with the reason when there is one)."""
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_suffix(".tmp")
    stored: object = result.to_json() if result is not None else ({"not_testable": reason} if reason else None)
    tmp.write_text(json.dumps(stored), encoding="utf-8")
    tmp.replace(path)  # never a half-written file under the real name


def _cache_path(project: Path, key: str, test: str) -> Path:
    return ProjectLayout(project).intervention_file(f"{key}-{test}")


def rule_reliance(s: Session, project: Path, res: Results, model: LoadedModel, cls: str, concepts: list[str], *,
                  fills: Sequence[Fill] = DEFAULT_FILLS, draws: int = 5, max_images: int = 200, seed: int = 0, progress: bool = False) -> RuleTests | None:
    """Covering (one test per fill) and pasting for "concepts => cls" on the campaign's images, each
    kept per model version.

    Returns None when fewer than two images of the class carry the concepts with a region to cover.
    """
    table = res.table
    missing = [c for c in concepts if c not in table.concepts]
    if missing:
        raise AppError(f"no concept {missing} in campaign {res.campaign.name!r}; its concepts include {table.concepts[:12]}.")
    if cls not in model.classes:
        raise AppError(f"the model has no class {cls!r}; its classes are {list(model.classes)}.")
    if not fills:
        raise AppError("give at least one fill for the covering test.")
    key, image_ids, targets_ids = _plan(res, model.sha256, cls, concepts, draws, max_images, seed)
    name = concepts_key(concepts)
    stored = {f: _read_cached(_cache_path(project, key, f)) for f in (*fills, "paste")}
    if all(found for found, _ in stored.values()):
        coverings = _stored_coverings(project, key, [r for _, r in (stored[f] for f in fills)])
        return RuleTests(cls, name, coverings, stored["paste"][1]) if coverings else None
    x, masks, plan, _ = _inputs(s, project, res, model, image_ids, concepts)
    if len(x) < 2:
        for f in (*fills, "paste"):
            _write_cached(_cache_path(project, key, f), None)
        return None
    index = model.classes.index(cls)
    label = f"{name} ({plan.note})" if plan.note else name
    # The default policy (analysis.interventions.plan_removal, decided from the masks before any result is seen):
    # an attribute of an entity whose masks, grown by colour, cover most of each image is recoloured to the
    # entity's plain look; anything else is covered.
    removal = plan_removal(x, masks, concepts, families=res.table.families)
    plain_note = removal.why_not_recolour
    if removal.test == "recolour":
        plain, plain_note = _plain_look(s, project, res, model, concepts[0], plain_colours(x, removal.masks), pixel_spread(x, removal.masks))
        if plain is not None:
            masks = removal.masks
            bar = _bar(f"{cls} / {name} (recolour)") if progress else None
            recoloured = replace(recolour_test(model, x, masks, index, plain=plain, concept=f"{label} ({plain_note})", draws=draws, seed=seed, progress=bar),
                                 shared=not plan.alone)
            _write_cached(_cache_path(project, key, RECOLOUR), recoloured)
            share = float(np.median(masks.reshape(len(masks), -1).mean(axis=1)))
            for f in fills:
                _write_cached(_cache_path(project, key, f), None, reason=f"covering: the regions cover {share:.0%} of the image; decided by recolouring")
            _write_cached(_cache_path(project, key, "paste"), None)
            return RuleTests(cls, name, (recoloured,), None)
        # No plain look: covering the salient pieces of an attribute that spans the entity leaves the rest of it in
        # place (0.00x the true effect on the green belt, benchmarks/intervention_truth.py), so it would read "no
        # reliance" for a cue the model needs. Not tested, with the reason.
        reason = f"the attribute spans most of each image, so covering its pieces would not remove it; recolouring cannot run: {plain_note}."
        for g in (*fills, "paste"):
            _write_cached(_cache_path(project, key, g), None, reason=reason)
        if progress:
            sys.stderr.write(f"{cls} / {name}: not tested: {reason}\n")
        return None
    coverings_run = []
    for f in fills:
        found, result = stored[f]
        if not found or result is None:
            bar = _bar(f"{cls} / {name} ({f})") if progress else None
            try:
                result = replace(ablation_test(model, x, masks, index, concept=label, fill=f, draws=draws, seed=seed, progress=bar), shared=not plan.alone)
            except NotTestableError as e:
                # Not testable by covering (the regions cover most of each image): stored as such, read as "not tested".
                reason = f"{e} Recolouring cannot stand in: {plain_note}." if plain_note else str(e)
                for g in (*fills, "paste"):
                    _write_cached(_cache_path(project, key, g), None, reason=reason)
                if progress:
                    sys.stderr.write(f"{cls} / {name}: {reason}\n")
                return None
            _write_cached(_cache_path(project, key, f), result)
        coverings_run.append(result)
    found, pasting = stored["paste"]
    if not found:
        pasting = None
        if len(targets_ids) >= 2:
            tx, _ = _read_inputs(s, model, targets_ids)
            if len(tx) >= 2:
                bar = _bar(f"{cls} / {name} (paste)") if progress else None
                try:
                    pasting = replace(insertion_test(model, tx, x, masks, index, concept=label, draws=draws, seed=seed, progress=bar), shared=not plan.alone)
                except NotTestableError:
                    pasting = None
        _write_cached(_cache_path(project, key, "paste"), pasting)
    return RuleTests(cls, name, tuple(coverings_run), pasting)


def untested_reason(project: Path, res: Results, model_sha: str, cls: str, concepts: list[str], *, fills: Sequence[str] = DEFAULT_FILLS,
                    draws: int = 5, max_images: int = 200, seed: int = 0) -> str:
    """Why a rule's covering test did not run, as stored ("not testable: ..."), or "" when no reason was stored."""
    key, _, _ = _plan(res, model_sha, cls, concepts, draws, max_images, seed)
    path = _cache_path(project, key, fills[0]) if fills else None
    try:
        raw = json.loads(path.read_text(encoding="utf-8")) if path is not None and path.is_file() else None
    except (OSError, ValueError):
        return ""
    return str(raw.get("not_testable", "")) if isinstance(raw, dict) else ""


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
    return (to_model_input(images, **sc.input_options()) if images else torch.zeros((0, 3, *sc.input_size))), kept


def _result(raw: dict[str, object]) -> InterventionResult:
    raw = dict(raw)
    raw["interval"] = tuple(raw["interval"])  # type: ignore[arg-type]
    return InterventionResult(**raw)  # type: ignore[arg-type]


def _bar(label: str) -> Callable[[int, int], None]:
    def show(done: int, total: int) -> None:
        filled = int(30 * done / max(1, total))
        sys.stderr.write(f"\r{label[:40]:<40} [{'#' * filled}{'.' * (30 - filled)}] {done}/{total}")
        if done >= total:
            sys.stderr.write("\n")
        sys.stderr.flush()

    return show


def cached_reliance(project: Path, res: Results, cls: str, concepts: list[str], *, fills: Sequence[str] = DEFAULT_FILLS, draws: int = 5,
                    max_images: int = 200, seed: int = 0) -> RuleTests | None:
    """Stored tests for the run's model and the campaign's current images, or None (pages never run the model).

    Every fill of the policy must be stored; pasting is added when it is.
    """
    if any(c not in res.table.concepts for c in concepts):
        return None
    key, _, _ = _plan(res, res.model_sha256, cls, concepts, draws, max_images, seed)
    results = []
    for f in fills:
        found, result = _read_cached(_cache_path(project, key, f))
        if not found:
            return None
        results.append(result)
    coverings = _stored_coverings(project, key, results)
    if not coverings:
        return None
    _, pasting = _read_cached(_cache_path(project, key, "paste"))
    return RuleTests(cls, concepts_key(concepts), coverings, pasting)


def _stored_coverings(project: Path, key: str, results: Sequence[InterventionResult | None]) -> tuple[InterventionResult, ...]:
    """The stored removal tests of a rule: every fill's covering when each ran, else the recolouring that
    stood in for them (the regions covered most of each image), else none."""
    if results and all(r is not None for r in results):
        return tuple(r for r in results if r is not None)
    found, recoloured = _read_cached(_cache_path(project, key, RECOLOUR))
    return (recoloured,) if found and recoloured is not None else ()


def stored_for_rules(project: Path, res: Results, frame: pd.DataFrame) -> list[RuleTests]:
    """Stored intervention results for the rules of a table."""
    if not ProjectLayout(project).interventions.is_dir() or frame.empty:
        return []
    found = (cached_reliance(project, res, str(cls), str(concepts).split(" & ")) for cls, concepts in zip(frame["class"], frame["concepts"]))
    return [f for f in found if f is not None]


def audit_settings(res: Results) -> VerdictSettings:
    """The campaign's verdict settings: from its expectations file when that reads, else the defaults."""
    if res.campaign.expectations.strip():
        try:
            return read_expectations(res.campaign.expectations).settings
        except InvalidInputError:
            pass
    return VerdictSettings()


def with_reliance(project: Path, res: Results, frame: pd.DataFrame, settings: VerdictSettings | None = None) -> pd.DataFrame:
    """The rule table with the stored tests beside each rule, judged as one family (the table's rules)."""
    settings = settings or audit_settings(res)
    return reliance_columns(frame, judge_family(stored_for_rules(project, res, frame), settings), settings)


RELIANCE_COLUMNS = ("reliance", "decided_by", "covering_effect", "covering_low", "covering_high", "covering_p", "covering_adjusted_p",
                    "covering_flips", "steering", "pasting_effect", "pasting_low", "pasting_high", "pasting_adjusted_p", "min_effect", "family")


def reliance_columns(frame: pd.DataFrame, found: dict[tuple[str, str], RelianceFinding], settings: VerdictSettings) -> pd.DataFrame:
    """The rule table with each rule's reliance verdict (decided by covering), the deciding test's
    figures, pasting beside it, and the family's correction ("not tested" and NaN where none ran)."""
    keys = [(str(c), str(k)) for c, k in zip(frame["class"], frame["concepts"])]

    # Cell values of mixed kinds (text, numbers, NaN): typed as Any for pandas' stubs.
    def col(f: Callable[[RelianceFinding], Any], empty: Any = np.nan) -> list[Any]:
        out = []
        for k in keys:
            r = found.get(k)
            value = f(r) if r is not None else None
            out.append(empty if value is None else value)
        return out

    def d(r: RelianceFinding) -> Any:
        return r.decided_by

    def pst(r: RelianceFinding) -> Any:
        return r.pasting

    family = next(iter(found.values())).family if found else ""
    return frame.assign(
        reliance=col(lambda r: r.reliance, "not tested"),
        decided_by=col(lambda r: d(r).name if d(r) else None, "none"),
        covering_effect=col(lambda r: d(r).effect if d(r) else None), covering_low=col(lambda r: d(r).interval[0] if d(r) else None),
        covering_high=col(lambda r: d(r).interval[1] if d(r) else None), covering_p=col(lambda r: d(r).p_value if d(r) else None),
        covering_adjusted_p=col(lambda r: d(r).adjusted_p if d(r) else None), covering_flips=col(lambda r: d(r).flip_rate if d(r) else None),
        steering=col(lambda r: r.steering, "not tested"),
        pasting_effect=col(lambda r: pst(r).effect if pst(r) else None), pasting_low=col(lambda r: pst(r).interval[0] if pst(r) else None),
        pasting_high=col(lambda r: pst(r).interval[1] if pst(r) else None), pasting_adjusted_p=col(lambda r: pst(r).adjusted_p if pst(r) else None),
        min_effect=settings.min_effect, family=family,
    )


def judge_verdicts(verdicts: list[Verdict], lookup: Lookup, settings: VerdictSettings, *, also: Sequence[RuleTests] = ()) -> tuple[list[Verdict], dict[tuple[str, str], RelianceFinding]]:
    """Decide expectations by their covering tests; ``lookup`` gives the tests of a class and concept
    set (stored, or run). Every test found, and ``also`` (the rules shown beside them), is one family."""
    tests = list(also)
    for v in verdicts:
        concepts = v.expectation.concepts
        if v.verdict == "not enough evidence" or not concepts:
            continue
        found = lookup(v.expectation.cls, concepts)
        if found is not None:
            tests.append(found)
    findings = judge_family(tests, settings)
    return decide_expectations(verdicts, findings, settings), findings


def stored_lookup(project: Path, res: Results) -> Lookup:
    """Look up stored tests only (what pages and the report use: they never run the model)."""
    return lambda cls, concepts: cached_reliance(project, res, cls, concepts)


def judge_audit(project: Path, res: Results, frame: pd.DataFrame, expectations: str = "") -> tuple[pd.DataFrame, list[Verdict], str]:
    """The stored tests behind one page or report, judged as one family: the rules of ``frame`` and
    the expectations (``expectations`` TOML text, may be empty). Returns the rule table with its
    reliance columns, the verdicts, and the family's description. Raises InvalidInputError for
    expectations that do not read."""
    from analysis.expectations import check_expectations

    settings = audit_settings(res)
    rule_tests = stored_for_rules(project, res, frame)
    verdicts: list[Verdict] = []
    if expectations.strip():
        parsed = read_expectations(expectations)
        settings = parsed.settings
        verdicts, findings = judge_verdicts(check_expectations(parsed, res.table), stored_lookup(project, res), settings, also=rule_tests)
    else:
        findings = judge_family(rule_tests, settings)
    n_tests = sum(len(f.coverings) + (f.pasting is not None) for f in findings.values())
    return reliance_columns(frame, findings, settings), verdicts, settings.describe(n_tests)
