"""How close is the covering test to the truth? The demo draws every scene again without its cue
(same seed, pose and noise), so the true effect of removing the cue from an image is known:
P(class | scene) - P(class | same scene without the cue). For each cue (tag, green belt, paper
scrap, flat-colour patch) a model is trained with the cue injected, and every fill's covering
estimate (effect beyond matched controls) is set beside the true mean effect, on two kinds of mask:
the cue's exact pixels, and the saliency regions the app covers (a careful annotator names the parts
of each region; analysis.interventions.plan_regions chooses among them as the app does). Then a model trained without any cue: every cue concept in every class is tested
as one family, and a false confirmation is reliance confirmed where the true mean effect is below
the minimum effect.

    .venv/bin/python -m benchmarks.intervention_truth            # 1200 training scenes per model
    .venv/bin/python -m benchmarks.intervention_truth --quick    # 600
"""

from __future__ import annotations

import argparse
import tempfile
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import numpy.typing as npt
import torch
from PIL import Image

from analysis.images import to_model_input
from analysis.interventions import (
    DEFAULT_FILLS,
    FILLS,
    MAX_COVER_SHARE,
    CoverPlan,
    InterventionResult,
    NotTestableError,
    RemovalPlan,
    ablation_test,
    pixel_spread,
    plain_colours,
    plan_regions,
    plan_removal,
    recolour_test,
    unlike_attribute,
)
from analysis.model_io import LoadedModel, load_model
from analysis.regions import extract_regions
from analysis.reliance import RuleTests, VerdictSettings, judge_family
from analysis.saliency import compute_saliency
from demo_data.annotators import visible_parts
from demo_data.scenes import CLASSES, CUE_CONCEPTS, CUE_PARTS, PART_IDS, SceneConfig, generate_dataset, render_scene
from demo_data.train import train_demo_model

from .measure import print_table

CUES = ("tag", "belt", "object", "patch")
MASKS = ("exact", "regions")
RECOLOURS = ("recolour", "recolour, matched sham")


@dataclass(frozen=True)
class Pairs:
    """Scenes of one class carrying the cue, with and without it, as model inputs, and the cue's masks."""

    with_cue: torch.Tensor
    without_cue: torch.Tensor
    exact: npt.NDArray[np.bool_]  # the cue's own pixels
    parts: npt.NDArray[np.uint8]  # the scene's part mask


def _pairs(config: SceneConfig, cls: str, n: int, model: LoadedModel, *, start: int = 0) -> Pairs:
    """``n`` scenes of ``cls`` carrying the cue (the test split's own draws, then further indices of it)."""
    sc = model.sidecar
    shown, hidden, masks, parts = [], [], [], []
    i = start + CLASSES.index(cls)
    part = PART_IDS[CUE_PARTS[config.cue]]
    while len(shown) < n and i < start + 200 * n:
        scene = render_scene(config, "test", i)
        if scene.cue:
            shown.append(scene.image)
            hidden.append(render_scene(config, "test", i, draw_cue=False).image)
            masks.append(scene.mask == part)
            parts.append(scene.mask)
        i += len(CLASSES)

    def to_x(ims: list[Image.Image]) -> torch.Tensor:
        return to_model_input(ims, size=sc.input_size, mean=sc.mean, std=sc.std)

    return Pairs(to_x(shown), to_x(hidden), np.stack(masks), np.stack(parts))


def _probs(model: LoadedModel, x: torch.Tensor) -> npt.NDArray[np.float64]:
    with torch.inference_mode():
        return torch.softmax(model.module(x).float(), dim=1).numpy().astype(np.float64)


def _region_masks(model: LoadedModel, x: torch.Tensor, part_masks: npt.NDArray[np.uint8], part: str) -> tuple[npt.NDArray[np.bool_], CoverPlan]:
    """Per image, the saliency regions the product would cover for the cue: each region gets the parts
    a careful annotator would name in it, and :func:`plan_regions` chooses among them as the app does
    (an all-False mask where none is chosen)."""
    maps = compute_saliency(model, x).maps
    labelled = [extract_regions(maps[i])[1] for i in range(len(x))]
    named = [[visible_parts(labels == k, part_masks[i]) for k in range(1, int(labels.max()) + 1)] for i, labels in enumerate(labelled)]
    plan = plan_regions(named, [part])
    out = np.zeros(part_masks.shape, dtype=bool)
    for i, chosen in enumerate(plan.regions):
        out[i] = np.isin(labelled[i], [k + 1 for k in chosen])
    return out, plan


