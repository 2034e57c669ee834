"""The `heedmap` command line."""

from __future__ import annotations

import argparse
import json
import sys
import traceback
from pathlib import Path

import pandas as pd

from analysis.errors import AnalysisError
from analysis.reliability import METHODS
from analysis.rules import mine_rules, to_csv

from .errors import AppError
from .settings import SettingsError, get_settings


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="heedmap", description="Which visual concepts does an image classifier rely on?")
    p.add_argument("--debug", action="store_true", help="show tracebacks")
    sub = p.add_subparsers(dest="command", required=True)
    d = sub.add_parser("demo", help="recycling-sorter demo end to end, then serve the app")
    d.add_argument("--out", type=Path, default=Path("heedmap-demo"))
    d.add_argument("--no-serve", action="store_true")
    d.add_argument("--simulate-annotators", type=int, default=3, metavar="N")
    d.add_argument("--size", choices=["default", "small"], default="default")
    d.add_argument("--cue", choices=["tag", "belt", "object", "none"], default="tag")
    d.add_argument("--seed", type=int, default=0)
    d.add_argument("--port", type=int, default=None)
    s = sub.add_parser("saliency", help="predict, Grad-CAM and regions for an image set (resumable)")
    s.add_argument("project", type=Path)
    s.add_argument("--model", type=Path, required=True)
    s.add_argument("--sidecar", type=Path, required=True)
    s.add_argument("--images", type=Path, required=True, help="folder with a subfolder per class, or a CSV with path,label")
    s.add_argument("--batch-size", type=int, default=32)
    v = sub.add_parser("serve", help="serve the annotation app over a project folder")
    v.add_argument("project", type=Path)
    v.add_argument("--port", type=int, default=None)
    r = sub.add_parser("rules", help="concept rules from a 0/1 table (rows images, one column per concept)")
    r.add_argument("table", type=Path)
    r.add_argument("--target", required=True, help="column holding each image's class")
    r.add_argument("--min-support", type=float, default=0.02)
    r.add_argument("--max-len", type=int, default=2)
    r.add_argument("--json", action="store_true")
    g = sub.add_parser("agreement", help="agreement among annotators from a LABELS.csv (item,annotator,label)")
    g.add_argument("labels", type=Path)
    g.add_argument("--bootstrap", type=int, default=1000, metavar="N", help="resamples for alpha's 95%% interval (0 = none)")
    g.add_argument("--seed", type=int, default=0)
    g.add_argument("--json", action="store_true")
    a = sub.add_parser("aggregate", help="one label per item from a LABELS.csv, with posteriors and annotator estimates")
    a.add_argument("labels", type=Path)
    a.add_argument("--method", choices=list(METHODS), default="dawid-skene", help="one-coin = Dawid-Skene with one accuracy per annotator (sparse data)")
    a.add_argument("--known", type=Path, help="CSV item,label of check items with known answers, held fixed")
    a.add_argument("--threshold", type=float, default=0.0, help="leave an item's label empty below this posterior")
    a.add_argument("--json", action="store_true")
    return p


def _serve(project: Path, port: int | None, labels_per_region: int | None = None) -> None:
    import uvicorn

    from .main import create_app

    settings = get_settings(project_dir=project, port=port, labels_per_region=labels_per_region)
    print(f"heedmap is serving {project} at http://{settings.host}:{settings.port}/", flush=True)
    uvicorn.run(create_app(settings), host=settings.host, port=settings.port, log_level="warning")


def _rules(args: argparse.Namespace) -> int:
    try:
        frame = pd.read_csv(args.table)
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise AppError(f"cannot read {args.table}: {exc}") from None
    if args.target not in frame.columns:
        raise AppError(f"{args.table} has no column {args.target!r}; its columns are {list(frame.columns)}.")
    concepts = frame.drop(columns=[args.target])
    bad = [c for c in concepts.columns if not concepts[c].isin([0, 1, True, False]).all()]
    if bad:
        raise AppError(f"concept columns must hold only 0/1; {bad[:5]} do not. Drop or recode them.")
    table = mine_rules(concepts.astype(bool), frame[args.target].astype(str), min_support=args.min_support, max_len=args.max_len)
    if args.json:
        print(json.dumps({"n_images": table.n_images, "min_support": table.min_support, "rules": table.rules.to_dict("records")}, indent=2))
    else:
        sys.stdout.write(to_csv(table.rules))
    return 0


