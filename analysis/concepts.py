"""From annotators' words to concepts: normalisation, majority per region, image-by-concept table."""

from __future__ import annotations

import functools
import re
import unicodedata
from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from .errors import InvalidInputError
from .synonyms import SynonymRules

_SPACE = re.compile(r"\s+")
_EDGE_PUNCT = re.compile(r"^[\W_]+|[\W_]+$")
_INNER = re.compile(r"[-_/]+")
_NO_SINGULAR = ("ss", "us", "is", "glass")


def singular(word: str) -> str:
    """English singular of a plural noun by the common suffix rules (common practice, not a dictionary)."""
    if len(word) <= 3 or word.endswith(_NO_SINGULAR):
        return word
    if word.endswith("ies"):
        return word[:-3] + "y"
    if word.endswith(("ches", "shes", "xes", "sses", "zes")):
        return word[:-2]
    if word.endswith("s"):
        return word[:-1]
    return word


@functools.lru_cache(maxsize=65_536)
def normalise_label(text: str) -> str:
    """Canonical form of a label: NFKC, case-folded, single spaces, no edge punctuation, last word singular.

    Kept for recent labels: a campaign repeats a few hundred words across all its judgments.
    """
    s = unicodedata.normalize("NFKC", text).casefold()
    s = _INNER.sub(" ", s)
    s = _SPACE.sub(" ", s).strip()
    s = _EDGE_PUNCT.sub("", s)
    if not s:
        return ""
    words = s.split(" ")
    words[-1] = singular(words[-1])
    return " ".join(words)


@dataclass(frozen=True)
class Judgment:
    """One annotator's label of one region: the entities named, each with attributes.

    ``unsure`` marks a judgment its author flagged "not sure": kept, but not counted as a vote.
    """

    region_id: int
    annotator: str
    entities: tuple[tuple[str, tuple[str, ...]], ...]  # (entity, attributes); empty = nothing recognisable
    unsure: bool = False


NOTHING = "nothing recognisable"


def attribute_words(judgments: Iterable[Judgment], *, rules: SynonymRules | None = None) -> frozenset[str]:
    """Every word the annotators used as an attribute (after a colon), normalised and read through the rules.

    A multi-word entity whose leading words are all among these ("yellow tag" where somebody wrote
    "tag: yellow") is read as its last words' entity with those words as an attribute.
    """
    return typed_attribute_words({a for j in judgments for _, attributes in j.entities for a in attributes}, rules=rules)


def typed_attribute_words(typed: Iterable[str], *, rules: SynonymRules | None = None) -> frozenset[str]:
    """:func:`attribute_words` from the distinct attributes as typed (each read once)."""
    rules = rules or SynonymRules()
    out: set[str] = set()
    for a in typed:
        out.update(rules.attribute(normalise_label(a)).split())
    out.discard("")
    return frozenset(out)


def entity_with_attributes(label: str, rules: SynonymRules, cls: str | None, words: frozenset[str]) -> tuple[str, list[str]]:
    """An entity label read through the rules, with leading attribute words split off: ("yellow tag") -> ("tag", ["yellow"])."""
    entity = rules.entity(label, cls)
    parts = entity.split(" ")
    lead = 0
    while lead < len(parts) - 1 and parts[lead] in words:
        lead += 1
    if lead == 0:
        return entity, []
    head = rules.entity(" ".join(parts[lead:]), cls)
    return head, [" ".join(parts[:lead])]


def judgment_families(
    j: Judgment, *, rules: SynonymRules | None = None, cls: str | None = None, attributes: frozenset[str] = frozenset()
) -> dict[str, str]:
    """Concepts one judgment names, each mapped to its entity (an entity maps to itself).

    Each entity is a concept, and ``"<attribute> <entity>"`` for each attribute is a refinement of
    it, nested under it (``{"tag": "tag", "yellow tag": "tag"}``). Labels are normalised, then
    read through the synonym ``rules`` (splits by ``cls``, the region's predicted class). An
    entity's leading words that are among ``attributes`` (see :func:`attribute_words`) become an
    attribute of the rest, and an attribute already among the entity's words is not added again:
    ``yellow square: yellow`` and the slip ``yellow square: square`` give "yellow square", never
    "yellow yellow square" or "square yellow square".
    """
    rules = rules or SynonymRules()
    out: dict[str, str] = {}
    for entity, typed in j.entities:
        label = normalise_label(entity)
        if not label:
            continue
        e, lead = entity_with_attributes(label, rules, cls, attributes)
        if not e:
            continue
        out[e] = e
        own = set(e.split(" "))
        for a in [*lead, *(rules.attribute(normalise_label(t)) for t in typed)]:
            words = [w for w in a.split(" ") if w and w not in own]
            if words:
                out.setdefault(f"{' '.join(words)} {e}", e)
    return out


