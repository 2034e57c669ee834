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
from analysis.exports import rules_document
from analysis.rules import mine_rules, to_csv

from .errors import AppError
from .models import ROLES
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
    d.add_argument("--aggregation", choices=list(METHODS), default="majority", help="how the simulated labels become concepts")
    s = sub.add_parser("saliency", help="predict, Grad-CAM and regions for an image set (resumable)")
    s.add_argument("project", type=Path)
    s.add_argument("--model", type=Path, required=True)
    s.add_argument("--sidecar", type=Path, required=True)
    s.add_argument("--images", type=Path, required=True, help="folder with a subfolder per class, or a CSV with path,label")
    s.add_argument("--batch-size", type=int, default=32)
    v = sub.add_parser("serve", help="serve the app over a project folder; prints an admin sign-in link")
    v.add_argument("project", type=Path)
    v.add_argument("--port", type=int, default=None)
    c = sub.add_parser("campaign", help="create a labelling campaign over a saliency run")
    c.add_argument("project", type=Path)
    c.add_argument("--name", required=True)
    c.add_argument("--run", type=int, default=None, help="saliency run id (default: the latest)")
    c.add_argument("--classes", default="", help="comma-separated predicted classes to include (default: all)")
    c.add_argument("--per-region", type=int, default=3, help="annotators per region")
    c.add_argument("--instructions", type=Path, help="a text file shown to annotators")
    c.add_argument("--check-every", type=int, default=10, help="mix in a check item about once in this many tasks")
    c.add_argument("--lease-minutes", type=float, default=10.0, help="how long a handed-out region is held for its annotator")
    c.add_argument("--method", choices=list(METHODS), default="majority", help="label aggregation for the results")
    i = sub.add_parser("invite", help="make, list or revoke invite links")
    i.add_argument("project", type=Path)
    i.add_argument("--name", help="the person's name")
    i.add_argument("--role", choices=list(ROLES), default="annotator")
    i.add_argument("--campaign", type=int, default=None, help="tie an annotator to one campaign")
    i.add_argument("--days", type=float, default=14.0)
    i.add_argument("--note", default="")
    i.add_argument("--base-url", default=None, help="where the app is served (default http://127.0.0.1:PORT)")
    i.add_argument("--list", action="store_true", help="list invites instead")
    i.add_argument("--revoke", type=int, metavar="INVITE_ID", help="revoke an invite instead")
    k = sub.add_parser("checks", help="mark regions of a campaign as check items from a CSV region,answer")
    k.add_argument("project", type=Path)
    k.add_argument("--campaign", type=int, required=True)
    k.add_argument("file", type=Path, help="CSV with columns region,answer (answer like 'cap: red; label band'; empty = nothing recognisable)")
    r = sub.add_parser("rules", help="concept rules from a 0/1 table (rows images, one column per concept)")
    r.add_argument("table", type=Path)
    r.add_argument("--target", required=True, help="column holding each image's class")
    r.add_argument("--min-support", type=float, default=0.02, help="fraction of all images holding the set and the class")
    r.add_argument("--min-count", type=int, default=1, help="fewest images holding the set and the class")
    r.add_argument("--max-len", type=int, default=2, help="most concepts in a rule")
    r.add_argument("--min-lift", type=float, default=1.0)
    r.add_argument("--prune", action="store_true", help="drop rules whose set adds no confidence over a subset")
    r.add_argument("--json", action="store_true")
    from .cli_analysis import add_parsers

    add_parsers(sub)
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


def _read_text_csv(path: Path, columns: tuple[str, ...]) -> pd.DataFrame:
    """A CSV read as text, with the columns it must have; errors name the file and what is missing."""
    try:
        frame = pd.read_csv(path, dtype=str, keep_default_na=False)
    except (OSError, pd.errors.ParserError, pd.errors.EmptyDataError) as exc:
        raise AppError(f"cannot read {path}: {exc}") from None
    if not set(columns) <= set(frame.columns):
        raise AppError(f"{path} needs the columns {','.join(columns)}; it has {list(frame.columns)}.")
    return frame


def _factory(project: Path):  # type: ignore[no-untyped-def]
    from .db import make_engine, session_factory

    return session_factory(make_engine(project))


def _serve(project: Path, port: int | None) -> None:
    import uvicorn

    from .db import write_session
    from .main import create_app
    from .people import create_invite

    from .db import make_engine, session_factory

    settings = get_settings(project_dir=project, port=port)
    engine = make_engine(project)
    with write_session(session_factory(engine)) as s:
        _, token = create_invite(s, name="admin", role="admin", days=1, note="start-up link of heedmap serve")
    engine.dispose()
    base = f"http://{settings.host}:{settings.port}"
    print(f"heedmap is serving {project} at {base}/", flush=True)
    print(f"sign in as admin (link valid for a day): {base}/join/{token}", flush=True)
    uvicorn.run(create_app(settings), host=settings.host, port=settings.port, log_level="warning")


