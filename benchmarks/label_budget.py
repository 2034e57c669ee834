"""How few judgments give the same answers? Labelling everything with three people per region against a
random sample, a stratified sample, the stratified sample labelled in groups, and that plus adaptive
redundancy (two people per region, a third only where they disagree), on a demo of 5,000 images.

    nice -n 10 .venv/bin/python -m benchmarks.label_budget                # 5,000 audited images (builds a cached project once)
    nice -n 10 .venv/bin/python -m benchmarks.label_budget --images 600   # a quick look

For each way of labelling and each size of sample, the simulated annotators of the demo label the
sample (they read the part masks, with their own error rates; in groups they also miss some crops
that do not fit, and never see other people's answers). Two questions decide whether a sample is
enough: (i) the injected cue ranks first among its class's rules with q < 0.01 and a covering test
confirms the model relies on it; (ii) every class's top-10 rule families match labelling everything
with three people: the same top 3 and a Spearman rank correlation of at least 0.9, where families
whose 95% intervals overlap in the reference are ties (analysis.rule_ranking: the reference cannot
order them, and relabelling the same images swaps them), over every rule (no pruning). The same is
read against the truth the demo knows (each region labelled once with exactly its parts), and the
noise floor is a row: everything labelled again by the same crowd with other draws. The table says how many
judgments (labels of one crop by one person) each way needed, and the people-hours they cost at the
seconds per judgment the browser test measures (rough: machine time, no looking).
"""

from __future__ import annotations

import argparse
import json
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt
import pandas as pd

from analysis.concepts import Judgment
from analysis.errors import AnalysisError
from analysis.grouping import group_regions
from analysis.rule_ranking import RankedFamily, family_ranking, match_ranking
from demo_data.annotators import SimulatedAnnotator, demo_crowd, simulate_label
from demo_data.group_annotators import judge_group
from demo_data.scenes import SceneConfig, generate_dataset
from demo_data.train import train_demo_model

from .measure import print_table

# Rough seconds per judgment from the browser test (tests/browser/test_group_flow.py, printed there): machine
# time through the pages with keys typed at a steady pace, no time for looking; a group of 8 crops took 2.7 s,
# a single crop 1.2 s on this machine. Real people take longer on both; the ratio is the rough part that carries over.
SECONDS_SINGLE = 1.2
SECONDS_GROUP = 2.7
CACHE = Path(__file__).resolve().parent / "out" / "label_budget_cache"


def build(cache: Path, *, images: int, seed: int) -> dict[str, object]:
    """The demo project with ``images`` audited images, trained model, saliency run and region embeddings; made once per size and seed."""
    from analysis.images import find_images
    from analysis.model_io import load_model
    from app.db import make_engine, session_factory
    from app.embeddings import embed_run
    from app.jobs import register_images, run_saliency

    root = cache / f"images{images}-seed{seed}"
    done = root / "built.json"
    if done.is_file():
        return dict(json.loads(done.read_text()))
    root.mkdir(parents=True, exist_ok=True)
    t = time.perf_counter()
    data = root / "data"
    generate_dataset(data, SceneConfig(seed=seed, n_train=1200, n_test=images, n_counterfactual=100, cue="tag"))
    trained = train_demo_model(data, root / "model", epochs=6, seed=seed)
    engine = make_engine(root / "project")
    factory = session_factory(engine)
    register_images(factory, [r for r in find_images(data / "manifest.csv") if r.split == "test"])
    model = load_model(trained.model_path, trained.sidecar_path)
    report = run_saliency(factory, root / "project", model, model_files=(trained.model_path, trained.sidecar_path), progress=None)
    embedded = embed_run(factory, root / "project", report.run_id, model)
    engine.dispose()
    info: dict[str, object] = {"root": str(root), "data": str(data), "project": str(root / "project"), "run_id": report.run_id,
                               "images": report.processed + report.already_done, "regions": report.regions, "embedding_dims": embedded.dimensions,
                               "accuracy": trained.accuracy, "build_s": round(time.perf_counter() - t, 1)}
    done.write_text(json.dumps(info, indent=2))
    return info