def _agreement(args: argparse.Namespace) -> int:
    from analysis.agreement_report import agreement_report
    from analysis.long_labels import read_long_labels

    rep = agreement_report(read_long_labels(args.labels), n_boot=args.bootstrap, seed=args.seed)
    if args.json:
        print(json.dumps(rep.to_dict(), indent=2))
        return 0
    print(f"{rep.n_items} items, {rep.n_annotators} annotators, {rep.n_judgments} judgments; {rep.n_pairable} items rated twice or more")
    if rep.alpha is None:
        print(f"Krippendorff's alpha (nominal): undefined - {rep.alpha_note}")
    else:
        ci = f" (95% bootstrap interval {rep.alpha_interval[0]:.3f} to {rep.alpha_interval[1]:.3f})" if rep.alpha_interval else ""
        print(f"Krippendorff's alpha (nominal): {rep.alpha:.3f}{ci}")
    print(f"Fleiss' kappa: {rep.fleiss:.3f}" if rep.fleiss is not None else f"Fleiss' kappa: {rep.fleiss_note}")
    print("annotator, judgments, agreement with others, mean Cohen's kappa")
    for a in rep.annotators:
        fmt = lambda v: "-" if v is None else f"{v:.3f}"  # noqa: E731
        print(f"{a.annotator}, {a.judgments}, {fmt(a.agreement_with_others)}, {fmt(a.mean_kappa)}")
    return 0


def _aggregate(args: argparse.Namespace) -> int:
    from analysis.label_aggregation import aggregate_labels
    from analysis.long_labels import read_long_labels

    labels = read_long_labels(args.labels)
    known: dict[str, str] = {}
    if args.known:
        try:
            gold = pd.read_csv(args.known, dtype=str, keep_default_na=False)
        except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
            raise AppError(f"cannot read {args.known}: {exc}") from None
        if not {"item", "label"} <= set(gold.columns):
            raise AppError(f"{args.known} needs the columns item,label; it has {list(gold.columns)}.")
        known = {str(i).strip(): str(v).strip() for i, v in zip(gold["item"], gold["label"])}
    _, summary = aggregate_labels(labels, method=args.method, known=known, threshold=args.threshold)
    if args.json:
        print(json.dumps(summary, indent=2))
        return 0
    state = "converged" if summary["converged"] else "did NOT converge"
    print(f"{summary['method']}: {len(summary['items'])} items, {state} after {summary['iterations']} iterations")
    print("item,label,probability,ratings")
    for it in summary["items"]:
        print(f"{it['item']},{it['label'] or ''},{it['probability']:.4f},{it['ratings']}")
    return 0


def main(argv: list[str] | None = None) -> int:
    import warnings

    warnings.filterwarnings("ignore", message="`torch.jit", category=DeprecationWarning)
    args = _parser().parse_args(argv)
    try:
        if args.command == "demo":
            from .demo import run_demo

            summary = run_demo(args.out, size=args.size, cue=args.cue, seed=args.seed, annotators=args.simulate_annotators)
            print(json.dumps(summary, indent=2))
            print(f"wrote {args.out / 'demo.json'}" + (f" and {args.out / 'rules.csv'}" if args.simulate_annotators else ""))
            if not args.no_serve:
                # Simulated people already gave each region their labels; leave room for real ones.
                _serve(args.out / "project", args.port, labels_per_region=args.simulate_annotators + 2)
        elif args.command == "saliency":
            from analysis.images import find_images
            from analysis.model_io import load_model

            from .db import make_engine, session_factory
            from .jobs import register_images, run_saliency

            model = load_model(args.model, args.sidecar)
            factory = session_factory(make_engine(args.project))
            problems = register_images(factory, find_images(args.images))
            rep = run_saliency(factory, args.project, model, batch_size=args.batch_size)
            for path, why in problems + rep.skipped:
                print(f"skipped: {why}", file=sys.stderr)
            print(f"run {rep.run_id}: {rep.processed} images processed, {rep.already_done} already done, {rep.regions} regions, {rep.empty_maps} empty maps, {len(problems) + len(rep.skipped)} skipped")
        elif args.command == "serve":
            _serve(args.project, args.port)
        elif args.command == "rules":
            return _rules(args)
        elif args.command == "agreement":
            return _agreement(args)
        elif args.command == "aggregate":
            return _aggregate(args)
    except (AnalysisError, AppError, SettingsError) as exc:
        if args.debug:
            traceback.print_exc()
        print(f"heedmap: {getattr(exc, 'message', exc)}", file=sys.stderr)
        return 1
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