def _cue_setting(cue: str, cls: str, seed: int) -> SceneConfig:
    """Scenes where every image of ``cls`` in the test split carries the cue (the cue class for training)."""
    return SceneConfig(seed=seed, cue=cue, cue_class=cls, cue_rate=1.0, leak_rate=0.0)  # type: ignore[arg-type]


def _estimate(model: LoadedModel, x: torch.Tensor, masks: npt.NDArray[np.bool_], cls: int, fill: str, seed: int) -> InterventionResult | None:
    """The covering test, or None where it is not testable (masks over MAX_COVER_SHARE of the image)."""
    try:
        return ablation_test(model, x, masks, cls, concept="cue", fill=fill, draws=5, seed=seed, n_boot=2000, n_perm=5000)  # type: ignore[arg-type]
    except NotTestableError:
        return None


def _cell(r: InterventionResult | None, true: float) -> str:
    if r is None:
        return "not testable"
    left = f", {r.left_out} left out" if r.left_out else ""
    return f"{r.effect:.3f} ({r.effect / true:.2f}{left})" if abs(true) > 1e-9 else f"{r.effect:.3f}"


# The demo's concepts that refine an entity (an attribute named before the part: "green belt" of "belt"),
# read from the generator's own names, as the app reads them from labels ("belt: green").
FAMILIES = {CUE_CONCEPTS[c]: CUE_PARTS[c] for c in CUES if CUE_CONCEPTS[c] != CUE_PARTS[c]}
_DONORS: dict[tuple[int, int, str, str], torch.Tensor] = {}


def _donor_colours(model: LoadedModel, seed: int, kind: str, cue: str) -> torch.Tensor:
    """Candidate donors of the entity's plain look, one colour per scene (model input space), as a grouped
    labelling leaves them: regions naming the entity alone ("belt", no colour) in scenes drawn at the demo's
    cue rates, so some are belts that carry the attribute ("regions": saliency regions a careful annotator
    names the entity alone, in 600 scenes, since few saliency regions show the bare belt; "exact": every pixel
    of the entity, in 60 scenes)."""
    key = (id(model), seed, kind, cue)
    n = 60 if kind == "exact" else 600
    if key not in _DONORS:
        scenes = [render_scene(SceneConfig(seed=seed, cue=cue), "test", i) for i in range(n)]  # type: ignore[arg-type]
        sc = model.sidecar
        x = to_model_input([s_.image for s_ in scenes], size=sc.input_size, mean=sc.mean, std=sc.std)
        parts = np.stack([s_.mask for s_ in scenes])
        entity = PART_IDS[CUE_PARTS[cue]]
        if kind == "exact":
            masks = parts == entity
        else:
            labelled = [extract_regions(m)[1] for m in compute_saliency(model, x).maps]
            masks = np.stack([np.isin(lab, [k for k in range(1, int(lab.max()) + 1) if visible_parts(lab == k, parts[i]) == [CUE_PARTS[cue]]])
                              for i, lab in enumerate(labelled)])
        has = masks.reshape(n, -1).any(axis=1)
        _DONORS[key] = plain_colours(x[torch.from_numpy(has)], masks[has]) if has.sum() else torch.zeros((0, 3))
    return _DONORS[key]