def _campaign(args: argparse.Namespace) -> int:
    from . import store
    from .campaigns import create_campaign
    from .db import write_session

    factory = _factory(args.project)
    with write_session(factory) as s:
        run_id = args.run or store.latest_run_id(s)
        if run_id is None:
            raise AppError(f"{args.project} has no saliency run yet; run 'heedmap saliency' first.")
        instructions = ""
        if args.instructions:
            try:
                instructions = args.instructions.read_text(encoding="utf-8")
            except OSError as exc:
                raise AppError(f"cannot read {args.instructions}: {exc}") from None
        classes = [c.strip() for c in args.classes.split(",") if c.strip()]
        cid = create_campaign(s, name=args.name, run_id=run_id, classes=classes, labels_per_region=args.per_region, instructions=instructions,
                              lease_seconds=int(args.lease_minutes * 60), check_every=args.check_every, method=args.method)
    print(f"campaign {cid} ({args.name}) over run {run_id}")
    return 0


def _invite(args: argparse.Namespace) -> int:
    from .db import write_session
    from .models import utcnow
    from .people import create_invite, list_invites, revoke_invite

    factory = _factory(args.project)
    with write_session(factory) as s:
        if args.list:
            now = utcnow()
            print("id,person,role,campaign,state,expires,last_used,note")
            for inv in list_invites(s):
                used = inv.last_used_at.isoformat(timespec="minutes") if inv.last_used_at else ""
                print(f"{inv.id},{inv.person},{inv.role},{inv.campaign_id or ''},{inv.state(now)},{inv.expires_at.isoformat(timespec='minutes')},{used},{inv.note}")
            return 0
        if args.revoke is not None:
            revoke_invite(s, args.revoke)
            print(f"invite {args.revoke} revoked")
            return 0
        if not args.name:
            raise AppError("give --name for the person to invite (or --list, or --revoke ID).")
        if args.campaign is not None:
            from .campaigns import get_campaign

            get_campaign(s, args.campaign)
        invite_id, token = create_invite(s, name=args.name, role=args.role, campaign_id=args.campaign, days=args.days, note=args.note)
    base = (args.base_url or f"http://127.0.0.1:{get_settings().port}").rstrip("/")
    print(f"invite {invite_id} for {args.name} ({args.role}), valid {args.days:g} days:")
    print(f"{base}/join/{token}")
    return 0


def _checks(args: argparse.Namespace) -> int:
    from analysis.concepts import parse_label_text
    from analysis.errors import InvalidInputError

    from .campaigns import set_check_answer
    from .db import write_session

    frame = _read_text_csv(args.file, ("region", "answer"))
    parsed = []
    for line, (region, answer) in enumerate(zip(frame["region"], frame["answer"]), start=2):
        if not str(region).strip().isdigit():
            raise AppError(f"{args.file} line {line}: region must be a region id (a number); got {region!r}.")
        try:
            parsed.append((int(region), parse_label_text(answer)))
        except InvalidInputError as exc:
            raise AppError(f"{args.file} line {line}: {exc}") from None
    # All or nothing: one transaction, so a bad line stores none of them.
    with write_session(_factory(args.project)) as s:
        for region, entities in parsed:
            set_check_answer(s, campaign_id=args.campaign, region_id=region, entities=entities)
    print(f"{len(parsed)} check items set in campaign {args.campaign}")
    return 0


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
    table = mine_rules(concepts.astype(bool), frame[args.target].astype(str), min_support=args.min_support, max_len=args.max_len,
                       min_count=args.min_count, min_lift=args.min_lift, prune=args.prune)
    if args.json:
        print(json.dumps(rules_document(table, source=str(args.table), target=args.target), indent=2))
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
        gold = _read_text_csv(args.known, ("item", "label"))
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

            summary = run_demo(args.out, size=args.size, cue=args.cue, seed=args.seed, annotators=args.simulate_annotators, method=args.aggregation)
            print(json.dumps(summary, indent=2))
            print(f"wrote {args.out / 'demo.json'}" + (f" and {args.out / 'rules.csv'}" if args.simulate_annotators else ""))
            if not args.no_serve:
                _serve(args.out / "project", args.port)
        elif args.command == "saliency":
            from analysis.images import find_images
            from analysis.model_io import load_model

            from .db import make_engine, session_factory
            from .jobs import register_images, run_saliency

            model = load_model(args.model, args.sidecar)
            factory = session_factory(make_engine(args.project))
            problems = register_images(factory, find_images(args.images))
            rep = run_saliency(factory, args.project, model, batch_size=args.batch_size, model_files=(args.model, args.sidecar))
            for path, why in problems + rep.skipped:
                print(f"skipped: {why}", file=sys.stderr)
            print(f"run {rep.run_id}: {rep.processed} images processed, {rep.already_done} already done, {rep.regions} regions, {rep.empty_maps} empty maps, {len(problems) + len(rep.skipped)} skipped")
        elif args.command == "serve":
            _serve(args.project, args.port)
        elif args.command == "campaign":
            return _campaign(args)
        elif args.command == "invite":
            return _invite(args)
        elif args.command == "checks":
            return _checks(args)
        elif args.command in ("ask", "check", "export", "report", "interventions"):
            from . import cli_analysis

            return int(getattr(cli_analysis, args.command)(args))
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
