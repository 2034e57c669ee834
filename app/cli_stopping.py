"""`heedmap stopping`: per predicted class whether its top rules have settled, closing a class early or opening it again.

The parser imports nothing heavy (see app.cli); the command imports what it needs when it runs.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from sqlalchemy.orm import Session


def add_stopping_parser(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser("stopping", help="per class, whether its top rules have settled; close a class early (its regions leave the queue)")
    p.add_argument("project", type=Path)
    p.add_argument("--campaign", default=None, help="campaign name or id (default: the latest)")
    what = p.add_mutually_exclusive_group()
    what.add_argument("--close", metavar="CLASS", help="close this predicted class early: its regions are handed out no more")
    what.add_argument("--reopen", metavar="CLASS", help="open a class closed early again")
    p.add_argument("--json", action="store_true")


def _campaign_id(s: Session, project: Path, given: str | None) -> int:
    from sqlalchemy import select

    from .errors import AppError
    from .models import Campaign

    if given is None:
        found = s.scalar(select(Campaign.id).order_by(Campaign.id.desc()).limit(1))
        if found is None:
            raise AppError(f"{project} has no campaign yet; create one with 'heedmap campaign'.")
        return int(found)
    by_name = s.scalar(select(Campaign.id).where(Campaign.name == given))
    if by_name is not None:
        return int(by_name)
    if given.isdigit() and s.get(Campaign, int(given)) is not None:
        return int(given)
    names = list(s.scalars(select(Campaign.name).order_by(Campaign.id)))
    raise AppError(f"{project} has no campaign {given!r}; give a name or id of one of: {', '.join(map(repr, names)) or 'none yet'}.")


def stopping(args: argparse.Namespace) -> int:
    from datetime import UTC, datetime

    from . import campaigns
    from .campaigns.plans import budget_left, judgments_given
    from .db import open_project, session_factory, write_session
    from .services.stopping import TOP_RULES, stopping_status
    from .settings import get_settings

    factory = session_factory(open_project(args.project))
    with factory() as s:
        cid = _campaign_id(s, args.project, args.campaign)
    changed = args.close or args.reopen
    was_closed = False
    if changed:
        with factory() as s:
            before = campaigns.plan_of(s, cid)
            was_closed = before is not None and changed in before.closed_classes
        with write_session(factory) as s:
            campaigns.close_class(s, campaign_id=cid, cls=changed, closed=bool(args.close))
    settings = get_settings(project_dir=args.project)
    with factory() as s:
        c = campaigns.get_campaign(s, cid)
        status = stopping_status(s, c, min_support=settings.min_support)
        plan = campaigns.plan_of(s, cid)
        given = judgments_given(s, cid)
        left = budget_left(s, campaign_id=cid, person_id=0, now=datetime.now(UTC)) if plan and plan.budget else None
    closed = set(status.closed)
    rows = [{"class": k.cls, "settled": k.settled, "closed": k.cls in closed, "top rules": list(k.top), "why": k.reason} for k in status.classes]
    budget = plan.budget if plan else None
    if args.json:
        print(json.dumps({"campaign": c.id, "name": c.name, "judgments": status.judgments, "window": status.window, "budget": budget,
                          "judgments_given": given, "budget_left": left, "classes": rows}, indent=1))
        return 0
    if changed:
        state = ("already closed" if was_closed else "closed early") if args.close else ("open again" if was_closed else "was not closed; nothing changed")
        print(f"class {changed!r} {state} in campaign {c.id} ({c.name})")
    spent = f"; budget {budget:,} judgments, {given:,} given, {left or 0:,} left to hand out" if budget else ""
    print(f"campaign {c.id} ({c.name}): {status.judgments:,} judgments; top {TOP_RULES} rules compared over the last {status.window} judgments{spent}")
    print("Settled is a rule of thumb (intervals separated, order unchanged), not a test with a stated error rate.")
    for k in status.classes:
        state = "closed early" if k.cls in closed else ("settled" if k.settled else "not settled")
        print(f"{k.cls}: {state}; top rules: {', '.join(k.top) or '-'}; {k.reason}")
    return 0
