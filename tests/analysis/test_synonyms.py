from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from nltk.metrics.distance import edit_distance as nltk_edit_distance

from analysis.concepts import Judgment, judgment_concepts
from analysis.errors import InvalidInputError
from analysis.synonyms import Merge, Split, build_rules, edit_distance, suggest_merges

words = st.text(alphabet="abcde ", max_size=9)


@settings(max_examples=300, deadline=None)
@given(words, words)
def test_edit_distance_matches_nltk_with_transpositions(a: str, b: str) -> None:
    # nltk's edit_distance with transpositions=True is the unrestricted Damerau-Levenshtein distance.
    assert edit_distance(a, b) == nltk_edit_distance(a, b, transpositions=True)


def test_merges_follow_chains_and_splits_go_by_class() -> None:
    rules = build_rules(
        [Merge("lid", "cap"), Merge("caps lid", "lid"), Merge("gray", "grey", "attribute")],
        [Split("top", (("bottle", "lid"), ("carton", "gable top")))],
    )
    assert rules.entity("caps lid") == "cap" and rules.entity("lid") == "cap" and rules.entity("cap") == "cap"
    assert rules.entity("top", "bottle") == "cap"  # the split's target is read through the merges too
    assert rules.entity("top", "carton") == "gable top" and rules.entity("top", "can") == "top" and rules.entity("top") == "top"
    j = Judgment(1, "ann", (("Lids", ("Gray",)), ("top", ())))
    assert judgment_concepts(j, rules=rules, cls="carton") == {"cap", "grey cap", "gable top"}


@pytest.mark.parametrize(
    ("merges", "splits", "message"),
    [
        ([Merge("cap", "cap")], [], "into itself"),
        ([Merge("a", "b"), Merge("b", "c"), Merge("c", "a")], [], "loop"),
        ([Merge("lid", "cap"), Merge("lid", "top")], [], "already merged into 'cap'"),
        ([Merge("top", "cap")], [Split("top", (("carton", "gable top"),))], "undo the merge"),
        ([], [Split("top", ())], "names no class"),
    ],
)
def test_contradictory_rules_are_refused(merges: list[Merge], splits: list[Split], message: str) -> None:
    with pytest.raises(InvalidInputError, match=message):
        build_rules(merges, splits)


def test_suggestions_find_typos_spacing_and_shared_words() -> None:
    counts = {"tag": 40, "yellow tag": 6, "label band": 30, "labelband": 2, "lable band": 3, "pull tab": 12, "tab": 4, "cap": 25, "can": 20, "lid": 5}
    found = {(s.source, s.into): s.reason for s in suggest_merges(counts)}
    assert found[("yellow tag", "tag")] == "shares the word 'tag'"
    assert found[("labelband", "label band")] == "same letters without spaces"
    assert found[("lable band", "label band")] == "1 typing edit apart"  # a swap of neighbours
    assert found[("tab", "pull tab")].startswith("shares")
    assert ("can", "cap") not in found and ("lid", "cap") not in found  # short words and true synonyms need a person
    rejected = suggest_merges(counts, rejected=[("tag", "yellow tag")], rules=build_rules([Merge("tab", "pull tab")]))
    assert {(s.source, s.into) for s in rejected}.isdisjoint({("yellow tag", "tag"), ("tab", "pull tab")})