# --- what the benchmark needs from a project ---------------------------------------------------------


@dataclass
class World:
    """Everything the simulation reads: predictions, each region's truth, class, image and embedding."""

    project: Path
    run_id: int
    predictions: pd.DataFrame  # store.prediction_frame
    region_class: dict[int, str]
    region_image: dict[int, int]
    truths: dict[int, tuple[list[str], dict[str, list[str]]]]  # region -> (parts it shows, its scene's part attributes)
    embedding: dict[int, npt.NDArray[np.float32]]
    campaign: Any  # CampaignInfo of the "everything" campaign (for covering tests)
    model_sha: str


def load_world(info: dict[str, object]) -> World:
    from sqlalchemy import select

    from app import campaigns, store
    from app.db import make_engine, session_factory, write_session
    from app.demo import region_truths
    from app.embeddings import load_embeddings
    from app.models import Campaign, SaliencyRun

    project, data, run_id = Path(str(info["project"])), Path(str(info["data"])), int(str(info["run_id"]))
    engine = make_engine(project)
    factory = session_factory(engine)
    with write_session(factory) as s:
        cid = s.scalar(select(Campaign.id).where(Campaign.name == "everything"))
        if cid is None:
            cid = campaigns.create_campaign(s, name="everything", run_id=run_id, labels_per_region=3)
    with factory() as s:
        c = campaigns.get_campaign(s, cid)
        predictions = store.prediction_frame(s, run_id)
        region_class = campaigns.region_classes(s, cid)
        truths = {r: (t, scene["parts"]) for r, t, scene in region_truths(s, project, data, c)}
        run = s.get(SaliencyRun, run_id)
        sha = str((run.provenance or {}).get("model_sha256", "")) if run else ""
    engine.dispose()
    region_image = {int(r): int(i) for i, rs in zip(predictions.index, predictions["regions"]) for r in rs}
    emb = load_embeddings(project, run_id)
    embedding = {int(r): v for r, v in zip(emb.region_ids, emb.vectors)}
    return World(project, run_id, predictions, region_class, region_image, truths, embedding, c, sha)


# --- simulated labelling --------------------------------------------------------------------------------


@dataclass
class Labelled:
    """The judgments of one way of labelling a sample, and what they cost in actions."""

    judgments: list[Judgment]
    singles: int = 0  # one crop, one submit
    groups: int = 0  # one group judgment (gives a label to each ticked crop)
    extras: int = 0  # ticked crops given things of their own besides what the group shares (typed in the crop's box)

    @property
    def n(self) -> int:
        return len(self.judgments)


def _judgment(region: int, name: str, entities: list[tuple[str, list[str]]]) -> Judgment:
    return Judgment(region, name, tuple((e, tuple(a)) for e, a in entities), False)


def _disagree(world: World, found: list[Judgment]) -> bool:
    """Whether the first two labels of a region disagree, by the adaptive campaigns' own rule (app.campaigns.redundancy)."""
    from app.campaigns.redundancy import first_disagree

    return bool(first_disagree(found, base=2, rules=None, cls=None))


def label_singly(world: World, regions: list[int], crowd: list[SimulatedAnnotator], rng: np.random.Generator, *, k: int,
                 adaptive: bool = False) -> Labelled:
    out = Labelled([])
    base = 2 if adaptive else k
    for r in regions:
        parts, attrs = world.truths[r]
        found = [_judgment(r, a.name, simulate_label(a, parts, attrs, rng)) for a in crowd[:base]]
        if adaptive and k > base and _disagree(world, found):
            found += [_judgment(r, a.name, simulate_label(a, parts, attrs, rng)) for a in crowd[base:k]]
        out.judgments += found
        out.singles += len(found)
    return out


