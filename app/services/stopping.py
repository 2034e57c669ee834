"""Whether each class's top rules have settled: the results now beside the results some judgments ago."""

from __future__ import annotations

import functools
import hashlib
import json
import logging
from collections.abc import Callable
from dataclasses import dataclass, replace
from pathlib import Path

import pandas as pd
from sqlalchemy import func, select
from sqlalchemy.orm import Session

from analysis.errors import NotEnoughLabelsError
from analysis.pipeline import campaign_table
from analysis.rules import top_rules
from analysis.stopping import ClassSettling, checkpoints, settling

from .. import campaigns, store
from ..campaigns import CampaignInfo
from ..campaigns.plans import SETTLE_WINDOW, PlanInfo
from ..models import CampaignRegion, SaliencyRun
from . import label_snapshot
from .campaign_analysis import ResultsCache, _method, _read, campaign_results, campaign_rules, prediction_frame, region_classes
from .label_snapshot import write_whole

log = logging.getLogger("heedmap")

TOP_RULES = 3


@dataclass(frozen=True)
class StoppingStatus:
    """Per class: settled or not and why; the judgments so far and the window compared; the classes closed early."""

    classes: list[ClassSettling]
    judgments: int
    window: int
    checkpoints: tuple[int, ...]  # judgments counted at each earlier look (see analysis.stopping.checkpoints)
    closed: tuple[str, ...]


def _rules_at(s: Session, c: CampaignInfo, n: int, *, min_support: float, max_len: int, cache: ResultsCache | None,
              version: tuple[object, ...]) -> pd.DataFrame:
    """The predicted-class rules from the campaign's first ``n`` labels."""
    found, rules, region_class = _read(s, c, cache, version, limit=n)
    design = campaigns.sample_of(s, c.id)
    made = campaign_table(found, prediction_frame(s, c.run_id, cache=cache), rules=rules,
                          region_class=region_class, check_answers=campaigns.check_answers(s, c.id), classes=c.classes,
                          method=_method(c), sample=design[0] if design else None, population=design[1] if design else None)
    return made.table.rules(target="predicted", min_support=min_support, max_len=max_len, prune=True).rules


def _tops(rules: pd.DataFrame) -> pd.DataFrame:
    """Each class's top rules as :func:`analysis.stopping.settling` compares them at a checkpoint (class, family, concepts)."""
    return top_rules(rules, TOP_RULES)[["class", "family", "concepts"]].astype(str).reset_index(drop=True)


def _tops_at(at: Callable[[int], pd.DataFrame], n: int) -> pd.DataFrame:
    return _tops(at(n))


_KEPT_FORMAT = "heedmap settling checkpoints 2"
_KEPT_ENTRIES = 16


def _kept_tops(folder: Path | None, campaign_id: int, key: tuple[object, ...], make: Callable[[], pd.DataFrame]) -> pd.DataFrame:
    """``make()`` (a checkpoint's top rules), kept in a file beside the database under a digest of ``key`` (which holds
    everything they depend on), so that a restarted server does not compute the checkpoints again. A file that is not
    whole or not ours is ignored (and replaced)."""
    if folder is None:
        return make()
    name = f"settling-{int(campaign_id)}.json"
    digest = hashlib.sha256(repr(key).encode()).hexdigest()
    entries: dict[str, list[list[str]]] = {}
    try:
        found = json.loads((folder / name).read_text())
        if isinstance(found, dict) and found.get("format") == _KEPT_FORMAT and isinstance(found.get("entries"), dict):
            entries = {k: v for k, v in found["entries"].items()
                       if isinstance(v, list) and all(isinstance(r, list) and len(r) == 3 and all(isinstance(x, str) for x in r) for r in v)}
    except (OSError, ValueError) as exc:
        if not isinstance(exc, FileNotFoundError):
            log.info("ignored the kept settling checkpoints of campaign %s (%s)", campaign_id, exc)
    if digest in entries:
        return pd.DataFrame(entries[digest], columns=["class", "family", "concepts"], dtype=str)
    tops = make()
    entries.pop(digest, None)
    entries[digest] = [[str(x) for x in r] for r in tops.itertuples(index=False)]
    while len(entries) > _KEPT_ENTRIES:
        entries.pop(next(iter(entries)))
    text = json.dumps({"format": _KEPT_FORMAT, "entries": entries})
    write_whole(folder, name, lambda fh: fh.write(text.encode()))
    return tops