def _recolour(model: LoadedModel, x: torch.Tensor, masks: npt.NDArray[np.bool_], cls: int, seed: int, kind: str, cue: str,
              sham: str = "attribute") -> tuple[InterventionResult | None, str]:
    """The recolouring test with the product's donor screen (donors whose colour lies within the tested regions'
    colours are dropped: :func:`analysis.interventions.unlike_attribute`), or None where fewer than two donors are
    left (as the product finds it: not testable); and how many donors were kept of how many."""
    donors = _donor_colours(model, seed + 300, kind, cue)
    keep = unlike_attribute(donors, plain_colours(x, masks), within=pixel_spread(x, masks)) if len(donors) else np.zeros(0, dtype=bool)
    note = f"{int(keep.sum())}/{len(donors)}"
    if keep.sum() < 2:
        return None, note
    return recolour_test(model, x, masks, cls, plain=donors[torch.from_numpy(keep)], concept="cue", draws=5, seed=seed, n_boot=2000,
                         n_perm=5000, sham=sham), note  # type: ignore[arg-type]


def _policy(cue: str, x: torch.Tensor, masks: npt.NDArray[np.bool_]) -> RemovalPlan:
    """What the product's default policy runs for the cue's concept, and on which masks
    (:func:`analysis.interventions.plan_removal`, the function the app runs)."""
    return plan_removal(x, masks, [CUE_CONCEPTS[cue]], families=FAMILIES)