def label_in_groups(world: World, regions: list[int], crowd: list[SimulatedAnnotator], rng: np.random.Generator, *, k: int,
                    adaptive: bool = False, size: int = 12) -> Labelled:
    """The group flow of the app, in memory: each person judges each group's crops still open to them; what no group
    labelled (unticked by everyone, skipped) is labelled one crop at a time; adaptive: two people, a third only on disagreement."""
    grouping = group_regions(np.stack([world.embedding[r] for r in regions]), [world.region_class[r] for r in regions],
                             [world.region_image[r] for r in regions], size=size, max_class_share=0.5, seed=0)
    out = Labelled([])
    by_region: dict[int, list[Judgment]] = {r: [] for r in regions}
    wanted = dict.fromkeys(regions, 2 if adaptive else k)

    def group_pass(people: list[SimulatedAnnotator]) -> None:
        for members in grouping.groups:
            for a in people:
                crops = [regions[i] for i in members if len(by_region[regions[i]]) < wanted[regions[i]]
                         and all(j.annotator != a.name for j in by_region[regions[i]])]
                if not crops:
                    continue
                got = judge_group(a, [world.truths[r][0] for r in crops], [world.truths[r][1] for r in crops], rng)
                out.groups += 1
                if got is None:
                    continue
                for i, (r, tick) in enumerate(zip(crops, got.ticked)):
                    if tick:  # what the group shares, then what this crop shows besides (its own box on the group page)
                        by_region[r].append(_judgment(r, a.name, got.crop_label(i)))
                        out.extras += bool(got.extras[i])

    def fill_singly() -> None:
        for r in regions:
            for a in crowd:
                if len(by_region[r]) >= wanted[r]:
                    break
                if all(j.annotator != a.name for j in by_region[r]):
                    by_region[r].append(_judgment(r, a.name, simulate_label(a, *world.truths[r], rng)))
                    out.singles += 1

    group_pass(crowd[: wanted[regions[0]]] if regions else [])
    fill_singly()
    if adaptive and k > 2:
        for r in regions:
            if _disagree(world, by_region[r]):
                wanted[r] = k
        group_pass(crowd)
        fill_singly()
    out.judgments = [j for r in regions for j in by_region[r]]
    return out


# --- samples --------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Sample:
    images: list[int]
    strata: dict[int, str] | None = None  # image -> stratum (a stratified sample), for weighted estimates
    population: dict[str, int] | None = None

    def regions(self, world: World) -> list[int]:
        regions = world.predictions["regions"]
        return [int(r) for i in self.images for r in regions.loc[i]]


def random_sample(world: World, n_images: int, seed: int) -> Sample:
    rng = np.random.default_rng(seed)
    ids = world.predictions.index.to_numpy()
    return Sample(sorted(int(i) for i in rng.choice(ids, size=min(n_images, len(ids)), replace=False)))


def stratified_sample(world: World, regions_per_class: int, seed: int) -> Sample:
    """The stratified sample a budgeted campaign draws (analysis.sampling): by predicted class, confident errors and
    confident correct predictions both represented, with each stratum's size for the weighted estimates."""
    from analysis.sampling import Stratum, allocate, draw_sample, stratum_kinds

    p = world.predictions
    kinds = stratum_kinds(list(p["predicted"]), list(p["label"]), p["confidence"].to_numpy(), confident_at=0.8)
    names = [f"{c} / {k}" for c, k in zip(p["predicted"], kinds)]
    units: dict[str, list[int]] = {}
    counts: dict[str, list[int]] = {}
    for image, name, rs in zip(p.index, names, p["regions"]):
        units.setdefault(name, []).append(int(image))
        counts.setdefault(name, [0, 0])
        counts[name][0] += 1
        counts[name][1] += len(rs)
    strata = [Stratum(name.split(" / ")[0], name.split(" / ")[1], n, r) for name, (n, r) in counts.items()]  # type: ignore[arg-type]
    drawn = draw_sample(units, allocate(strata, regions_per_class=regions_per_class), seed=seed)
    return Sample(sorted(drawn), {i: st for i, (st, _) in drawn.items()}, {name: len(ids) for name, ids in units.items()})


