"""Do a sampled campaign's estimates hit the rates of all the images, and do their intervals cover them 95% of the time?

    .venv/bin/python -m benchmarks.sampling_coverage            # 20,000 images, 300 repeated samples
    .venv/bin/python -m benchmarks.sampling_coverage --quick    # 5,000 images, 100 samples

The population is synthetic (rows only, concepts known exactly, no labelling noise): three predicted
classes of unequal size (60/30/10%), about 3% confident errors, and a "shortcut" concept shown far
more often on the errors. Each repeat draws the campaign's stratified sample (analysis.sampling:
the same allocation as ``heedmap campaign --regions-per-class``) and computes the rule "shortcut =>
class" both ways: weighted (mine_rules with a design, analysis.weighted_rules: Hajek ratios, linearised variance) and naive
(the sample's own counts, mine_rules, as if every image had been labelled). The table prints, side by
side, each one's mean error against the population's value and how often its 95% interval covers it.
This measures the sampling error only: labels are taken as given.
"""

from __future__ import annotations

import argparse

import numpy as np
import pandas as pd

from analysis.rules import mine_rules
from analysis.sampling import Design, Stratum, allocate, draw_sample, stratum_kinds, wilson

from .measure import print_table

CLASSES = ("bottle", "can", "carton")


def population(n: int, *, seed: int) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    predicted = rng.choice(CLASSES, size=n, p=[0.6, 0.3, 0.1])
    confidence = np.where(rng.random(n) < 0.8, rng.uniform(0.8, 1.0, n), rng.uniform(0.34, 0.8, n))
    wrong = rng.random(n) < np.where(confidence >= 0.8, 0.04, 0.25)
    others = {c: [o for o in CLASSES if o != c] for c in CLASSES}
    true = np.array([rng.choice(others[p]) if w else p for p, w in zip(predicted, wrong)])
    # The shortcut: shown on 70% of errors predicted "can", 20% of other "can" images, 5% elsewhere.
    p_short = np.where(predicted == "can", np.where(wrong, 0.7, 0.2), 0.05)
    shortcut = rng.random(n) < p_short
    cap = rng.random(n) < np.where(predicted == "bottle", 0.8, 0.2)
    return pd.DataFrame({"predicted": predicted, "true": true, "confidence": confidence, "shortcut": shortcut, "cap": cap})


def truth(pop: pd.DataFrame, concept: str, cls: str) -> dict[str, float]:
    x, y = pop[concept].to_numpy(), (pop["predicted"] == cls).to_numpy()
    conf = (x & y).sum() / x.sum()
    return {"confidence": conf, "support": (x & y).mean(), "lift": conf / y.mean(), "presence": (x & y).sum() / y.sum()}


def run(n: int, repeats: int, regions_per_class: int, seed: int = 0) -> list[list[object]]:
    pop = population(n, seed=seed)
    kinds = stratum_kinds(pop["predicted"].tolist(), pop["true"].tolist(), pop["confidence"].to_numpy(), confident_at=0.8)
    pop["stratum"] = [f"{p} / {k}" for p, k in zip(pop["predicted"], kinds)]
    members = {name: list(g.index) for name, g in pop.groupby("stratum")}
    strata = [Stratum(name.split(" / ")[0], name.split(" / ")[1], len(ids), len(ids)) for name, ids in members.items()]  # type: ignore[arg-type]
    sizes = allocate(strata, regions_per_class=regions_per_class)
    names = sorted(members)
    population_sizes = np.array([float(len(members[s])) for s in names])
    rows = []
    for concept, cls in (("shortcut", "can"), ("cap", "bottle"), ("shortcut", "carton")):
        want = truth(pop, concept, cls)
        got: dict[str, list[float]] = {k: [] for k in ("w_conf", "n_conf", "w_lift", "n_lift", "w_pres", "n_pres")}
        cover: dict[str, list[bool]] = {k: [] for k in ("w_conf", "n_conf", "w_lift", "w_pres", "n_pres")}
        for r in range(repeats):
            drawn = draw_sample(members, sizes, seed=seed * 100_000 + r)
            ids = sorted(drawn)
            sample = pop.loc[ids]
            table = sample[["shortcut", "cap"]].reset_index(drop=True)
            classes = sample["predicted"].reset_index(drop=True)
            design = Design(np.array([names.index(drawn[i][0]) for i in ids], dtype=np.int64), population_sizes)
            w = mine_rules(table, classes, design=design, min_support=1e-6, min_lift=-np.inf, max_len=1).rules.set_index(["class", "concepts"])
            u = mine_rules(table, classes, min_support=1e-6, min_lift=-np.inf, max_len=1).rules.set_index(["class", "concepts"])
            if (cls, concept) not in w.index or (cls, concept) not in u.index:
                continue
            a, b = w.loc[(cls, concept)], u.loc[(cls, concept)]
            got["w_conf"].append(a["confidence"])
            got["n_conf"].append(b["confidence"])
            got["w_lift"].append(a["lift"])
            got["n_lift"].append(b["lift"])
            got["w_pres"].append(a["presence_share"])
            n_pres = b["n_images"] / b["class_images"]
            got["n_pres"].append(n_pres)
            cover["w_conf"].append(a["confidence_low"] <= want["confidence"] <= a["confidence_high"])
            lo, hi = wilson(b["confidence"], b["concept_images"])
            cover["n_conf"].append(float(lo) <= want["confidence"] <= float(hi))
            cover["w_lift"].append(a["lift_low"] <= want["lift"] <= a["lift_high"])
            cover["w_pres"].append(a["presence_share_low"] <= want["presence"] <= a["presence_share_high"])
            lo, hi = wilson(n_pres, b["class_images"])
            cover["n_pres"].append(float(lo) <= want["presence"] <= float(hi))
        label = f"{concept} => {cls}"
        rows.append([label, "confidence", f"{want['confidence']:.3f}", f"{np.mean(got['w_conf']):.3f}", f"{np.mean(got['n_conf']):.3f}",
                     f"{np.mean(cover['w_conf']):.2f}", f"{np.mean(cover['n_conf']):.2f}"])
        rows.append([label, "presence share", f"{want['presence']:.3f}", f"{np.mean(got['w_pres']):.3f}", f"{np.mean(got['n_pres']):.3f}",
                     f"{np.mean(cover['w_pres']):.2f}", f"{np.mean(cover['n_pres']):.2f}"])
        rows.append([label, "lift", f"{want['lift']:.2f}", f"{np.mean(got['w_lift']):.2f}", f"{np.mean(got['n_lift']):.2f}",
                     f"{np.mean(cover['w_lift']):.2f}", "-"])
    print(f"{n:,} images, {repeats} samples of about {regions_per_class} images per class ({sum(sizes.values())} images each)")
    return rows


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0] if __doc__ else "")
    ap.add_argument("--quick", action="store_true")
    args = ap.parse_args(argv)
    n, repeats = (5_000, 100) if args.quick else (20_000, 300)
    rows = run(n, repeats, regions_per_class=200)
    print_table(["rule", "rate", "population", "weighted mean", "naive mean", "weighted 95% covers", "naive 95% covers"], rows)


if __name__ == "__main__":
    main()