def _run_policy(plan: RemovalPlan, model: LoadedModel, x: torch.Tensor, masks: npt.NDArray[np.bool_], cls: int, seed: int, kind: str,
                cue: str) -> InterventionResult | None:
    """The default policy's test, as the app runs it: recolouring where the plan says so (not testable where fewer
    than two donors are found), else covering with the default fill on the masks as they are (not testable where
    they cover most of each image)."""
    if plan.test == "recolour":
        return _recolour(model, x, plan.masks, cls, seed, kind, cue)[0]
    return _estimate(model, x, masks, cls, DEFAULT_FILLS[0], seed)


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--cues", nargs="*", choices=[*CUES, "none"], help="run only these models (default: every cue and the cue-less one)")
    p.add_argument("--workdir", type=Path, help="keep data and models here and reuse them on the next run (default: a temporary folder)")
    args = p.parse_args(argv)
    n_train, n_images = (600, 60) if args.quick else (1200, 120)
    torch.set_num_threads(2)
    settings = VerdictSettings()
    rows, lines, null_rows = [], [], []  # type: ignore[var-annotated]
    policy = f"default policy: {DEFAULT_FILLS[0]} fill, recolouring for an attribute over most of the image"
    with tempfile.TemporaryDirectory() as tmp:
        for cue in args.cues or (*CUES, "none"):
            root = (args.workdir or Path(tmp)) / f"{cue}-{n_train}-{args.seed}"
            config = SceneConfig(seed=args.seed, n_train=n_train, n_test=3, n_counterfactual=3, cue=cue)  # type: ignore[arg-type]
            if not (root / "model" / "model.json").is_file():
                generate_dataset(root / "data", config)
                train_demo_model(root / "data", root / "model", epochs=6, seed=args.seed)
            model = load_model(root / "model" / "model.pt", root / "model" / "model.json")
            print(f"{cue}: model ready", flush=True)
            if cue != "none":
                cls = config.cue_class
                pairs = _pairs(_cue_setting(cue, cls, args.seed + 100), cls, n_images, model)
                index = CLASSES.index(cls)
                true = _probs(model, pairs.with_cue)[:, index] - _probs(model, pairs.without_cue)[:, index]
                regions, plan = _region_masks(model, pairs.with_cue, pairs.parts, CUE_PARTS[cue])
                masks = {"exact": pairs.exact, "regions": regions}
                for kind in MASKS:
                    keep = masks[kind].reshape(len(true), -1).any(axis=1)
                    label = kind if kind == "exact" else f"regions ({'alone' if plan.alone else 'shared'})"
                    if keep.sum() < 2:
                        rows.append([CUE_CONCEPTS[cue], label, int(keep.sum()), "-", "-", *["-"] * (len(FILLS) + len(RECOLOURS) + 2)])
                        continue
                    x, m = pairs.with_cue[torch.from_numpy(keep)], masks[kind][keep]
                    share = float(m.reshape(len(m), -1).mean())
                    results: dict[str, InterventionResult | None] = {f: _estimate(model, x, m, index, f, args.seed) for f in FILLS}
                    removal = _policy(cue, x, m)
                    donors = "-"
                    if CUE_CONCEPTS[cue] in FAMILIES:  # an attribute of an entity: recolouring to its plain look, masks grown by colour
                        results["recolour"], donors = _recolour(model, x, removal.grown, index, args.seed, kind, cue)
                        results["recolour, matched sham"], _ = _recolour(model, x, removal.grown, index, args.seed, kind, cue, sham="matched")
                    chosen = _run_policy(removal, model, x, m, index, args.seed, kind, cue)
                    # The truth on the images each test used (covering leaves out masks over MAX_COVER_SHARE of the image).
                    small = m.reshape(len(m), -1).mean(axis=1) <= MAX_COVER_SHARE
                    t_all = float(true[keep].mean())
                    t_cover = float(true[keep][small].mean()) if small.sum() >= 2 else t_all

                    def cell(f: str, r: InterventionResult | None = None) -> str:
                        if r is None and f not in results:
                            return "-"
                        found = r if r is not None else results[f]
                        return _cell(found, t_all if f.startswith("recolour") else t_cover)

                    decided = chosen.fill if chosen is not None else "not testable"
                    covered = f"{share:.0%}" + (f" (grown {float(removal.grown.reshape(len(m), -1).mean()):.0%})" if CUE_CONCEPTS[cue] in FAMILIES else "")
                    rows.append([CUE_CONCEPTS[cue], label, int(keep.sum()), covered, f"{t_all:.3f}", *[cell(f) for f in (*FILLS, *RECOLOURS)], donors,
                                 f"{decided}: {cell(decided, chosen) if chosen is not None else '-'}"])
                    print(rows[-1], flush=True)
            else:
                # The cue-less model: every cue in every class, one family, against the truth; on the cue's exact
                # pixels with each fill and the default policy, and on the regions the app covers with the default
                # policy (regions showing the cue alone, or the shared-regions fallback, which cannot confirm).
                family: dict[str, list[RuleTests]] = {f: [] for f in (*FILLS, "default", "default, regions")}
                true_of: dict[tuple[str, str, str], float] = {}
                for test_cue in CUES:
                    for cls in CLASSES:
                        pairs = _pairs(_cue_setting(test_cue, cls, args.seed + 200), cls, n_images // 2, model)
                        index = CLASSES.index(cls)
                        true_each = _probs(model, pairs.with_cue)[:, index] - _probs(model, pairs.without_cue)[:, index]
                        true = float(true_each.mean())
                        name = f"{CUE_CONCEPTS[test_cue]}"
                        found: dict[str, InterventionResult | None] = {f: _estimate(model, pairs.with_cue, pairs.exact, index, f, args.seed) for f in FILLS}
                        removal = _policy(test_cue, pairs.with_cue, pairs.exact)
                        if CUE_CONCEPTS[test_cue] in FAMILIES:
                            found["recolour"], _ = _recolour(model, pairs.with_cue, removal.grown, index, args.seed, "exact", test_cue)
                        default = _run_policy(removal, model, pairs.with_cue, pairs.exact, index, args.seed, "exact", test_cue)
                        print(f"cue-less model, {test_cue} in {cls}: true {true:.3f}, " + ", ".join(f"{f} {_cell(r, 0.0)}" for f, r in found.items()), flush=True)
                        for f in (*FILLS, "default"):
                            true_of[(f, cls, name)] = true
                            r = default if f == "default" else found[f]
                            family[f].append(RuleTests(cls, name, (r,) if r is not None else ()))
                        regions, plan = _region_masks(model, pairs.with_cue, pairs.parts, CUE_PARTS[test_cue])
                        keep = regions.reshape(len(regions), -1).any(axis=1)
                        r = None
                        if keep.sum() >= 2:
                            x, m = pairs.with_cue[torch.from_numpy(keep)], regions[keep]
                            r = _run_policy(_policy(test_cue, x, m), model, x, m, index, args.seed, "regions", test_cue)
                            r = replace(r, shared=not plan.alone) if r is not None else None
                        true_of[("default, regions", cls, name)] = float(true_each[keep].mean()) if keep.any() else true
                        family["default, regions"].append(RuleTests(cls, name, (r,) if r is not None else ()))
                for f, tests in family.items():
                    judged = judge_family(tests, settings)
                    confirmed = [k for k, v in judged.items() if v.confirmed]
                    false = [k for k in confirmed if true_of[(f, *k)] < settings.min_effect]
                    missed = [k for k, v in judged.items() if not v.confirmed and true_of[(f, *k)] >= settings.min_effect]
                    label = {"default": f"default policy, exact pixels ({DEFAULT_FILLS[0]}; recolour for the green belt)",
                             "default, regions": "default policy, the regions the app covers"}.get(f, f"{f}, exact pixels")
                    untestable = sum(1 for t in tests if not t.coverings)
                    shared = sum(1 for t in tests if t.coverings and t.coverings[0].shared)
                    lines.append([label, len(tests), untestable, shared, len(confirmed), len(false), f"{len(false) / len(tests):.3f}", len(missed)])
                    if f.startswith("default"):
                        for (cls, name), v in judged.items():
                            d = v.decided_by
                            where = "exact" if f == "default" else ("regions, shared" if d and d.shared else "regions")
                            null_rows.append([name, cls, where, f"{true_of[(f, cls, name)]:.3f}", d.name if d else "-", f"{d.effect:.3f}" if d else "-",
                                              f"[{d.interval[0]:.3f}, {d.interval[1]:.3f}]" if d else "-", f"{d.adjusted_p:.3g}" if d else "-",
                                              v.reliance if d else "not testable"])
    header = ["cue", "mask", "images", "image covered", "true effect", *[f"{f} (x true)" for f in (*FILLS, *RECOLOURS)], "donors kept",
              f"{policy} (x true)"]
    table = print_table(header, rows)
    per_test = print_table(["cue-less model: cue", "class", "mask", "true effect", "decided by", "estimate", "95% interval", "adjusted p", "verdict"], null_rows)
    null = print_table(["cue-less model, fill", "tests (cue x class)", "not testable", "shared regions", "confirmed", "false confirmations", "share false", "missed (true >= min effect)"], lines)
    note = (f"Effects are falls in P(class) beyond matched controls, mean over images; the true effect comes from the same scenes drawn "
            f"without the cue, on the images each test used. \"exact\": the cue's own pixels; \"regions\": the saliency regions the app "
            f"covers, chosen as it chooses them (regions naming the cue alone when enough images have one, else every region naming it). "
            f"\"image covered\": mean share of the image under the mask; an image whose mask covers more than {MAX_COVER_SHARE:.0%} has no "
            f"matched control for covering and is left out, and a covering test left with fewer than two images is not testable. "
            f"Recolour: the masks grown by colour to the rest of the belt (connected pixels within 3 robust "
            f"standard deviations of the regions' colour), their mean colour moved to a random donor's plain look, texture kept, against a "
            f"sham recolouring of the same pixels to another cue image's green; no image is left out. Donors: regions naming the belt alone "
            f"(no colour, as a grouped label leaves it) in scenes drawn at the demo's cue rates (60 for exact pixels, 600 for saliency regions), so some are green belts; the product's "
            f"screen drops every donor whose colour lies within the tested regions' colours (\"donors kept\": kept/found). \"matched sham\": "
            f"the sham moves the pixels as far as the removal (pixel space), brighter or darker along their own colour. "
            f"The {policy} (median mask over {MAX_COVER_SHARE:.0%} of the image), as the product decides it. "
            f"Verdicts: {settings.describe(sum(1 for r in null_rows if r[-1] != 'not testable' and r[2] == 'exact'))} (each family "
            f"corrected on its own: the exact pixels' and the regions'); a test in regions that also show other concepts (\"shared\") can "
            f"rule reliance out but not confirm it. A false confirmation is reliance "
            f"confirmed where the true effect is below the minimum effect ({settings.min_effect}); the stated level is alpha {settings.alpha}.")
    print(note)
    return f"{table}\n\n{per_test}\n\n{null}\n\n{note}\n"


if __name__ == "__main__":
    main()
