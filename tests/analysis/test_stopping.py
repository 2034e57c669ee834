"""Whether a class's top rules have settled (invariants on rule tables made by mine_rules from invented tables)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from analysis.errors import InvalidInputError
from analysis.rules import mine_rules
from analysis.stopping import settling


def _table(n: int, seed: int = 0) -> tuple[pd.DataFrame, pd.Series]:
    """Images of "can" nearly always show "tag", sometimes "cap"; "bottle" images show "cap" and rarely "tag"."""
    rng = np.random.default_rng(seed)
    cls = np.where(rng.random(n) < 0.5, "can", "bottle")
    tag = np.where(cls == "can", rng.random(n) < 0.95, rng.random(n) < 0.05)
    cap = np.where(cls == "can", rng.random(n) < 0.3, rng.random(n) < 0.9)
    belt = rng.random(n) < 0.5
    return pd.DataFrame({"tag": tag, "cap": cap, "belt": belt}), pd.Series(cls)


def test_a_clear_leader_over_many_images_settles_and_a_changed_ranking_does_not() -> None:
    table, classes = _table(2000)
    now = mine_rules(table, classes, min_support=0.01, max_len=1).rules
    same = mine_rules(table.iloc[:1800], classes.iloc[:1800], min_support=0.01, max_len=1).rules
    found = {c.cls: c for c in settling(now, [same], top=1)}
    assert found["can"].top == ("tag",) and found["can"].settled
    # A checkpoint whose top rule differs keeps the class open.
    other = now.assign(concepts=now["concepts"].replace({"tag": "belt", "belt": "tag"}))
    assert not {c.cls: c for c in settling(now, [other], top=1)}["can"].unchanged


def test_overlapping_intervals_and_no_history_are_not_settled() -> None:
    table, classes = _table(30, seed=1)
    now = mine_rules(table, classes, min_support=0.01, max_len=1).rules
    found = settling(now, [], top=3, classes=["can", "bottle", "carton"])
    assert all(not c.settled for c in found)
    assert {c.cls: c for c in found}["carton"].reason == "no rule yet"
    assert "too few judgments" in found[0].reason
    with pytest.raises(InvalidInputError, match="top"):
        settling(now, [], top=0)


def test_checkpoints_lie_at_least_a_window_and_half_a_window_back_and_stay_put() -> None:
    from analysis.stopping import checkpoints

    window = 60
    assert checkpoints(59, window) == ()  # fewer judgments than the window: nothing to compare with
    assert checkpoints(60, window) == (30,)  # a point at zero is left out
    for n in range(90, 2_000):
        older, newer = checkpoints(n, window)
        # never nearer than the exact "a window ago" and "half a window ago", and at most half a window further back
        assert n - 1.5 * window < older <= n - window and n - window < newer <= n - window // 2
        assert newer - older == window // 2 and older % (window // 2) == 0
        # they hold for half a window of judgments: a new one every 30 judgments, not after every judgment
        assert (checkpoints(n - 1, window) != (older, newer)) == (n % 30 == 0)
    assert checkpoints(61, 61) == (30,) and checkpoints(92, 61) == (30, 60)  # an odd window; points at zero are left out
    with pytest.raises(InvalidInputError, match="window"):
        checkpoints(10, 0)
