"""Knowing when to stop labelling a class: its top rules have settled.

A class's top rules (one per family, best first) have settled when both hold:
- separated: every top rule's confidence interval lies above the interval of the best rule below
  them (so more labels are unlikely to swap a rule in or out of the top), and
- unchanged: the same rules, in the same order, were on top at every earlier checkpoint given
  (the results of the campaign a set number of judgments ago).
Both are rules of thumb (common practice for sequential reviews, not a test with a stated error rate);
the page says so.

The checkpoints lie on a grid of half a window (:func:`checkpoints`): each is at least as far back as
"a window ago" and "half a window ago", and they stay where they are while the next half window of
judgments comes in, so the results at a checkpoint are computed once, not after every judgment.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import pandas as pd

from .errors import InvalidInputError
from .rule_ranking import confidence_intervals
from .rules import top_rules


@dataclass(frozen=True)
class ClassSettling:
    """Whether a class's top rules have settled, and why (or why not)."""

    cls: str
    top: tuple[str, ...]  # the top rules' concept sets now, best first
    separated: bool
    unchanged: bool
    reason: str

    @property
    def settled(self) -> bool:
        return self.separated and self.unchanged


def checkpoints(judgments: int, window: int) -> tuple[int, ...]:
    """The judgment counts to compare with when ``judgments`` have been made: two points half a ``window`` apart.

    The older point is the last multiple of ``window // 2`` at least ``window`` judgments back, the newer one
    half a window after it; so the older is between one and one and a half windows back, the newer at least
    half a window back (never nearer than "a window ago" and "half a window ago", which the grid replaces).
    Points at or below zero are left out; fewer judgments than ``window`` give none.
    """
    if window < 1:
        raise InvalidInputError(f"window must be at least 1 judgment; got {window}.")
    if judgments < window:
        return ()
    step = max(1, window // 2)
    older = (judgments - window) // step * step
    return tuple(k for k in (older, older + step) if k > 0)


def _top(rules: pd.DataFrame, cls: str, k: int) -> tuple[str, ...]:
    mine = rules[rules["class"] == cls]
    return tuple(top_rules(mine, k)["concepts"].astype(str)) if not mine.empty else ()


def settling(now: pd.DataFrame, earlier: Sequence[pd.DataFrame], *, top: int = 3, classes: Sequence[str] = ()) -> list[ClassSettling]:
    """Per class, whether its ``top`` rules have settled (rule tables as :func:`analysis.rules.mine_rules` makes them, best first).

    Parameters
    ----------
    now
        The rules from every judgment so far.
    earlier
        The rules at earlier checkpoints (fewer judgments); none means "unchanged" cannot be shown yet.
    top
        How many of the class's rules (one per family) must hold their place.
    classes
        Classes to report (default: those with rules now).
    """
    if top < 1:
        raise InvalidInputError(f"top must be at least 1; got {top}.")
    names = list(classes) if classes or not len(now) else sorted(now["class"].astype(str).unique())
    out: list[ClassSettling] = []
    for cls in names:
        mine = now[now["class"] == cls].drop_duplicates(["class", "family"]) if len(now) else now
        if mine.empty:
            out.append(ClassSettling(cls, (), False, False, "no rule yet"))
            continue
        low, high = confidence_intervals(mine)
        k = min(top, len(mine))
        shown = tuple(mine["concepts"].astype(str).iloc[:k])
        if len(mine) > k:
            separated = bool(low[:k].min() > high[k:].max())
            why_sep = "" if separated else f"the interval of {mine['concepts'].iloc[k]!r} overlaps the top {k}"
        else:
            separated = True
            why_sep = ""
        if not earlier:
            unchanged, why_same = False, "too few judgments yet to compare with earlier ones"
        else:
            before = [_top(e, cls, k) for e in earlier]
            unchanged = all(b == shown for b in before)
            why_same = "" if unchanged else "the top rules changed over the last judgments"
        reason = "; ".join(r for r in (why_sep, why_same) if r) or "top rules separated and unchanged"
        out.append(ClassSettling(cls, shown, separated, unchanged, reason))
    return out
