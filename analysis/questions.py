"""Questions over concepts: a small boolean language (and, or, not, parentheses, quoted multi-word
concepts), parsed into a tree, evaluated on the concept table, answered per class.

    (cap and "label band") and not tag
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt
import pandas as pd

from .association import associate_masks
from .concept_table import ConceptTable
from .concepts import normalise_label
from .errors import InvalidInputError
from .synonyms import edit_distance

KEYWORDS = ("and", "or", "not")
_OPERATORS = {"and": "and", "or": "or", "not": "not", "&": "and", "&&": "and", "|": "or", "||": "or", "!": "not"}


class QuestionError(InvalidInputError):
    """A question that cannot be read; ``column`` (1-based) points at the problem."""

    def __init__(self, message: str, column: int, text: str) -> None:
        pointer = f"\n  {text}\n  {' ' * (column - 1)}^"
        super().__init__(f"column {column}: {message}{pointer}")
        self.column = column
        self.reason = message


@dataclass(frozen=True)
class Concept:
    name: str
    column: int


@dataclass(frozen=True)
class Not:
    operand: Node


@dataclass(frozen=True)
class And:
    left: Node
    right: Node


@dataclass(frozen=True)
class Or:
    left: Node
    right: Node


Node = Concept | Not | And | Or

_TOKEN = re.compile(r'\s*(?:(?P<paren>[()])|"(?P<dq>[^"]*)"|\'(?P<sq>[^\']*)\'|(?P<sym>&&|\|\||[&|!])|(?P<word>[^\s()"\'&|!]+)|(?P<open>["\']))')


@dataclass(frozen=True)
class _Tok:
    kind: str  # "(", ")", "and", "or", "not", "concept", "end"
    text: str
    column: int


def _tokens(text: str) -> list[_Tok]:
    out = []
    pos = 0
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if m is None or m.end() == pos:  # only trailing spaces left
            break
        col = m.start() + len(m.group(0)) - len(m.group(0).lstrip()) + 1
        if m.group("open"):
            raise QuestionError("this quote is never closed; close it, e.g. \"label band\".", col, text)
        if m.group("paren"):
            out.append(_Tok(m.group("paren"), m.group("paren"), col))
        elif m.group("sym"):
            out.append(_Tok(_OPERATORS[m.group("sym")], m.group("sym"), col))
        elif m.group("word") is not None and m.group("word").lower() in _OPERATORS:
            out.append(_Tok(_OPERATORS[m.group("word").lower()], m.group("word"), col))
        else:
            raw = m.group("dq") if m.group("dq") is not None else m.group("sq") if m.group("sq") is not None else m.group("word")
            if not raw.strip():
                raise QuestionError("an empty concept name in quotes.", col, text)
            out.append(_Tok("concept", raw, col))
        pos = m.end()
    out.append(_Tok("end", "", len(text.rstrip()) + 1))
    return out


MAX_DEPTH = 32  # nested parentheses and "not"s; deeper than any question a person writes


class _Parser:
    def __init__(self, text: str) -> None:
        self.text = text
        self.toks = _tokens(text)
        self.i = 0
        self.depth = 0

    def _deeper(self, tok: _Tok) -> None:
        self.depth += 1
        if self.depth > MAX_DEPTH:
            raise QuestionError(f"the question nests more than {MAX_DEPTH} levels of parentheses or 'not'; write it flatter.", tok.column, self.text)

    def peek(self) -> _Tok:
        return self.toks[self.i]

    def take(self) -> _Tok:
        tok = self.toks[self.i]
        self.i += 1
        return tok

    def parse(self) -> Node:
        if self.peek().kind == "end":
            raise QuestionError("the question is empty; name a concept, e.g. tag and not cap.", 1, self.text)
        node = self.or_expr()
        tok = self.peek()
        if tok.kind == "concept":
            raise QuestionError(f"{tok.text!r} follows another concept; join them with and/or, or quote a multi-word concept, e.g. \"label band\".", tok.column, self.text)
        if tok.kind != "end":
            raise QuestionError(f"unexpected {tok.text!r}" + (" with no '(' before it." if tok.kind == ")" else "."), tok.column, self.text)
        return node

    def or_expr(self) -> Node:
        node = self.and_expr()
        while self.peek().kind == "or":
            self.take()
            node = Or(node, self.and_expr())
        return node

    def and_expr(self) -> Node:
        node = self.not_expr()
        while self.peek().kind == "and":
            self.take()
            node = And(node, self.not_expr())
        return node

    def not_expr(self) -> Node:
        if self.peek().kind == "not":
            self._deeper(self.take())
            node = Not(self.not_expr())
            self.depth -= 1
            return node
        return self.atom()

    def atom(self) -> Node:
        tok = self.take()
        if tok.kind == "(":
            self._deeper(tok)
            node = self.or_expr()
            self.depth -= 1
            close = self.take()
            if close.kind != ")":
                raise QuestionError(f"expected ')' to close the '(' at column {tok.column}" + (f", found {close.text!r}." if close.text else "."), close.column, self.text)
            return node
        if tok.kind == "concept":
            return Concept(normalise_label(tok.text), tok.column)
        where = "the end" if tok.kind == "end" else repr(tok.text)
        raise QuestionError(f"expected a concept or '(' but found {where}.", tok.column, self.text)


def parse_question(text: str) -> Node:
    """Parse a question; raises QuestionError with the column of the first problem."""
    if len(text) > 2000:
        raise QuestionError("questions are limited to 2,000 characters.", 2001, text[:40])
    return _Parser(text).parse()


def render(node: Node) -> str:
    """The question written back in canonical form (fully parenthesised below the top)."""
    if isinstance(node, Concept):
        return f'"{node.name}"' if not re.fullmatch(r"[^\s()\"'&|!]+", node.name) or node.name in KEYWORDS else node.name
    if isinstance(node, Not):
        return f"not {render(node.operand)}" if isinstance(node.operand, Concept) else f"not ({render(node.operand)})"
    op = "and" if isinstance(node, And) else "or"
    parts = [render(x) if isinstance(x, (Concept, Not)) else f"({render(x)})" for x in (node.left, node.right)]
    return f" {op} ".join(parts)


def rule_question(concepts: str) -> str:
    """The question a rule's concept set stands for: "cap & label band" -> 'cap and "label band"'."""
    names = [c for c in concepts.split(" & ") if c]
    node: Node = Concept(names[0], 0)
    for name in names[1:]:
        node = And(node, Concept(name, 0))
    return render(node)


