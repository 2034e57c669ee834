"""A campaign's synonym rules: merges, class-dependent splits and rejected suggestions."""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

from sqlalchemy import select
from sqlalchemy.orm import Session

from analysis.concepts import normalise_label
from analysis.synonyms import Merge, Split, SynonymRules, build_rules

from ..errors import InvalidRequestError, NotFoundError
from ..models import CampaignPlan, SynonymRule


def synonym_rules(s: Session, campaign_id: int) -> tuple[SynonymRules, list[tuple[str, str]]]:
    """The campaign's validated synonym rules and the suggestion pairs the analyst rejected."""
    merges, splits, rejected = [], [], []
    for r in s.scalars(select(SynonymRule).where(SynonymRule.campaign_id == campaign_id).order_by(SynonymRule.id)):
        if r.kind in ("merge", "merge-attribute"):
            merges.append(Merge(r.source, r.target, "attribute" if r.kind == "merge-attribute" else "entity"))
        elif r.kind == "split":
            splits.append(Split(r.source, tuple(sorted(r.targets.items()))))
        else:
            rejected.append((r.source, r.target))
    return build_rules(merges, splits), rejected


def add_synonym_rule(s: Session, *, campaign_id: int, kind: str, source: str, target: str = "", targets: dict[str, str] | None = None, by: str = "") -> int:
    """Add a merge, attribute merge, split or rejection; the whole rule set is checked before it is kept."""
    if kind not in ("merge", "merge-attribute", "split", "reject"):
        raise InvalidRequestError(f"unknown rule kind {kind!r}.")
    source, target = normalise_label(source), normalise_label(target)
    targets = {str(k): normalise_label(v) for k, v in (targets or {}).items() if normalise_label(v)}
    if not source:
        raise InvalidRequestError("give the label the rule applies to.")
    if kind != "split" and not target:
        raise InvalidRequestError("give the label to merge it into.")
    row = SynonymRule(campaign_id=campaign_id, kind=kind, source=source, target=target, targets=targets, created_by=by)
    s.add(row)
    s.flush()
    try:
        synonym_rules(s, campaign_id)
    except Exception as exc:
        raise InvalidRequestError(str(exc)) from None
    _rules_changed(s, campaign_id)
    return row.id


def _rules_changed(s: Session, campaign_id: int) -> None:
    """An adaptive campaign's regions may agree or disagree differently under the new rules."""
    from .redundancy import refresh_quotas  # redundancy reads the rules from here

    if s.get(CampaignPlan, campaign_id) is not None:
        refresh_quotas(s, campaign_id)


@dataclass(frozen=True)
class RuleRow:
    id: int
    kind: str
    source: str
    target: str
    targets: dict[str, str]
    created_by: str
    created_at: datetime


def synonym_rule_rows(s: Session, campaign_id: int) -> list[RuleRow]:
    """The campaign's rules as stored, newest first (for the editor)."""
    rows = s.scalars(select(SynonymRule).where(SynonymRule.campaign_id == campaign_id).order_by(SynonymRule.id.desc()))
    return [RuleRow(r.id, r.kind, r.source, r.target, dict(r.targets or {}), r.created_by, r.created_at) for r in rows]


def delete_synonym_rule(s: Session, *, campaign_id: int, rule_id: int) -> None:
    row = s.get(SynonymRule, rule_id)
    if row is None or row.campaign_id != campaign_id:
        raise NotFoundError(f"rule {rule_id} does not exist in campaign {campaign_id}.")
    s.delete(row)
    s.flush()
    _rules_changed(s, campaign_id)
