from __future__ import annotations

import pandas as pd
import pytest

from analysis.concept_table import build_concept_table
from analysis.concept_votes import estimate_concepts, presence_votes
from analysis.concepts import (
    Judgment,
    attribute_words,
    judgment_concepts,
    judgment_families,
    main_entity,
    normalise_label,
    parse_label_text,
)
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


# Families: an entity and its refinements (invented labels; these are invariants of the design).


@pytest.mark.parametrize("typed", ["yellow", "square", "Yellow", "squares"])
def test_an_attribute_already_among_the_entity_words_is_not_added_again(typed: str) -> None:
    j = Judgment(1, "a", (("yellow square", (typed,)),))
    assert judgment_concepts(j) == {"yellow square"}  # never "yellow yellow square" nor "square yellow square"
    # Where "yellow" is an attribute word of the campaign, "yellow square" is the refinement of "square".
    assert judgment_families(j, attributes=frozenset({"yellow", "square"})) == {"square": "square", "yellow square": "square"}


def test_leading_attribute_words_make_a_refinement_and_other_entities_keep_their_words() -> None:
    js = [
        Judgment(1, "a", (("tag", ("yellow",)),)),
        Judgment(1, "b", (("Yellow Tag", ()),)),
        Judgment(2, "a", (("label band", ("torn",)), ("pull tab", ()))),
    ]
    words = attribute_words(js)
    assert words == {"yellow", "torn"}
    assert judgment_families(js[0], attributes=words) == judgment_families(js[1], attributes=words) == {"tag": "tag", "yellow tag": "tag"}
    assert judgment_families(js[2], attributes=words) == {"label band": "label band", "torn label band": "label band", "pull tab": "pull tab"}
    assert main_entity(js[1], attributes=words) == "tag"


def test_a_refinement_counts_for_its_entity_in_votes_and_in_the_table() -> None:
    js = [
        # Region 1: two people name refinements, one names something else; region 2 has two different refinements.
        Judgment(1, "a", (("yellow tag", ()),)), Judgment(1, "b", (("tag", ("yellow",)),)), Judgment(1, "c", (("cap", ()),)),
        Judgment(2, "a", (("tag", ("yellow",)),)), Judgment(2, "b", (("tag", ("small",)),)), Judgment(2, "c", ()),
    ]
    votes = presence_votes(js)
    assert votes.families == {"small tag": "tag", "yellow tag": "tag"}
    got = estimate_concepts(votes, method="majority").region_concepts()
    assert set(got[1]) == {"tag", "yellow tag"}
    assert set(got[2]) == {"tag"}  # two of three saw a tag, though they described it differently
    meta = pd.DataFrame({"true_class": ["can", "can"], "predicted_class": ["can", "can"], "confidence": 0.9, "split": "test"}, index=[10, 11])
    # An aggregation that keeps only the refinement still shows the entity in the table.
    table = build_concept_table(meta, {10: [1], 11: [2]}, {1: 0.5, 2: 0.5}, {1: {"yellow tag": 0.9}, 2: {"tag": 0.7}}, method="x", families=votes.families)
    assert table.presence.loc[:, "tag"].tolist() == [True, True] and table.presence.loc[:, "yellow tag"].tolist() == [True, False]
    assert table.families == {"yellow tag": "tag"}  # "small tag" is in no image
    assert table.share.loc[10, "tag"] == 0.5


def test_known_refinements_make_their_entity_known() -> None:
    js = [Judgment(1, "a", (("tag", ("yellow",)),)), Judgment(1, "b", (("cap", ()),))]
    votes = presence_votes(js, known={1: ["yellow tag"]})
    known = {votes.concepts[c]: int(k) for c, k in zip(votes.pair_concept, votes.known)}
    assert known == {"tag": 1, "yellow tag": 1, "cap": 0}


def test_the_campaign_pipeline_keeps_families_in_its_table() -> None:
    from analysis.pipeline import campaign_table

    js = [Judgment(1, a, (("tag", ("yellow",)),)) for a in "abc"] + [Judgment(2, a, (("cap", ()),)) for a in "abc"]
    predictions = pd.DataFrame({"label": ["can", "bottle"], "predicted": ["can", "bottle"], "confidence": 0.9, "split": "test",
                                "regions": [[1], [2]], "mass_shares": [[0.6], [0.4]]}, index=[10, 11])
    made = campaign_table(js, predictions, region_class={1: "can", 2: "bottle"})
    assert made.table.families == {"yellow tag": "tag"}
    rules = made.table.rules(min_support=0.1, max_len=1).rules
    assert rules[rules["concepts"] == "yellow tag"]["parent"].tolist() == ["tag"]
