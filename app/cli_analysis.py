"""Command-line answers over a project folder: ask, check, export and report (the campaign's results)."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from sqlalchemy.orm import Session, sessionmaker

from analysis.expectations import read_expectations, verdict_counts
from analysis.exports import FORMATS
from analysis.interventions import FILLS
from analysis.questions import answer_question

from . import campaigns
from .db import open_project, session_factory
from .errors import AppError
from .reliance import model_for_run
from .services.campaign_analysis import Results, campaign_results
from .services.exports import concepts_export, rules_export
from .services.reliance import expectation_verdicts, run_interventions, running_lookup
from .settings import get_settings


def add_parsers(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    def project(p: argparse.ArgumentParser) -> None:
        p.add_argument("project", type=Path)
        p.add_argument("--campaign", type=int, default=None, help="campaign id (default: the latest)")

    a = sub.add_parser("ask", help='which images show a combination of concepts, e.g. \'tag and not "label band"\'')
    project(a)
    a.add_argument("question")
    a.add_argument("--json", action="store_true")
    c = sub.add_parser("check", help="check a TOML file of expectations (per class: relies_on, must_not_rely_on)")
    project(c)
    c.add_argument("expectations", type=Path)
    c.add_argument("--json", action="store_true")
    c.add_argument("--fail-on-violation", action="store_true", help="exit 3 when an expectation is violated (for release gates)")
    e = sub.add_parser("export", help="write the rule table or the concept table as CSV, JSON or Parquet")
    project(e)
    e.add_argument("--what", choices=["rules", "concepts"], default="rules")
    e.add_argument("--format", choices=list(FORMATS), default="csv")
    e.add_argument("--target", choices=["predicted", "true", "errors"], default="predicted")
    e.add_argument("--max-len", type=int, default=2)
    e.add_argument("--out", type=Path, required=True)
    r = sub.add_parser("report", help="write the self-contained HTML report")
    project(r)
    r.add_argument("--out", type=Path, required=True)
    i = sub.add_parser("interventions", help="test rules by ablating and pasting their concepts (results kept per model version)")
    project(i)
    i.add_argument("--class", dest="cls", help="one class (with --concepts); default: the top rules of every class")
    i.add_argument("--concepts", help="the rule's concepts, joined by ' & ' as in the rule table, e.g. 'tag'")
    i.add_argument("--top", type=int, default=3, help="rules per class to test when no class is given")
    i.add_argument("--fill", choices=list(FILLS), default="blur", help="what covers an ablated region")
    i.add_argument("--draws", type=int, default=5, help="matched random masks per image")
    i.add_argument("--max-images", type=int, default=200)
    i.add_argument("--seed", type=int, default=0)
    i.add_argument("--model", type=Path, help="the model, if it moved since the saliency run")
    i.add_argument("--sidecar", type=Path)
    i.add_argument("--json", action="store_true")
    c.add_argument("--model", type=Path, help="the model, if it moved since the saliency run (to confirm violations)")
    c.add_argument("--sidecar", type=Path)


def _results(args: argparse.Namespace) -> tuple[Results, sessionmaker[Session]]:
    engine = open_project(args.project)
    factory = session_factory(engine)
    with factory() as s:
        found = campaigns.list_campaigns(s)
        if not found:
            raise AppError(f"{args.project} has no campaign yet; create one with 'heedmap campaign'.")
        if args.campaign is None:
            c = found[-1]
        else:
            c = campaigns.get_campaign(s, args.campaign)
        res = campaign_results(s, c)
    return res, factory


def ask(args: argparse.Namespace) -> int:
    res, _ = _results(args)
    ans = answer_question(args.question, res.table)
    if args.json:
        doc = {**{k: v for k, v in ans.__dict__.items() if k != "by_class"}, "by_class": [a.__dict__ for a in ans.by_class]}
        print(json.dumps(doc, indent=1))
        return 0
    print(f"{ans.question}: {ans.n_matching} of {ans.n_images} images")
    print("predicted class, class images, matching, coverage, confidence, lift, q")
    for a in ans.by_class:
        print(f"{a.cls}, {a.class_images}, {a.matching}, {a.coverage:.2f}, {a.confidence:.2f}, {a.lift:.2f}, {a.q_value:.3g}")
    return 0


def check(args: argparse.Namespace) -> int:
    try:
        text = args.expectations.read_text(encoding="utf-8")
    except OSError as exc:
        raise AppError(f"cannot read {args.expectations}: {exc}") from None
    read_expectations(text, source=str(args.expectations))  # a file that does not read fails before the project is opened
    res, factory = _results(args)
    verdicts = expectation_verdicts(res, text, source=str(args.expectations))
    if any(v.expectation.kind == "must_not_rely_on" and v.verdict == "violated" for v in verdicts):
        # A violation of "must not rely on" stands only when an intervention confirms the reliance.
        with factory() as s:
            model = model_for_run(s, res.campaign.run_id, args.model, args.sidecar)
            verdicts = expectation_verdicts(res, text, source=str(args.expectations), lookup=running_lookup(s, Path(args.project), res, model, progress=True))
    if args.json:
        print(json.dumps([{**v.__dict__, "expectation": v.expectation.__dict__} for v in verdicts], indent=1))
    else:
        for v in verdicts:
            print(f"[{v.verdict}] {v.expectation.cls} {v.expectation.kind.replace('_', ' ')} {v.expectation.question}: {v.reason}")
        print(", ".join(f"{n} {k}" for k, n in verdict_counts(verdicts).items()))
        print("A concept audit is evidence for a human review, not a certification.", file=sys.stderr)
    violated = any(v.verdict == "violated" for v in verdicts)
    return 3 if violated and args.fail_on_violation else 0


def export(args: argparse.Namespace) -> int:
    res, _ = _results(args)
    if args.what == "rules":
        found = rules_export(res, args.format, target=args.target, max_len=args.max_len, min_support=get_settings().min_support, prune=True)
    else:
        found = concepts_export(res, args.format)
    args.out.write_bytes(found.body)
    print(f"wrote {args.out}")
    return 0


def report(args: argparse.Namespace) -> int:
    from fastapi.templating import Jinja2Templates

    from .main import UI_DIR
    from .report import build_report

    res, factory = _results(args)
    settings = get_settings(project_dir=args.project)
    with factory() as s:
        html = build_report(Jinja2Templates(directory=str(UI_DIR / "templates")), s, settings, res)
    args.out.write_text(html, encoding="utf-8")
    print(f"wrote {args.out}")
    return 0


def interventions(args: argparse.Namespace) -> int:
    res, factory = _results(args)
    if (args.cls is None) != (args.concepts is None):
        raise AppError("give --class and --concepts together, or neither (then the top rules of every class are tested).")
    if args.cls:
        todo = [(args.cls, [c.strip() for c in args.concepts.split("&") if c.strip()])]
    else:
        rules = res.table.rules(min_support=get_settings().min_support, max_len=2).rules
        todo = [(str(r["class"]), str(r["concepts"]).split(" & ")) for _, g in rules.groupby("class") for _, r in g.head(args.top).iterrows()]
    with factory() as s:
        model = model_for_run(s, res.campaign.run_id, args.model, args.sidecar)
        found = run_interventions(s, Path(args.project), res, model, todo, fill=args.fill, draws=args.draws, max_images=args.max_images,
                                  seed=args.seed, progress=not args.json)
    if args.json:
        print(json.dumps([{"class": c, "concepts": k, "confirmed": r.confirmed if r else None, "ablation": r.ablation.to_json() if r else None,
                           "insertion": r.insertion.to_json() if r and r.insertion else None} for c, k, r in found], indent=1))
        return 0
    for cls, name, r in found:
        if r is None:
            print(f"{cls} / {name}: fewer than two images to test")
            continue
        print(f"{cls} / {name}: {'relies on it (confirmed)' if r.confirmed else 'not confirmed'}")
        print(f"  {r.evidence()}")
    return 0
