"""The reliance columns beside the rules: the verdict covering decided, its figures, pasting beside it, the family."""

from __future__ import annotations

import math

import pandas as pd
import pytest

from analysis.interventions import InterventionResult
from analysis.reliance import RuleTests, VerdictSettings, judge_family
from app.reliance import RELIANCE_COLUMNS, reliance_columns


def _result(kind: str, effect: float, interval: tuple[float, float], p: float) -> InterventionResult:
    return InterventionResult(kind, "can", "tag", "ring" if kind == "ablation" else "paste", "in place", 30, 5, effect, 0.4, 0.0, 0.0,  # type: ignore[arg-type]
                              effect, interval, p, 0)


def test_rules_show_the_covering_verdict_pasting_beside_it_and_not_tested_elsewhere() -> None:
    frame = pd.DataFrame({"class": ["can", "can", "bottle"], "concepts": ["tag", "rim", "cap"], "lift": [2.5, 1.0, 1.4]})
    settings = VerdictSettings(min_effect=0.1)
    tests = [RuleTests("can", "tag", (_result("ablation", 0.45, (0.38, 0.52), 2e-4),), _result("insertion", 0.2, (0.15, 0.25), 2e-4)),
             RuleTests("can", "rim", (_result("ablation", 0.01, (-0.02, 0.04), 0.3),))]
    out = reliance_columns(frame, judge_family(tests, settings), settings)
    assert set(RELIANCE_COLUMNS) <= set(out.columns)
    tag, rim, cap = (out.iloc[i] for i in range(3))
    assert tag["reliance"] == "relies on" and tag["decided_by"] == "covering (ring fill)" and tag["steering"] == "steered"
    assert tag["covering_effect"] == 0.45 and (tag["covering_low"], tag["covering_high"]) == (0.38, 0.52)
    assert tag["covering_adjusted_p"] == 3 * 2e-4 and tag["pasting_effect"] == 0.2  # Holm over the three tests
    assert rim["reliance"] == "no reliance" and rim["steering"] == "not tested" and math.isnan(rim["pasting_effect"])
    assert cap["reliance"] == "not tested" and cap["decided_by"] == "none" and math.isnan(cap["covering_effect"])
    assert (out["min_effect"] == 0.1).all() and "Holm correction over the 3 intervention tests" in tag["family"]


def test_a_not_testable_covering_is_stored_with_its_reason_and_read_as_not_run(tmp_path) -> None:  # type: ignore[no-untyped-def]
    from app.reliance import _read_cached, _write_cached

    path = tmp_path / "x-ring.json"
    _write_cached(path, None, reason="covering is not testable: the region covers 72% of the image")
    assert _read_cached(path) == (True, None)
    assert "72% of the image" in path.read_text()
    _write_cached(path, _result("ablation", 0.3, (0.2, 0.4), 0.01))
    found, result = _read_cached(path)
    assert found and result is not None and result.left_out == 0 and result.effect == 0.3
    # A result stored before images could be left out reads back with none left out.
    raw = result.to_json()
    del raw["left_out"]
    path.write_text(__import__("json").dumps(raw))
    assert _read_cached(path)[1] == result


def _stored_key(region_concepts: dict[int, dict[str, float]]) -> str:
    """The storage key of "can relies on green belt" over a four-image table with the given region concepts."""
    from types import SimpleNamespace

    from analysis.concept_table import build_concept_table
    from app.reliance import _plan

    meta = pd.DataFrame({"true_class": ["can", "can", "bottle", "bottle"], "predicted_class": ["can", "can", "bottle", "bottle"],
                         "confidence": [0.9] * 4, "split": ["test"] * 4}, index=[1, 2, 3, 4])
    table = build_concept_table(meta, {1: [11, 12], 2: [21], 3: [31], 4: [41]}, {r: 0.5 for r in (11, 12, 21, 31, 41)},
                                region_concepts, method="majority", families={"green belt": "belt", "grey belt": "belt"})
    res = SimpleNamespace(table=table, campaign=SimpleNamespace(run_id=1), method="majority")
    return _plan(res, "sha", "can", ["green belt"], 5, 200, 0)[0]  # type: ignore[arg-type]


def test_stored_interventions_are_run_again_when_labels_change_what_they_cover_or_the_plain_look() -> None:
    """Stored results are keyed by the region facts that decide the tests, not only by the images: a region that
    now shows the belt with something else (no longer "alone"), or a donor belt that is now grey, must run the
    tests again; a label elsewhere that changes none of these keeps them."""
    base = {11: {"green belt": 1.0}, 12: {"can body": 1.0}, 21: {"green belt": 1.0}, 31: {"belt": 1.0}, 41: {"cap": 1.0}}
    key = _stored_key(base)
    assert _stored_key(dict(base)) == key
    assert _stored_key({**base, 11: {"green belt": 1.0, "can body": 1.0}}) != key  # covered region no longer alone
    assert _stored_key({**base, 31: {"grey belt": 1.0}}) != key  # the plain look's donors change
    assert _stored_key({**base, 41: {"cap": 1.0, "label": 1.0}}) == key  # unrelated to what is covered or donated


def test_the_storage_key_digests_each_table_once_and_each_refinement_s_donors_once(monkeypatch: pytest.MonkeyPatch) -> None:
    """Stored-verdict reads behind a results page ask for the storage key of every rule: what each region shows is
    digested once per concept table (made once per labels version), not walked again per rule."""
    from types import SimpleNamespace

    import app.reliance as reliance
    from analysis.concept_table import build_concept_table

    made: list[int] = []
    real = reliance._RegionFacts

    class Counting(real):  # type: ignore[misc, valid-type]
        def __init__(self, *args: object) -> None:
            made.append(1)
            super().__init__(*args)

    donors: list[str] = []
    real_digest = real._donor_digest
    monkeypatch.setattr(reliance, "_RegionFacts", Counting)
    monkeypatch.setattr(real, "_donor_digest", lambda self, table, concept, entity: donors.append(concept) or real_digest(self, table, concept, entity))
    meta = pd.DataFrame({"true_class": ["can", "can", "bottle"], "predicted_class": ["can", "can", "bottle"], "confidence": [0.9] * 3,
                         "split": ["test"] * 3}, index=[1, 2, 3])
    concepts = {11: {"green belt": 1.0}, 21: {"green belt": 1.0, "tag": 1.0}, 31: {"belt": 1.0}}
    table = build_concept_table(meta, {1: [11], 2: [21], 3: [31]}, {r: 0.5 for r in (11, 21, 31)}, concepts, method="majority",
                                families={"green belt": "belt"})
    res = SimpleNamespace(table=table, campaign=SimpleNamespace(run_id=1), method="majority")
    keys = {reliance._plan(res, "sha", "can", c, 5, 200, 0)[0] for c in (["green belt"], ["tag"], ["green belt"], ["green belt", "tag"])}  # type: ignore[arg-type]
    assert len(keys) == 3 and made == [1] and donors.count("green belt") == 1
    # Another table (a new labels version) is digested again, and an identical one gives the same keys.
    again = build_concept_table(meta, {1: [11], 2: [21], 3: [31]}, {r: 0.5 for r in (11, 21, 31)}, concepts, method="majority",
                                families={"green belt": "belt"})
    assert reliance._plan(SimpleNamespace(table=again, campaign=res.campaign, method="majority"), "sha", "can", ["tag"], 5, 200, 0)[0] in keys  # type: ignore[arg-type]
    assert made == [1, 1]