def concepts_in(node: Node) -> list[Concept]:
    if isinstance(node, Concept):
        return [node]
    if isinstance(node, Not):
        return concepts_in(node.operand)
    return concepts_in(node.left) + concepts_in(node.right)


def evaluate(node: Node, presence: pd.DataFrame, *, text: str = "") -> pd.Series:
    """Which rows (images) satisfy the question; an unknown concept is an error with close matches."""
    known = list(presence.columns)
    for c in concepts_in(node):
        if c.name not in presence.columns:
            close = sorted(known, key=lambda k: (edit_distance(c.name, k) if c.name not in k else 0, k))[:3]
            hint = f" Close ones: {', '.join(close)}." if close else " No concept has been labelled yet."
            raise QuestionError(f"no concept {c.name!r} in the labels.{hint}", c.column, text or render(node))

    def ev(n: Node) -> npt.NDArray[np.bool_]:
        if isinstance(n, Concept):
            column: npt.NDArray[np.bool_] = presence[n.name].to_numpy(dtype=bool)
            return column
        if isinstance(n, Not):
            return ~ev(n.operand)
        if isinstance(n, And):
            return ev(n.left) & ev(n.right)
        return ev(n.left) | ev(n.right)

    return pd.Series(ev(node), index=presence.index)


@dataclass(frozen=True)
class ClassAnswer:
    """For one predicted class: how the matching images fall in it, and whether the class goes with the question."""

    cls: str
    class_images: int
    matching: int  # images of the class that match
    coverage: float  # matching / class_images
    confidence: float  # share of matching images that are of the class
    lift: float
    p_value: float
    q_value: float
    accuracy: float | None  # among matching images of the class
    mean_confidence: float | None


@dataclass(frozen=True)
class Answer:
    question: str  # canonical form
    n_images: int
    n_matching: int
    image_ids: list[int]
    accuracy: float | None
    mean_confidence: float | None
    by_class: list[ClassAnswer]  # predicted classes, most associated first
    by_true_class: dict[str, int]


def answer_question(text: str, table: ConceptTable) -> Answer:
    """Parse and evaluate a question on the table and describe the matching images per predicted class."""
    node = parse_question(text)
    mask = evaluate(node, table.presence, text=text)
    meta = table.meta
    n = len(meta)
    hit = meta[mask.to_numpy()]
    predicted = meta["predicted_class"].astype(str)
    classes = sorted(predicted.unique())
    hits = mask.to_numpy(dtype=bool)
    in_class = np.array([(predicted == cls).to_numpy() for cls in classes], dtype=bool).reshape(len(classes), n)
    found = associate_masks(np.broadcast_to(hits, in_class.shape), in_class)
    by_class = []
    for k, cls in enumerate(classes):
        sub = meta[in_class[k] & hits]
        n_cls, both = int(found.n_y[k]), int(found.n_xy[k])
        by_class.append(ClassAnswer(cls, n_cls, both, both / n_cls if n_cls else 0.0, float(found.confidence[k]), float(found.lift[k]),
                                    float(found.p_value[k]), float(found.q_value[k]),
                                    float(sub["correct"].mean()) if len(sub) else None, float(sub["confidence"].mean()) if len(sub) else None))
    by_class.sort(key=lambda a: (a.p_value, -a.lift, a.cls))
    return Answer(
        render(node), n, len(hit), [int(i) for i in hit.index],
        float(hit["correct"].mean()) if len(hit) else None, float(hit["confidence"].mean()) if len(hit) else None,
        by_class, {str(k): int(v) for k, v in hit["true_class"].astype(str).value_counts().sort_index().items()},
    )
