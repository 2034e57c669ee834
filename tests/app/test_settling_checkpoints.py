"""The settling page's checkpoints: their results are made once while more labels come in, made again when
a label among them is undone, and always the same as a fresh computation."""

from __future__ import annotations

import pytest

from app import campaigns
from app.db import write_session
from app.people import ensure_person
from app.services import stopping
from app.services.campaign_analysis import ResultsCache

pytestmark = pytest.mark.both_databases


def _label(factory, c: campaigns.CampaignInfo, name: str, *, limit: int = 10_000) -> int:  # type: ignore[no-untyped-def]
    """``name`` labels up to ``limit`` regions, each showing its predicted class's own mark; how many were labelled."""
    with factory() as s:
        region_class = campaigns.region_classes(s, c.id)
    with write_session(factory) as s:
        pid = ensure_person(s, name, "annotator")
    done = 0
    while done < limit:
        with write_session(factory) as s:
            tasks = campaigns.lease_tasks(s, campaign=c, person_id=pid)
            if not tasks:
                break
            rid = tasks[0].region_id
            campaigns.save_label(s, campaign=c, region_id=rid, person_id=pid, entities=[(f"mark of {region_class[rid]}", [])], unsure=False,
                                 client_id=f"{name}-{rid}", seconds_spent=1.0)
            done += 1
    return done


def _same(a: stopping.StoppingStatus, b: stopping.StoppingStatus) -> bool:
    return (a.judgments, a.checkpoints, a.classes) == (b.judgments, b.checkpoints, b.classes)


def test_checkpoint_results_are_made_once_and_again_after_an_undo_among_them(factory, checkpoints_made: list[int]) -> None:  # type: ignore[no-untyped-def]
    made = checkpoints_made
    with write_session(factory) as s:
        cid = campaigns.create_campaign(s, name="c", run_id=1, labels_per_region=3, settle_window=10)
        c = campaigns.get_campaign(s, cid)
    assert _label(factory, c, "ann") >= 15 and _label(factory, c, "bob") >= 15
    cache = ResultsCache()

    def both() -> tuple[stopping.StoppingStatus, stopping.StoppingStatus]:
        with factory() as s:
            return stopping.stopping_status(s, c, min_support=0.01, cache=cache), stopping.stopping_status(s, c, min_support=0.01)

    first, fresh = both()
    assert len(first.checkpoints) == 2 and _same(first, fresh)
    assert sorted(made) == sorted(first.checkpoints)  # each checkpoint made once
    # One more label: the checkpoints stay where they were (a new pair only every half window) and are not made again.
    assert _label(factory, c, "cy", limit=1) == 1
    made.clear()
    later, fresh = both()
    assert later.judgments == first.judgments + 1 and _same(later, fresh)
    if later.checkpoints == first.checkpoints:
        assert made == []
    else:  # the label crossed onto the grid: only the new, nearer point is made
        assert made == [later.checkpoints[-1]] and later.checkpoints[0] == first.checkpoints[-1]
    # Undoing ann's last label (among the first labels) changes what the first labels are: the checkpoints are made again.
    with write_session(factory) as s:
        pid = ensure_person(s, "ann", "annotator")
        assert campaigns.undo_last(s, campaign=c, person_id=pid) is not None
    made.clear()
    undone, fresh = both()
    assert _same(undone, fresh) and sorted(made) == sorted(undone.checkpoints)


def test_start_up_warming_also_makes_the_agreement_and_settling_pages(factory, monkeypatch: pytest.MonkeyPatch) -> None:  # type: ignore[no-untyped-def]
    from app.services import campaign_analysis

    with write_session(factory) as s:
        cid = campaigns.create_campaign(s, name="warm", run_id=1, labels_per_region=3, settle_window=10)
        c = campaigns.get_campaign(s, cid)
    assert _label(factory, c, "ann") >= 15 and _label(factory, c, "bob") >= 15
    cache = ResultsCache()
    assert campaign_analysis.warm_results(factory, cache, min_support=0.01) == [cid]

    def made_again(*args: object, **kw: object) -> None:
        raise AssertionError("made again: warming did not keep it")

    monkeypatch.setattr(campaign_analysis, "_agreement", made_again)
    monkeypatch.setattr(stopping, "_status", made_again)
    with factory() as s:  # the pages' own calls find what warming made
        shown = campaign_analysis.agreement_summary(s, cid, cache=cache)
        status = stopping.stopping_status(s, c, min_support=0.01, cache=cache)
    assert shown.report.n_judgments == 2 * c.n_regions and len(status.checkpoints) == 2
