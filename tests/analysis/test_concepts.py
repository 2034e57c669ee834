from __future__ import annotations

import pytest

from analysis.concept_votes import estimate_concepts, presence_votes
from analysis.concept_table import build_concept_table
from analysis.concepts import Judgment, normalise_label, parse_label_text
import pandas as pd
from analysis.errors import InvalidInputError


@pytest.mark.parametrize(("raw", "norm"), [("  Caps ", "cap"), ("Label-Band", "label band"), ("BOTTLES!", "bottle"), ("batteries", "battery"), ("glass", "glass"), ("ｔａｇ", "tag"), ("boxes", "box")])
def test_normalise_label(raw: str, norm: str) -> None:
    assert normalise_label(raw) == norm


def test_parse_label_text() -> None:
    assert parse_label_text("label: torn, white; cap:red") == [("label", ["torn", "white"]), ("cap", ["red"])]
    assert parse_label_text("  ") == []
    with pytest.raises(InvalidInputError, match="no entity"):
        parse_label_text(": red")


def test_majority_needs_more_than_half() -> None:
    js = [
        Judgment(1, "a", (("Caps", ("red",)),)), Judgment(1, "b", (("cap", ()),)), Judgment(1, "c", (("tag", ()),)),
        Judgment(2, "a", ()), Judgment(2, "b", (("tag", ()),)),
    ]
    got = estimate_concepts(presence_votes(js), method="majority").region_concepts()
    assert got[1] == {"cap": pytest.approx(2 / 3)}
    assert got[2] == {}
    meta = pd.DataFrame({"true_class": ["can"] * 3, "predicted_class": ["can", "can", "bottle"], "confidence": 0.9, "split": "test"}, index=[10, 11, 12])
    table = build_concept_table(meta, {10: [1], 11: [2], 12: []}, {1: 0.7, 2: 0.4}, got, method="majority")
    presence = table.presence
    assert presence.loc[10, "cap"] and not presence.loc[11, "cap"] and not presence.loc[12].any()
    assert table.share.loc[10, "cap"] == 0.7 and table.meta["correct"].tolist() == [True, True, False]
