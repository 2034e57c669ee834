"""Does heedmap find what the model wrongly relies on? For each kind of injected cue and several seeds:
generate the sorter-belt data, train, confirm the model learned the cue (accuracy falls on the
counterfactual split), run saliency, regions, simulated annotators, aggregation and rules, and
record the injected concept's rank among its class's rules and its lift; the control run (no cue)
must show no such rule. Also the pointing game of the maps on the part masks (Zhang et al., 2016).

    .venv/bin/python -m benchmarks.bias_recovery            # default size, seeds 0-2
    .venv/bin/python -m benchmarks.bias_recovery --quick    # small size, seed 0
    .venv/bin/python -m benchmarks.bias_recovery --seeds 1 --cues belt   # default size, seed 0, the green belt only

Writes bias_recovery.csv and bias_recovery.json into --out (default benchmarks/out).
"""

from __future__ import annotations

import argparse
import json
import tempfile
from pathlib import Path

import pandas as pd

from app.demo import demo_pointing_game, names_cue, run_demo
from demo_data.scenes import CUE_CONCEPTS

from .measure import print_table

CUES = ("tag", "belt", "object", "none")


def one_run(cue: str, seed: int, size: str, aggregation: str, group_size: int = 12) -> dict[str, object]:
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp)
        summary = run_demo(out, size=size, cue=cue, seed=seed, annotators=3, method=aggregation, group_size=group_size)  # type: ignore[arg-type]
        game = demo_pointing_game(out)
        rules = pd.read_csv(out / "rules.csv")
    can = rules[rules["class"] == "can"]
    # A rule names the cue when it is the cue or a refinement of it ("yellow tag"); refinements share their family's rank.
    named = [any(names_cue(str(c), cue_name, str(f)) for cue_name in CUE_CONCEPTS.values()) for c, f in zip(can["concepts"], can["family"].fillna(""))]
    cue_rules = can[pd.Series(named, index=can.index, dtype=bool)]
    acc = summary["accuracy"]  # type: ignore[index]
    rule = summary.get("cue_rule") or {}
    verdict = summary.get("cue_reliance") or {}
    return {
        "cue": cue, "seed": seed, "concept": CUE_CONCEPTS.get(cue, "(control)"),
        "test_accuracy": round(float(acc["test"]), 3), "counterfactual_accuracy": round(float(acc["counterfactual"]), 3),  # type: ignore[index]
        "learned_cue": bool(acc["test"] - acc["counterfactual"] > 0.2) if cue != "none" else None,  # type: ignore[index]
        "rank": rule.get("rank"), "rule": rule.get("concepts"), "lift": round(float(rule["lift"]), 2) if rule else None,  # type: ignore[union-attr]
        "n_can_rules": len(can), "cue_concept_rules_in_class": len(cue_rules), "cue_families_in_class": int(cue_rules["family"].nunique()),
        "cue_verdict": (f"{verdict['reliance']} ({verdict['effect']:.2f})" if verdict.get("effect") is not None else str(verdict["reliance"])) if verdict  # type: ignore[index, union-attr, str-format]
        else ("not testable or not tested" if cue != "none" else None),
        "pointing_game": round(game.hit_rate, 3), "pointing_chance": round(game.chance_rate, 3),
        "seconds": round(sum(summary["timings"].values()), 1),  # type: ignore[union-attr]
    }


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true", help="small data, one seed")
    p.add_argument("--seeds", type=int, default=None, help="how many seeds (default 3, or 1 with --quick)")
    p.add_argument("--aggregation", default="majority", choices=["majority", "dawid-skene", "one-coin"])
    p.add_argument("--cues", nargs="*", choices=list(CUES), help="run only these cues (default: every cue and the control)")
    p.add_argument("--group-size", type=int, default=12, help="crops per labelling group, as `heedmap demo` labels (default 12); 0: one region at a time")
    p.add_argument("--out", type=Path, default=Path("benchmarks/out"))
    args = p.parse_args(argv)
    size = "small" if args.quick else "default"
    seeds = range(args.seeds or (1 if args.quick else 3))
    rows = []
    for cue in args.cues or CUES:
        for seed in seeds:
            rows.append(one_run(cue, seed, size, args.aggregation, args.group_size))
            print(f"{cue} seed {seed}: rank {rows[-1]['rank']}, lift {rows[-1]['lift']}", flush=True)
    frame = pd.DataFrame(rows)
    args.out.mkdir(parents=True, exist_ok=True)
    frame.to_csv(args.out / "bias_recovery.csv", index=False)
    (args.out / "bias_recovery.json").write_text(json.dumps({"size": size, "aggregation": args.aggregation, "group_size": args.group_size, "runs": rows}, indent=1))
    cols = ["cue", "seed", "concept", "test_accuracy", "counterfactual_accuracy", "rank", "rule", "lift", "cue_concept_rules_in_class", "cue_families_in_class", "cue_verdict", "pointing_game",
            "pointing_chance"]
    return print_table(["cue", "seed", "injected concept", "test acc", "counterfactual acc", "rank in class", "top cue rule", "lift", "cue rules in 'can'",
                        "cue families in 'can'", "cue rule's covering verdict (effect)", "pointing game", "chance"],
                       frame[cols].astype(object).where(frame[cols].notna(), "-").to_numpy().tolist())


if __name__ == "__main__":
    main()
