"""`heedmap embed` and `heedmap groups`: region embeddings of a run, and groups of similar regions for a campaign.

The parsers import nothing heavy (see app.cli); each command imports what it needs when it runs.
"""

from __future__ import annotations

import argparse
from pathlib import Path


def add_group_parsers(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    e = sub.add_parser("embed", help="describe every region of a saliency run by the model's own target-layer features (for groups)")
    e.add_argument("project", type=Path)
    e.add_argument("--run", default=None, help="saliency run id or name (default: the latest run)")
    e.add_argument("--model", type=Path, default=None, help="the run's model, when it moved since the run (default: the path the run recorded)")
    e.add_argument("--sidecar", type=Path, default=None, help="the run's sidecar, when it moved since the run")
    e.add_argument("--batch-size", type=int, default=64)
    g = sub.add_parser("groups", help="group a campaign's similar regions for grouped labelling (after `heedmap embed`)")
    g.add_argument("project", type=Path)
    g.add_argument("--campaign", required=True, help="campaign name or id")
    g.add_argument("--size", type=int, default=12, help="crops per group, 8-16")
    g.add_argument("--max-class-share", type=float, default=0.5, help="the most one predicted class may be of a group, so groups do not lead")
    g.add_argument("--seed", type=int, default=0)


def embed(args: argparse.Namespace) -> int:
    from .db import open_project, session_factory
    from .embeddings import embed_run
    from .errors import AppError
    from .jobs import find_run
    from .reliance import model_for_run

    if not 1 <= args.batch_size <= 4096:
        raise AppError(f"--batch-size must be 1-4096; got {args.batch_size}.")
    factory = session_factory(open_project(args.project))
    with factory() as s:
        run_id = find_run(s, args.run)
        if run_id is None:
            what = f"no saliency run {args.run!r}" if args.run is not None else "no saliency run yet"
            raise AppError(f"{args.project} has {what}; 'heedmap runs {args.project}' lists them.")
        model = model_for_run(s, run_id, args.model, args.sidecar)
    report = embed_run(factory, args.project, run_id, model, batch_size=args.batch_size)
    print(f"run {run_id}: {report.regions} regions embedded ({report.dimensions} features of layer {report.layer!r}) in {report.seconds:.1f} s "
          f"-> {report.file}" + (f"; {report.skipped_images} images could not be read and were left out" if report.skipped_images else ""))
    return 0


def groups(args: argparse.Namespace) -> int:
    import math

    from sqlalchemy import select

    from . import campaigns
    from .db import open_project, session_factory, write_session
    from .embeddings import load_embeddings
    from .errors import AppError
    from .models import Campaign

    if not math.isfinite(args.max_class_share):
        raise AppError(f"--max-class-share must be a fraction, e.g. 0.5; got {args.max_class_share}.")
    factory = session_factory(open_project(args.project))
    with write_session(factory) as s:
        ref = str(args.campaign).strip()
        cid = s.scalar(select(Campaign.id).where(Campaign.name == ref))
        if cid is None and ref.isdigit():
            cid = s.scalar(select(Campaign.id).where(Campaign.id == int(ref)))
        if cid is None:
            raise AppError(f"{args.project} has no campaign {ref!r}; the admin page lists them.")
        campaign = campaigns.get_campaign(s, cid)
        emb = load_embeddings(args.project, campaign.run_id)
        got = campaigns.make_groups(s, campaign=campaign, region_ids=list(emb.region_ids), vectors=emb.vectors, size=args.size,
                                    max_class_share=args.max_class_share, seed=args.seed)
    print(f"campaign {campaign.name!r}: {got.regions} regions in {got.groups} groups of {got.smallest}-{got.largest}; "
          f"one predicted class is at most {got.largest_class_share:.0%} of a group"
          + (f" ({got.over_share} groups over {args.max_class_share:.0%}: that class is most of the campaign)" if got.over_share else "")
          + f". Annotators label them at /campaigns/{campaign.id}/groups.")
    return 0
