from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import fisher_exact

from analysis.questions import And, Concept, Not, Or, QuestionError, answer_question, evaluate, parse_question, render

from .tables import random_rows, table_from_rows

NAMES = ["cap", "tag", "rim", "label band", "pull tab", "body"]
rng = np.random.default_rng(0)
PRESENCE = pd.DataFrame(rng.random((200, len(NAMES))) < 0.4, columns=NAMES)

trees = st.recursive(
    st.sampled_from(NAMES).map(lambda n: Concept(n, 0)),
    lambda inner: st.one_of(inner.map(Not), st.tuples(inner, inner).map(lambda t: And(*t)), st.tuples(inner, inner).map(lambda t: Or(*t))),
    max_leaves=8,
)


def _direct(node: object) -> np.ndarray:
    """The same question evaluated in plain Python/numpy, with no parser involved."""
    if isinstance(node, Concept):
        return PRESENCE[node.name].to_numpy()
    if isinstance(node, Not):
        return ~_direct(node.operand)
    if isinstance(node, And):
        return _direct(node.left) & _direct(node.right)
    assert isinstance(node, Or)
    return _direct(node.left) | _direct(node.right)


@settings(max_examples=300, deadline=None)
@given(trees)
def test_parsing_then_evaluating_equals_evaluating_the_built_expression(tree: object) -> None:
    text = render(tree)  # type: ignore[arg-type]
    got = evaluate(parse_question(text), PRESENCE, text=text).to_numpy()
    np.testing.assert_array_equal(got, _direct(tree))


def test_precedence_and_spelling() -> None:
    # not binds tighter than and, and tighter than or; keywords in any case; quotes for multi-word names.
    a = evaluate(parse_question('cap or tag AND NOT "label band"'), PRESENCE).to_numpy()
    p = PRESENCE
    np.testing.assert_array_equal(a, p["cap"] | (p["tag"] & ~p["label band"]))
    b = evaluate(parse_question("(Caps | tags) & !rim"), PRESENCE).to_numpy()  # names normalised like labels
    np.testing.assert_array_equal(b, (p["cap"] | p["tag"]) & ~p["rim"])


@pytest.mark.parametrize(
    ("text", "column", "words"),
    [
        ("cap and", 8, "found the end"),
        ("(cap or tag", 12, "to close the '(' at column 1"),
        ("cap tag", 5, "quote a multi-word concept"),
        ('cap and "label band', 9, "never closed"),
        ("cap )", 5, "no '(' before it"),
        ("", 1, "empty"),
        ("and cap", 1, "expected a concept"),
    ],
)
def test_syntax_errors_point_at_the_column(text: str, column: int, words: str) -> None:
    with pytest.raises(QuestionError) as info:
        parse_question(text)
    assert info.value.column == column and words in info.value.reason
    assert str(info.value).splitlines()[-1].index("^") == column + 1  # the pointer line sits under the column


def test_unknown_concept_names_close_ones() -> None:
    with pytest.raises(QuestionError, match="no concept 'cpa'.*cap") as info:
        evaluate(parse_question("tag and cpa"), PRESENCE, text="tag and cpa")
    assert info.value.column == 9


def test_answer_per_class_matches_fisher_exact() -> None:
    table = table_from_rows(random_rows(3))
    ans = answer_question("tag and not cap", table)
    mask = table.presence["tag"] & ~table.presence["cap"]
    assert ans.n_matching == int(mask.sum()) and ans.image_ids == [int(i) for i in table.meta.index[mask]]
    can = next(a for a in ans.by_class if a.cls == "can")
    pred = table.meta["predicted_class"] == "can"
    both, n = int((pred & mask).sum()), len(table)
    expected = fisher_exact([[both, int(mask.sum()) - both], [int(pred.sum()) - both, n - int(mask.sum()) - int(pred.sum()) + both]], alternative="greater")[1]
    assert can.p_value == pytest.approx(expected) and ans.by_class[0].cls == "can"  # the tag drives "can" in these rows