def judgment_concepts(
    j: Judgment, *, rules: SynonymRules | None = None, cls: str | None = None, attributes: frozenset[str] = frozenset()
) -> set[str]:
    """Concepts one judgment names: each entity, and ``"<attribute> <entity>"`` for each attribute
    (see :func:`judgment_families`, which also says which entity each belongs to)."""
    return set(judgment_families(j, rules=rules, cls=cls, attributes=attributes))


def main_entity(
    j: Judgment, *, rules: SynonymRules | None = None, cls: str | None = None, attributes: frozenset[str] = frozenset()
) -> str:
    """The first entity a judgment names (normalised, through the rules, attribute words split off), or :data:`NOTHING`."""
    rules = rules or SynonymRules()
    for entity, _ in j.entities:
        label = normalise_label(entity)
        e = entity_with_attributes(label, rules, cls, attributes)[0] if label else ""
        if e:
            return e
    return NOTHING


MAX_ENTITIES = 10
MAX_ATTRIBUTES = 10
MAX_WORD_LENGTH = 60


def parse_label_text(text: str) -> list[tuple[str, list[str]]]:
    """Parse ``"cap: red; label band: torn, white"`` into [(entity, [attributes]), ...].

    Entities are separated by ``;`` or new lines, attributes follow a ``:`` and are
    separated by commas. Raw words are kept (NFKC, trimmed); normalisation happens later.
    """
    text = unicodedata.normalize("NFKC", text)
    entities: list[tuple[str, list[str]]] = []
    for chunk in re.split(r"[;\n]+", text):
        if not chunk.strip():
            continue
        name, _, rest = chunk.partition(":")
        name = _SPACE.sub(" ", name).strip()
        attrs = [_SPACE.sub(" ", a).strip() for a in rest.split(",") if a.strip()]
        if not name:
            raise InvalidInputError(f"{chunk.strip()!r} has attributes but no entity; write it as 'entity: attribute, attribute'.")
        for word in [name, *attrs]:
            if len(word) > MAX_WORD_LENGTH:
                raise InvalidInputError(f"{word[:20]!r}... is longer than {MAX_WORD_LENGTH} characters; shorten it.")
            if any(unicodedata.category(ch).startswith("C") for ch in word):
                raise InvalidInputError(f"{word!r} contains control characters; type plain text.")
        if len(attrs) > MAX_ATTRIBUTES:
            raise InvalidInputError(f"{name!r} has {len(attrs)} attributes; give at most {MAX_ATTRIBUTES}.")
        entities.append((name, attrs))
    if len(entities) > MAX_ENTITIES:
        raise InvalidInputError(f"{len(entities)} entities given; name at most {MAX_ENTITIES} per region.")
    return entities


def format_label_text(entities: Sequence[tuple[str, Sequence[str]]]) -> str:
    """The text form :func:`parse_label_text` reads back: ``"cap: red; label band: torn, white"``."""
    return "; ".join(f"{e}: {', '.join(a)}" if a else e for e, a in entities)


def entity_overlap(answer: Judgment, given: Judgment, *, rules: SynonymRules | None = None, cls: str | None = None) -> float:
    """How well ``given`` names the entities of a known ``answer``: Jaccard overlap of the two entity sets.

    Both empty ("nothing recognisable" against an empty answer) scores 1.
    """
    rules = rules or SynonymRules()

    def names(j: Judgment) -> set[str]:
        return {n for n in (rules.entity(normalise_label(e), cls) for e, _ in j.entities) if n}

    a, g = names(answer), names(given)
    if not a and not g:
        return 1.0
    return len(a & g) / len(a | g)