# --- what a sample's labels say ------------------------------------------------------------------------


# The comparisons of question (ii), each over a class's top-10 rule families (analysis.rule_ranking): against labelling
# everything with k=3, read plainly (its order as it stands) and tie-aware (families whose 95% intervals overlap there
# are ties), and tie-aware against the truth the demo knows (every region labelled once with exactly the parts it shows).
# These compare every rule (no pruning): pruning is a display choice with a threshold, and near it a combination is shown
# after one labelling and not after the next, so pruned lists differ by noise alone (the last column shows by how much).
# The goal reads "k=3 ties".
COMPARISONS = (("k=3 plain", "everything", False, False), ("k=3 ties", "everything", True, False), ("truth ties", "truth", True, False),
               ("k=3 ties, pruned", "everything", True, True))
GOAL = "k=3 ties"


@dataclass
class Verdict:
    judgments: int
    people_seconds: float
    cue_rank: int | None
    cue_q: float | None
    cue_confirmed: bool | None
    matching: dict[str, int]  # comparison -> classes whose top-10 families match
    classes: int

    @property
    def cue_ok(self) -> bool:
        return self.cue_rank == 1 and self.cue_q is not None and self.cue_q < 0.01 and bool(self.cue_confirmed)

    def rules_ok(self, comparison: str = GOAL) -> bool:
        return self.matching.get(comparison, -1) == self.classes


def concept_table(world: World, labelled: Labelled, sample: Sample | None) -> Any:
    from analysis.pipeline import campaign_table

    preds = world.predictions if sample is None else world.predictions.loc[sample.images]
    in_sample = set(world.region_class) if sample is None else set(sample.regions(world))
    region_class = {r: c for r, c in world.region_class.items() if r in in_sample}
    options: dict[str, Any] = {}
    if sample is not None and sample.strata is not None:
        options = {"sample": sample.strata, "population": sample.population}
    return campaign_table(labelled.judgments, preds, region_class=region_class, method="majority", **options).table


Ranking = dict[bool, dict[str, list[RankedFamily]]]  # pruned or not -> class -> its rule families, best first


def judge(world: World, model: Any, labelled: Labelled, sample: Sample | None, references: dict[str, Ranking],
          seconds: tuple[float, float]) -> tuple[Verdict, Ranking]:
    """Question (i) and the comparisons of question (ii) for one way of labelling; the classes' rankings it gives."""
    from analysis.reliance import VerdictSettings, judge_family
    from app.db import make_engine, session_factory
    from app.demo import names_cue
    from app.reliance import rule_reliance
    from app.services.campaign_analysis import Results

    table = concept_table(world, labelled, sample)
    rules = table.rules(min_support=0.02).rules  # as the results page shows them (pruned), for question (i)
    every = table.rules(min_support=0.02, prune=False).rules
    order = {pruned: {c: family_ranking(r, c) for c in sorted(set(r["class"]))} for pruned, r in ((True, rules), (False, every))}
    can = rules[rules["class"] == "can"]
    named = can[[names_cue(str(c), "tag", str(f)) for c, f in zip(can["concepts"], can["family"].fillna(""))]]
    rank = int(named["rank"].min()) if len(named) else None
    q = float(named.sort_values("rank")["q_value"].iloc[0]) if len(named) else None
    confirmed = None
    if rank == 1 and q is not None and q < 0.01:
        engine = make_engine(world.project)
        with session_factory(engine)() as s:
            res = Results(world.campaign, table, len(labelled.judgments), world.model_sha)
            tests = rule_reliance(s, world.project, res, model, "can", [str(named.sort_values("rank")["concepts"].iloc[0])])
        engine.dispose()
        if tests is not None:
            found = judge_family([tests], VerdictSettings())
            confirmed = any(f.reliance == "relies on" for f in found.values())
        else:
            confirmed = False
    matching: dict[str, int] = {}
    n_classes = 0
    for name, against, ties, pruned in COMPARISONS:
        ref = references.get(against, order)[pruned]
        n_classes = len(ref)
        matching[name] = sum(match_ranking(ref[c], [f.name for f in order[pruned].get(c, [])], ties=ties).matches for c in ref)
    # A crop's own box is counted as long as a single crop (an assumption: it is typed the same way; not timed).
    people = (labelled.singles + labelled.extras) * seconds[0] + labelled.groups * seconds[1]
    return Verdict(labelled.n, people, rank, q, confirmed, matching, n_classes), order


