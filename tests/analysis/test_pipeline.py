"""The one pipeline from judgments to the concept table: same result as its stages run by hand, and its edge cases."""

from __future__ import annotations

import pandas as pd
import pytest

from analysis.concept_table import build_concept_table
from analysis.concept_votes import estimate_concepts, presence_votes
from analysis.concepts import Judgment
from analysis.errors import InvalidInputError, NotEnoughLabelsError
from analysis.pipeline import campaign_table
from analysis.synonyms import Merge, build_rules

JUDGMENTS = [
    Judgment(1, "a", (("Caps", ("red",)),)), Judgment(1, "b", (("lid", ()),)), Judgment(1, "c", (("tag", ()),)),
    Judgment(2, "a", ()), Judgment(2, "b", (("tag", ()),)), Judgment(3, "a", (("tag", ()),)), Judgment(3, "b", (("tag", ()),), unsure=True),
]
PREDICTIONS = pd.DataFrame(
    {"label": ["can", "can", "bottle", "bottle"], "predicted": ["can", "can", "bottle", "can"], "confidence": [0.9, 0.8, 0.7, 0.6],
     "split": "test", "regions": [[1], [2], [3], [4]], "mass_shares": [[0.7], [0.4], [0.5], [0.2]]},
    index=pd.Index([10, 11, 12, 13], name="image_id"),
)


def test_pipeline_equals_its_stages_run_by_hand() -> None:
    rules = build_rules([Merge("lid", "cap")])
    region_class = {1: "can", 2: "can", 3: "bottle"}  # region 4 is outside the campaign: image 13 counts with no concept
    got = campaign_table(JUDGMENTS, PREDICTIONS, rules=rules, region_class=region_class, method="majority")
    usable = [j for j in JUDGMENTS if not j.unsure]
    concepts = estimate_concepts(presence_votes(usable, rules=rules, region_class=region_class), method="majority").region_concepts()
    meta = PREDICTIONS[["label", "predicted", "confidence", "split"]].rename(columns={"label": "true_class", "predicted": "predicted_class"})
    expected = build_concept_table(meta, {10: [1], 11: [2], 12: [3], 13: []}, {1: 0.7, 2: 0.4, 3: 0.5, 4: 0.2}, concepts, method="majority")
    pd.testing.assert_frame_equal(got.table.presence, expected.presence)
    pd.testing.assert_frame_equal(got.table.share, expected.share)
    assert got.n_labelled_regions == 3
    assert got.table.presence.loc[10, "cap"]  # "lid" merged into "cap": two of three name it


def test_pipeline_holds_check_answers_and_filters_classes() -> None:
    check = {2: Judgment(2, "answer", (("rim", ()),))}
    got = campaign_table(JUDGMENTS, PREDICTIONS, region_class={1: "can", 2: "can", 3: "bottle"}, check_answers=check, classes=["can"],
                         method="dawid-skene")
    assert list(got.table.meta.index) == [10, 11, 13]
    assert got.table.presence.loc[11, "rim"]  # the known answer, though no annotator named it


def test_pipeline_says_when_no_label_is_usable() -> None:
    with pytest.raises(NotEnoughLabelsError, match="all 1 are marked not sure"):
        campaign_table([Judgment(1, "a", (("cap", ()),), unsure=True)], PREDICTIONS, region_class={1: "can"})
    with pytest.raises(NotEnoughLabelsError, match="all its regions"):
        campaign_table([Judgment(1, "a", (("cap", ()),))], PREDICTIONS.iloc[1:], region_class={1: "can", 2: "can", 3: "bottle", 4: "can"})


def test_pipeline_refuses_bad_method_and_missing_columns() -> None:
    with pytest.raises(InvalidInputError, match="method"):
        campaign_table(JUDGMENTS, PREDICTIONS, region_class={1: "can"}, method="")  # type: ignore[arg-type]
    with pytest.raises(InvalidInputError, match="mass_shares"):
        campaign_table(JUDGMENTS, PREDICTIONS.drop(columns="mass_shares"), region_class={1: "can"})


@pytest.mark.parametrize("method", ["majority", "dawid-skene"])
def test_pipeline_table_equals_the_region_by_region_build_on_a_larger_crowd(method: str) -> None:
    # Invariant on invented labels: the table built from the estimate's arrays equals build_concept_table fed
    # region by region (refinements completed with their entities), several regions per image, some images incomplete.
    import numpy as np

    rng = np.random.default_rng(7)
    names = ["cap", "yellow tag", "tag", "label band", "rim", "body"]
    n_images = 60
    regions = {10 + i: [100 + 3 * i + k for k in range(int(rng.integers(0, 4)))] for i in range(n_images)}
    region_class = {r: ("can", "bottle")[i % 2] for i, rs in enumerate(regions.values()) for r in rs}
    judged = [r for rs in regions.values() for r in rs if rng.random() < 0.9]
    js = [Judgment(r, f"a{a}", tuple((str(rng.choice(names)), tuple(str(x) for x in rng.choice(["red", "yellow"], int(rng.integers(0, 2)))))
                                     for _ in range(int(rng.integers(0, 3)))))
          for r in judged for a in rng.choice(4, 3, replace=False)]
    preds = pd.DataFrame({"label": [("can", "bottle")[i % 3 % 2] for i in range(n_images)], "predicted": [("can", "bottle")[i % 2] for i in range(n_images)],
                          "confidence": rng.random(n_images), "split": "test", "regions": list(regions.values()),
                          "mass_shares": [[float(x) for x in rng.random(len(rs)) / 3] for rs in regions.values()]},
                         index=pd.Index(list(regions), name="image_id"))
    got = campaign_table(js, preds, region_class=region_class, method=method).table  # type: ignore[arg-type]
    votes = presence_votes(js, region_class=region_class)
    concepts = estimate_concepts(votes, method=method).region_concepts()  # type: ignore[arg-type]
    complete = [i for i, rs in regions.items() if all(r in concepts for r in rs)]
    meta = preds.loc[complete, ["label", "predicted", "confidence", "split"]].rename(columns={"label": "true_class", "predicted": "predicted_class"})
    mass = {r: m for rs, ms in zip(preds["regions"], preds["mass_shares"]) for r, m in zip(rs, ms)}
    expected = build_concept_table(meta, {i: regions[i] for i in complete}, mass, concepts, method=method, families=votes.families)
    assert "yellow tag" in got.concepts and got.families.get("yellow tag") == "tag"
    pd.testing.assert_frame_equal(got.presence, expected.presence)
    pd.testing.assert_frame_equal(got.share, expected.share)
    assert got.families == expected.families
    assert np.array_equal(got.regions.ids, expected.regions.ids) and (got.regions.carries != expected.regions.carries).nnz == 0