def _checkpoint_key(s: Session, c: CampaignInfo, n: int, version: tuple[object, ...], plan: PlanInfo | None, cache: ResultsCache) -> tuple[object, ...]:
    """What the results from the campaign's first ``n`` labels depend on, so they are made once and kept while more labels come in.

    Labels are only stored (with an id above every id held) or undone (moved to the withdrawn table). So the first ``n``
    labels are the same set while the ``n``-th label's id and the withdrawn labels are unchanged: an undo changes the
    withdrawn count, and a label committed late with a lower id moves the ``n``-th id down. Synonym rules, check answers,
    the method (``version[5:]``), the sample (the plan, less the classes closed since) and the campaign's regions count too.
    """
    regions = s.execute(select(func.count(), func.max(CampaignRegion.region_id), func.min(CampaignRegion.region_id))
                        .where(CampaignRegion.campaign_id == c.id)).one()
    run = s.get(SaliencyRun, c.run_id)
    return (c.id, n, cache.labels.nth_id(s, c.id, version, n), version[3], version[4], *version[5:], replace(plan, closed_classes=()) if plan else None,
            *regions, c.run_id, tuple(c.classes),
            # which database: the campaign's name and creation time, the run's key (the key is kept in a file across runs)
            label_snapshot.identity(s, c.id), run.config_key if run else None)


def _status(s: Session, c: CampaignInfo, *, min_support: float, max_len: int, cache: ResultsCache | None = None,
            version: tuple[object, ...] | None = None) -> StoppingStatus:
    plan = campaigns.plan_of(s, c.id)
    window = plan.settle_window if plan else SETTLE_WINDOW
    closed = plan.closed_classes if plan else ()
    version = version or store.labels_version(s, c.id)
    n = int(str(version[1]))  # the campaign's labels, as many as its judgments
    classes = sorted(set(region_classes(s, c.id, cache=cache).values()))
    if n == 0:
        return StoppingStatus([ClassSettling(k, (), False, False, "no labels yet") for k in classes], 0, window, (), closed)
    at = functools.partial(_rules_at, s, c, min_support=min_support, max_len=max_len, cache=cache, version=version)
    try:
        # The rules now are the results page's (kept per labels version when a cache is given).
        now = campaign_rules(campaign_results(s, c, cache=cache), min_support=min_support, max_len=max_len).rules if cache is not None else at(n)
    except NotEnoughLabelsError as exc:
        return StoppingStatus([ClassSettling(k, (), False, False, str(exc)) for k in classes], n, window, (), closed)
    # The checkpoints stay put for half a window of judgments: their results are made once and kept apart from
    # the per-version entries (which every new label adds to).
    kept = cache.apart("settling checkpoints") if cache is not None else None
    earlier, points = [], []
    for k in checkpoints(n, window):
        try:
            if kept is None or cache is None:
                earlier.append(at(k))
            else:
                key = (*_checkpoint_key(s, c, k, version, plan, cache), min_support, max_len, TOP_RULES)
                earlier.append(kept.get_or_make(key, functools.partial(_kept_tops, cache.labels.snapshots, c.id, key, functools.partial(_tops_at, at, k))))
            points.append(k)
        except NotEnoughLabelsError:
            pass
    return StoppingStatus(settling(now, earlier, top=TOP_RULES, classes=classes), n, window, tuple(points), closed)


def stopping_status(s: Session, campaign: CampaignInfo, *, min_support: float, max_len: int = 2, cache: ResultsCache | None = None) -> StoppingStatus:
    """Per class, whether its top rules are separated and have held their order over the last ``settle_window`` judgments
    (compared with the results at two checkpoints at least that many, and half that many, judgments ago; see
    :func:`analysis.stopping.checkpoints`)."""
    if cache is None:
        return _status(s, campaign, min_support=min_support, max_len=max_len)
    version = store.labels_version(s, campaign.id)
    key = ("stopping", min_support, max_len, *version, campaigns.plan_of(s, campaign.id))
    return cache.get_or_make(key, lambda: _status(s, campaign, min_support=min_support, max_len=max_len, cache=cache, version=version))
