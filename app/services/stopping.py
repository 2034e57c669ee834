"""Whether each class's top rules have settled: the results now beside the results some judgments ago."""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd
from sqlalchemy.orm import Session

from analysis.errors import NotEnoughLabelsError
from analysis.pipeline import campaign_table
from analysis.stopping import ClassSettling, settling

from .. import campaigns, store
from ..campaigns import CampaignInfo
from ..campaigns.plans import SETTLE_WINDOW
from .campaign_analysis import ResultsCache, _method

TOP_RULES = 3


@dataclass(frozen=True)
class StoppingStatus:
    """Per class: settled or not and why; the judgments so far and the window compared; the classes closed early."""

    classes: list[ClassSettling]
    judgments: int
    window: int
    checkpoints: tuple[int, ...]  # judgments counted at each earlier look
    closed: tuple[str, ...]


def _rules_at(s: Session, c: CampaignInfo, n: int, *, min_support: float, max_len: int) -> pd.DataFrame:
    found = campaigns.judgments(s, c.id)[:n]
    design = campaigns.sample_of(s, c.id)
    made = campaign_table(found, store.prediction_frame(s, c.run_id), rules=campaigns.synonym_rules(s, c.id)[0],
                          region_class=campaigns.region_classes(s, c.id), check_answers=campaigns.check_answers(s, c.id), classes=c.classes,
                          method=_method(c), sample=design[0] if design else None, population=design[1] if design else None)
    return made.table.rules(target="predicted", min_support=min_support, max_len=max_len, prune=True).rules


def _status(s: Session, c: CampaignInfo, *, min_support: float, max_len: int) -> StoppingStatus:
    plan = campaigns.plan_of(s, c.id)
    window = plan.settle_window if plan else SETTLE_WINDOW
    closed = plan.closed_classes if plan else ()
    n = len(campaigns.judgments(s, c.id))
    classes = sorted(set(campaigns.region_classes(s, c.id).values()))
    checkpoints = tuple(k for k in (n - window, n - window // 2) if k > 0)
    if n == 0:
        return StoppingStatus([ClassSettling(k, (), False, False, "no labels yet") for k in classes], 0, window, (), closed)
    try:
        now = _rules_at(s, c, n, min_support=min_support, max_len=max_len)
    except NotEnoughLabelsError as exc:
        return StoppingStatus([ClassSettling(k, (), False, False, str(exc)) for k in classes], n, window, (), closed)
    earlier = []
    for k in checkpoints:
        try:
            earlier.append(_rules_at(s, c, k, min_support=min_support, max_len=max_len))
        except NotEnoughLabelsError:
            checkpoints = tuple(x for x in checkpoints if x != k)
    if n < window:
        earlier, checkpoints = [], ()
    return StoppingStatus(settling(now, earlier, top=TOP_RULES, classes=classes), n, window, checkpoints, closed)


def stopping_status(s: Session, campaign: CampaignInfo, *, min_support: float, max_len: int = 2, cache: ResultsCache | None = None) -> StoppingStatus:
    """Per class, whether its top rules are separated and have held their order over the last ``settle_window`` judgments
    (compared with the results at that many, and half that many, judgments ago)."""
    if cache is None:
        return _status(s, campaign, min_support=min_support, max_len=max_len)
    key = ("stopping", min_support, max_len, *store.labels_version(s, campaign.id), campaigns.plan_of(s, campaign.id))
    return cache.get_or_make(key, lambda: _status(s, campaign, min_support=min_support, max_len=max_len))
