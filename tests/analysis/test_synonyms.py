from __future__ import annotations

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from nltk.metrics.distance import edit_distance as nltk_edit_distance

from analysis.concept_votes import presence_votes
from analysis.concepts import Judgment, attribute_words, judgment_concepts
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


def test_a_refinement_is_never_proposed_for_merging_into_its_own_entity() -> None:
    # "yellow tag" where somebody also wrote "tag: yellow" is a refinement of "tag": families nest it
    # under "tag" (an image showing it counts for "tag"), so merging it would only lose "yellow".
    judgments = [Judgment(1, "a", (("tag", ("yellow",)),)), Judgment(1, "b", (("yellow tag", ()),)), Judgment(2, "a", (("pull tab", ()),)),
                 Judgment(2, "b", (("tab", ()),)), Judgment(3, "a", (("tag", ()),)), Judgment(3, "b", (("big yellow tag", ()),))]
    words = attribute_words(judgments)
    counts = {"tag": 40, "yellow tag": 6, "big yellow tag": 1, "pull tab": 12, "tab": 4, "tagg": 2}
    found = {(s.source, s.into) for s in suggest_merges(counts, attributes=["yellow"])}
    assert ("yellow tag", "tag") not in found and ("tab", "pull tab") in found and ("tagg", "tag") not in found  # "tagg": 4 letters
    assert ("yellow tag", "tag") in {(s.source, s.into) for s in suggest_merges(counts)}  # with no attribute typed, it is a plain duplicate
    # The same judgments through the families: what is not suggested is nested instead.
    assert presence_votes(judgments).families["yellow tag"] == "tag"
    assert {(s.source, s.into) for s in suggest_merges(counts, attributes=words)}.isdisjoint({("yellow tag", "tag")})
    # "big" was never typed as an attribute: "big yellow tag" is not a refinement of "yellow tag" and may still be suggested.
    assert ("big yellow tag", "yellow tag") in {(s.source, s.into) for s in suggest_merges(counts, attributes=words)}
