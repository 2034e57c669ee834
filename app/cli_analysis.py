"""Command-line answers over a project folder: ask, check, export and report (the campaign's results)."""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

from sqlalchemy.orm import Session, sessionmaker

from analysis.expectations import read_expectations, verdict_counts
from analysis.questions import answer_question
from analysis.reliance import VerdictSettings, judge_family
from analysis.rules import top_rules

from . import campaigns
from .db import open_project, session_factory
from .errors import AppError
from .reliance import model_for_run, untested_reason
from .services.campaign_analysis import Results, campaign_results
from .services.exports import concepts_export, rules_export
from .services.reliance import expectation_verdicts, run_interventions, running_lookup
from .settings import get_settings


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
    settings = read_expectations(text, source=str(args.expectations)).settings
    verdicts = expectation_verdicts(res, text, source=str(args.expectations))
    if any(v.verdict == "not tested" and v.expectation.concepts for v in verdicts):
        # Reliance is decided by covering: run (or read back) the test of every expectation that can have one.
        with factory() as s:
            model = model_for_run(s, res.campaign.run_id, args.model, args.sidecar)
            lookup = running_lookup(s, Path(args.project), res, model, progress=not args.json)
            verdicts = expectation_verdicts(res, text, source=str(args.expectations), lookup=lookup)
    family = next((v.family for v in verdicts if v.family), settings.describe(0))
    if args.json:
        print(json.dumps({"family": family, "min_effect": settings.min_effect, "alpha": settings.alpha, "correction": settings.correction,
                          "verdicts": [v.to_json() for v in verdicts]}, indent=1))
    else:
        print(f"Verdicts rest on covering tests: {family}. Co-occurrence figures are supporting evidence only.")
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
        todo = [(str(r["class"]), str(r["concepts"]).split(" & ")) for _, r in top_rules(rules, args.top).iterrows()]
    try:
        settings = VerdictSettings(min_effect=args.min_effect, alpha=args.alpha, correction=args.correction)
    except ValueError as exc:
        raise AppError(str(exc)) from None
    with factory() as s:
        model = model_for_run(s, res.campaign.run_id, args.model, args.sidecar)
        found = run_interventions(s, Path(args.project), res, model, todo, fills=args.fill, draws=args.draws, max_images=args.max_images,
                                  seed=args.seed, progress=not args.json)
    judged = judge_family([r for _, _, r in found if r is not None], settings)
    n_tests = sum(len(r.coverings) + (r.pasting is not None) for _, _, r in found if r is not None)
    if args.json:
        print(json.dumps([{"class": c, "concepts": k, "reliance": judged[(c, k)].reliance if r else "not tested",
                           "confirmed": judged[(c, k)].confirmed if r else None, "verdict": judged[(c, k)].to_json() if r else None,
                           "ablation": r.coverings[0].to_json() if r else None, "coverings": [t.to_json() for t in r.coverings] if r else [],
                           "insertion": r.pasting.to_json() if r and r.pasting else None, "family": settings.describe(n_tests),
                           "min_effect": settings.min_effect} for c, k, r in found], indent=1))
        return 0
    print(f"Reliance is decided by covering (recolouring to the entity's plain look for an attribute over most of the image); pasting "
          f"('can be steered by it') is shown beside it. {settings.describe(n_tests)}.")
    for cls, name, r in found:
        if r is None:
            why = untested_reason(Path(args.project), res, model.sha256, cls, name.split(" & "), fills=args.fill, draws=args.draws,
                                  max_images=args.max_images, seed=args.seed)
            print(f"{cls} / {name}: not tested ({why or 'fewer than two images of the class show it with a region to cover'})")
            continue
        f = judged[(cls, name)]
        print(f"{cls} / {name}: {f.reliance}; pasting: {f.steering}")
        print(f"  {f.evidence()}")
    return 0