def label_truth(world: World) -> Labelled:
    """Every region labelled once with exactly the parts it shows and all their attributes: the noise-free reference."""
    return Labelled([_judgment(r, "truth", [(p, list(world.truths[r][1].get(p, []))) for p in world.truths[r][0]])
                     for r in sorted(world.region_class)])


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0] if __doc__ else None)
    p.add_argument("--images", type=int, default=5000)
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--cache", type=Path, default=CACHE)
    p.add_argument("--build-only", action="store_true")
    p.add_argument("--fractions", type=float, nargs="+", default=[0.02, 0.04, 0.08, 0.16],
                   help="sample sizes tried, smallest first, as shares of the images (random) or of the regions per class (stratified)")
    p.add_argument("--seconds-single", type=float, default=SECONDS_SINGLE, help="seconds per single-crop judgment (rough, browser test)")
    p.add_argument("--seconds-group", type=float, default=SECONDS_GROUP, help="seconds per group judgment (rough, browser test)")
    p.add_argument("--out", type=Path, default=Path(__file__).resolve().parent / "out" / "label_budget.json")
    args = p.parse_args(argv)
    info = build(args.cache, images=args.images, seed=args.seed)
    print(f"project: {info['images']} audited images, {info['regions']} regions (built in {info['build_s']} s, cached in {info['root']})", flush=True)
    if args.build_only:
        return 0
    from app.db import make_engine, session_factory
    from app.reliance import model_for_run

    t0 = time.perf_counter()
    world = load_world(info)
    engine = make_engine(world.project)
    with session_factory(engine)() as s:
        model = model_for_run(s, world.run_id)  # the model and sidecar the run recorded
    engine.dispose()
    crowd = demo_crowd(3, args.seed)
    seconds = (args.seconds_single, args.seconds_group)
    truth_verdict, truth = judge(world, model, label_truth(world), None, {}, seconds)
    everything = label_singly(world, sorted(world.region_class), crowd, np.random.default_rng(args.seed), k=3)
    ref_verdict, reference = judge(world, model, everything, None, {"truth": truth}, seconds)
    references = {"everything": reference, "truth": truth}
    rows: list[dict[str, object]] = [_row("truth: each region's true parts, once", "all", truth_verdict, ref_verdict),
                                      _row("everything, k=3", "all", ref_verdict, ref_verdict)]
    # The noise floor of question (ii): everything labelled again by the same crowd with other random draws.
    again = label_singly(world, sorted(world.region_class), crowd, np.random.default_rng(args.seed + 99), k=3)
    rows.append(_row("everything again, k=3 (other draws)", "all", judge(world, model, again, None, references, seconds)[0], ref_verdict))
    print(f"references ready in {time.perf_counter() - t0:.0f} s", flush=True)
    n_all = len(world.predictions)
    fractions = tuple(args.fractions)
    ladder = [int(n_all * f) for f in fractions]
    per_class = [max(10, int(world.predictions["regions"].map(len).sum() * f / 3)) for f in fractions]
    ways: list[tuple[str, Any]] = [
        ("random sample, k=3", lambda i, seed: (random_sample(world, ladder[i], seed), False, False)),
        ("stratified, k=3", lambda i, seed: (stratified_sample(world, per_class[i], seed), False, False)),
        ("stratified + groups, k=3", lambda i, seed: (stratified_sample(world, per_class[i], seed), True, False)),
        ("stratified + groups + adaptive", lambda i, seed: (stratified_sample(world, per_class[i], seed), True, True)),
    ]
    needed: list[list[str]] = []
    for name, make in ways:
        first: dict[str, Verdict] = {}
        for i in range(len(ladder)):
            sample, grouped, adaptive = make(i, args.seed)
            rng = np.random.default_rng(args.seed + 1)
            regions = sample.regions(world)
            labelled = (label_in_groups if grouped else label_singly)(world, regions, crowd, rng, k=3, adaptive=adaptive)
            try:
                verdict, _ = judge(world, model, labelled, sample, references, seconds)
            except AnalysisError as exc:
                rows.append({"way": name, "sample": f"{len(sample.images)} images", "note": str(exc)[:80]})
                continue
            rows.append(_row(name, f"{len(sample.images)} images", verdict, ref_verdict))
            print(rows[-1], flush=True)
            for goal, ok in (("(i)", verdict.cue_ok), ("(ii)", verdict.rules_ok()), ("both", verdict.cue_ok and verdict.rules_ok())):
                if ok and goal not in first:
                    first[goal] = verdict
            if "both" in first:
                break
        needed.append([name] + [_needed(first.get(g), ref_verdict) for g in ("(i)", "(ii)", "both")])
    print()
    print(f"Seconds per judgment (rough, from tests/browser/test_group_flow.py: machine time, keys at a steady pace, no looking): "
          f"single crop {args.seconds_single} s, group judgment {args.seconds_group} s; a grouped crop's own box (what it shows besides "
          f"what the group shares) is counted as a single crop, an assumption (not timed).")
    header = ["way", "sample", "judgments", "x fewer", "people-hours", "cue rank", "cue q", "covering confirms", "(i) cue",
              *(f"(ii) {c[0]}" for c in COMPARISONS)]
    print_table(header, [[r.get(h, r.get("note", "") if h == "judgments" else "") for h in header] for r in rows])
    print()
    print(f"Judgments each way needed (the smallest sample tried that met the goal; x fewer than everything, k=3 = {ref_verdict.judgments:,}); "
          f"(ii) is read tie-aware against everything, k=3:")
    print_table(["way", "(i) cue", "(ii) top-10 rules", "both"], needed)
    args.out.parent.mkdir(parents=True, exist_ok=True)
    args.out.write_text(json.dumps({"build": info, "rows": rows, "needed": needed, "fractions": fractions,
                                    "seconds": {"single": args.seconds_single, "group": args.seconds_group}}, indent=2, default=str))
    print(f"wrote {args.out} ({time.perf_counter() - t0:.0f} s)")
    return 0


def _row(way: str, sample: str, v: Verdict, ref: Verdict) -> dict[str, object]:
    return {"way": way, "sample": sample, "judgments": v.judgments, "x fewer": round(ref.judgments / max(1, v.judgments), 1),
            "people-hours": round(v.people_seconds / 3600, 2), "cue rank": v.cue_rank, "cue q": None if v.cue_q is None else float(f"{v.cue_q:.2g}"),
            "covering confirms": v.cue_confirmed, "(i) cue": v.cue_ok,
            **{f"(ii) {c[0]}": f"{v.matching[c[0]]}/{v.classes}" for c in COMPARISONS}}


def _needed(v: Verdict | None, ref: Verdict) -> str:
    return "not met" if v is None else f"{v.judgments:,} ({ref.judgments / max(1, v.judgments):.1f}x fewer)"


if __name__ == "__main__":
    raise SystemExit(main())
