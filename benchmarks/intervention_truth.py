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
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import numpy.typing as npt
import torch
from PIL import Image

from analysis.images import to_model_input
from analysis.interventions import DEFAULT_FILLS, FILLS, MAX_COVER_SHARE, CoverPlan, InterventionResult, NotTestableError, ablation_test, plan_regions
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


def _plain_belt_colour(model: LoadedModel, seed: int, n: int = 30) -> torch.Tensor:
    """The belt's mean colour (model input space) where it lacks the attribute: belt pixels of scenes drawn without any cue."""
    scenes = [render_scene(SceneConfig(seed=seed, cue="none"), "test", i) for i in range(n)]
    sc = model.sidecar
    x = to_model_input([sc_.image for sc_ in scenes], size=sc.input_size, mean=sc.mean, std=sc.std)
    m = torch.from_numpy(np.stack([sc_.mask == PART_IDS["belt"] for sc_ in scenes]))
    return x.permute(1, 0, 2, 3)[:, m].mean(dim=1)


def _recolour_effect(model: LoadedModel, x: torch.Tensor, masks: npt.NDArray[np.bool_], cls: int, colour: torch.Tensor) -> float:
    """Mean fall in P(class) when the masked pixels' mean colour is moved to ``colour`` (texture kept): the
    attribute swapped for the entity's usual look. Not a product test yet: it has no control and no p-value."""
    out = x.clone()
    for i in range(len(x)):
        m = torch.from_numpy(masks[i])
        if m.any():
            out[i][:, m] += (colour - x[i][:, m].mean(dim=1))[:, None]
    return float((_probs(model, x)[:, cls] - _probs(model, out)[:, cls]).mean())


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
    rows, lines, truth_rows, null_rows, recolour_rows = [], [], [], [], []  # type: ignore[var-annotated]
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
                        rows.append([CUE_CONCEPTS[cue], label, int(keep.sum()), "-", "-", *["-"] * len(FILLS)])
                        continue
                    share = float(masks[kind][keep].reshape(int(keep.sum()), -1).mean())
                    results = [_estimate(model, pairs.with_cue[torch.from_numpy(keep)], masks[kind][keep], index, f, args.seed) for f in FILLS]
                    # The truth on the images each test used (those left out cover too much of the image).
                    used = keep & (masks[kind].reshape(len(true), -1).mean(axis=1) <= MAX_COVER_SHARE)
                    t = float(true[used].mean()) if used.sum() >= 2 else float(true[keep].mean())
                    rows.append([CUE_CONCEPTS[cue], label, int(keep.sum()), f"{share:.0%}", f"{t:.3f}", *[_cell(r, t) for r in results]])
                    print(rows[-1], flush=True)
                    if cue == "belt":
                        sel = torch.from_numpy(keep)
                        e = _recolour_effect(model, pairs.with_cue[sel], masks[kind][keep], index, _plain_belt_colour(model, args.seed + 300))
                        recolour_rows.append([CUE_CONCEPTS[cue], cls, label, int(keep.sum()), f"{float(true[keep].mean()):.3f}", f"{e:.3f} ({e / float(true[keep].mean()):.2f})"])
            else:
                # The cue-less model: every cue in every class, one family, against the truth.
                family: dict[str, list[RuleTests]] = {f: [] for f in (*FILLS, "default")}
                for test_cue in CUES:
                    for cls in CLASSES:
                        pairs = _pairs(_cue_setting(test_cue, cls, args.seed + 200), cls, n_images // 2, model)
                        index = CLASSES.index(cls)
                        true = float((_probs(model, pairs.with_cue)[:, index] - _probs(model, pairs.without_cue)[:, index]).mean())
                        truth_rows.append((test_cue, cls, true))
                        if test_cue == "belt":
                            e = _recolour_effect(model, pairs.with_cue, pairs.exact, index, _plain_belt_colour(model, args.seed + 300))
                            recolour_rows.append(["green belt (cue-less model)", cls, "exact", len(pairs.exact), f"{true:.3f}", f"{e:.3f} ({e / true:.2f})"])
                        results = {f: _estimate(model, pairs.with_cue, pairs.exact, index, f, args.seed) for f in FILLS}
                        print(f"cue-less model, {test_cue} in {cls}: true {true:.3f}, " + ", ".join(f"{f} {_cell(r, 0.0)}" for f, r in results.items()), flush=True)
                        name = f"{CUE_CONCEPTS[test_cue]}"
                        for f in FILLS:
                            family[f].append(RuleTests(cls, name, tuple(r for r in (results[f],) if r is not None)))
                        family["default"].append(RuleTests(cls, name, tuple(r for f in DEFAULT_FILLS if (r := results[f]) is not None)))
                true_of = {(k, CUE_CONCEPTS[c]): t for c, k, t in truth_rows}
                for f, tests in family.items():
                    judged = judge_family(tests, settings)
                    confirmed = [k for k, v in judged.items() if v.confirmed]
                    false = [k for k in confirmed if true_of[k] < settings.min_effect]
                    missed = [k for k, v in judged.items() if not v.confirmed and true_of[k] >= settings.min_effect]
                    label = f"default ({' + '.join(DEFAULT_FILLS)})" if f == "default" else f
                    untestable = sum(1 for t in tests if not t.coverings)
                    lines.append([label, len(tests), untestable, len(confirmed), len(false), f"{len(false) / len(tests):.3f}", len(missed)])
                    if f == "default":
                        for (cls, name), v in judged.items():
                            d = v.decided_by
                            null_rows.append([name, cls, f"{true_of[(cls, name)]:.3f}", f"{d.effect:.3f}" if d else "-",
                                              f"[{d.interval[0]:.3f}, {d.interval[1]:.3f}]" if d else "-", f"{d.adjusted_p:.3g}" if d else "-", v.reliance if d else "not testable"])
    header = ["cue", "mask", "images", "image covered", "true effect", *[f"{f}{' (default)' if (f,) == DEFAULT_FILLS else ''} (x true)" for f in FILLS]]
    table = print_table(header, rows)
    per_test = print_table(["cue-less model: cue", "class", "true effect", "estimate", "95% interval", "adjusted p", "verdict"], null_rows)
    recolour = print_table(["background cue, recoloured", "class", "mask", "images", "true effect", "recolour estimate (x true)"], recolour_rows)
    null = print_table(["cue-less model, fill", "tests (cue x class)", "not testable", "confirmed", "false confirmations", "share false", "missed (true >= min effect)"], lines)
    note = (f"Effects are falls in P(class) beyond matched controls, mean over images; the true effect comes from the same scenes drawn "
            f"without the cue, on the images each test used. \"exact\": the cue's own pixels; \"regions\": the saliency regions the app "
            f"covers, chosen as it chooses them (regions naming the cue alone when enough images have one, else every region naming it). "
            f"\"image covered\": mean share of the image under the mask; an image whose mask covers more than {MAX_COVER_SHARE:.0%} has no "
            f"matched control and is left out, and a test left with fewer than two images is not testable. Verdicts: default policy "
            f"({' + '.join(DEFAULT_FILLS)} fill), {settings.describe(sum(1 for r in null_rows if r[-1] != 'not testable'))}. A false confirmation is reliance confirmed where the true "
            f"effect is below the minimum effect ({settings.min_effect}); the stated level is alpha {settings.alpha}.")
    print(note)
    recolour_note = ("Recolour (measured here only, not a product test: no control, no p-value): the masked pixels' mean colour moved to the "
                     "belt's colour in scenes without any cue, texture kept, i.e. the attribute \"green\" swapped for the entity's usual look.")
    return f"{table}\n\n{per_test}\n\n{null}\n\n{note}\n\n{recolour}\n\n{recolour_note}\n"


if __name__ == "__main__":
    main()
