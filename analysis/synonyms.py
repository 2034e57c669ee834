"""A campaign's synonym rules over normalised labels: merges, class-dependent splits, and suggestions.

Raw labels are never rewritten: rules are applied when concepts are read, so removing a rule
undoes it. A merge maps one label onto another ("lid" -> "cap"); a split gives a label that
means different things different targets by the region's predicted class ("top" -> "cap" on
bottles, "gable top" on cartons).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Literal

from .errors import InvalidInputError

Kind = Literal["entity", "attribute"]
KINDS: tuple[Kind, ...] = ("entity", "attribute")


@dataclass(frozen=True)
class Merge:
    """Read ``source`` as ``target`` (both normalised labels of the same kind)."""

    source: str
    target: str
    kind: Kind = "entity"


@dataclass(frozen=True)
class Split:
    """Read ``source`` as ``targets[class]`` for regions predicted as that class; other classes keep it."""

    source: str
    targets: tuple[tuple[str, str], ...]  # (class, concept), sorted by class


@dataclass(frozen=True)
class SynonymRules:
    """Validated merges and splits; :meth:`entity` and :meth:`attribute` resolve a normalised label."""

    merges: tuple[Merge, ...] = ()
    splits: tuple[Split, ...] = ()
    _entity: dict[str, str] = field(default_factory=dict, compare=False, repr=False)
    _attribute: dict[str, str] = field(default_factory=dict, compare=False, repr=False)
    _split: dict[str, dict[str, str]] = field(default_factory=dict, compare=False, repr=False)

    def entity(self, label: str, cls: str | None = None) -> str:
        """The concept an entity label stands for in a region predicted as ``cls``."""
        label = self._entity.get(label, label)
        by_class = self._split.get(label)
        if by_class is not None and cls is not None and cls in by_class:
            return self._entity.get(by_class[cls], by_class[cls])
        return label

    def attribute(self, label: str) -> str:
        return self._attribute.get(label, label)


def _resolve_chains(pairs: Mapping[str, str], kind: str) -> dict[str, str]:
    """Follow a -> b -> c to a -> c; a cycle is an error that names its labels."""
    out = {}
    for start in pairs:
        seen = [start]
        cur = pairs[start]
        while cur in pairs:
            if cur in seen:
                loop = " -> ".join([*seen, cur])
                raise InvalidInputError(f"the {kind} merges form a loop ({loop}); remove one of them.")
            seen.append(cur)
            cur = pairs[cur]
        out[start] = cur
    return out


def build_rules(merges: Iterable[Merge], splits: Iterable[Split] = ()) -> SynonymRules:
    """Check the rules for contradictions (self-merges, two targets for one label, loops) and index them.

    Raises
    ------
    InvalidInputError
        With the labels involved and what to remove.
    """
    merges, splits = tuple(merges), tuple(splits)
    maps: dict[str, dict[str, str]] = {k: {} for k in KINDS}
    for m in merges:
        if m.kind not in KINDS:
            raise InvalidInputError(f"merge kind must be one of {KINDS}; got {m.kind!r}.")
        if not m.source or not m.target:
            raise InvalidInputError("a merge needs a label and a target; neither may be empty.")
        if m.source == m.target:
            raise InvalidInputError(f"{m.source!r} cannot be merged into itself.")
        known = maps[m.kind].get(m.source)
        if known is not None and known != m.target:
            raise InvalidInputError(f"{m.source!r} is already merged into {known!r}; undo that merge before merging it into {m.target!r}.")
        maps[m.kind][m.source] = m.target
    split_map: dict[str, dict[str, str]] = {}
    for s in splits:
        if s.source in maps["entity"]:
            raise InvalidInputError(f"{s.source!r} is merged into {maps['entity'][s.source]!r}; undo the merge before splitting it.")
        if s.source in split_map:
            raise InvalidInputError(f"{s.source!r} is split already; edit that split instead of adding another.")
        if not s.targets:
            raise InvalidInputError(f"the split of {s.source!r} names no class; give at least one class and its concept.")
        split_map[s.source] = dict(s.targets)
    return SynonymRules(
        merges, splits, _resolve_chains(maps["entity"], "entity"), _resolve_chains(maps["attribute"], "attribute"), split_map
    )


def edit_distance(a: str, b: str) -> int:
    """Damerau-Levenshtein distance: inserts, deletes, substitutions and swaps of neighbouring letters.

    The unrestricted form (Lowrance & Wagner, 1975), so "ab " -> "a ab" is two edits, not three.
    """
    if a == b:
        return 0
    big = len(a) + len(b)
    last_row: dict[str, int] = {}
    # d has a border row and column of ``big`` and one of 0..n, as the algorithm defines.
    d = [[big] * (len(b) + 2) for _ in range(len(a) + 2)]
    for i in range(len(a) + 1):
        d[i + 1][1] = i
    for j in range(len(b) + 1):
        d[1][j + 1] = j
    for i in range(1, len(a) + 1):
        last_col = 0
        for j in range(1, len(b) + 1):
            k, lc = last_row.get(b[j - 1], 0), last_col
            cost = 1
            if a[i - 1] == b[j - 1]:
                cost, last_col = 0, j
            d[i + 1][j + 1] = min(
                d[i][j] + cost, d[i + 1][j] + 1, d[i][j + 1] + 1, d[k][lc] + (i - k - 1) + 1 + (j - lc - 1)
            )
        last_row[a[i - 1]] = i
    return d[len(a) + 1][len(b) + 1]


@dataclass(frozen=True)
class Suggestion:
    """Two labels that look like one concept; ``into`` is the more frequent, the proposed target."""

    source: str
    into: str
    reason: str
    source_count: int
    into_count: int


def suggest_merges(
    counts: Mapping[str, int],
    *,
    rules: SynonymRules | None = None,
    rejected: Iterable[tuple[str, str]] = (),
    max_labels: int = 1000,
    attributes: Iterable[str] = (),
) -> list[Suggestion]:
    """Likely duplicates among labels in use: a typo (one edit in a word of 5+ letters, two in 9+),
    the same letters without spaces, or one label's words inside the other's ("pull tab", "tab").

    A refinement is never proposed for merging into its own entity: when the longer label is the
    shorter one with leading words that annotators use as attributes (``attributes``: the attribute
    labels of the campaign, e.g. "yellow" from "tag: yellow"), "yellow tag" is already nested under
    "tag" as one family (:func:`analysis.concepts.judgment_families`), and a merge would lose the
    attribute. Labels already merged, and pairs the analyst rejected (either order), are left out.
    The ``max_labels`` most frequent labels are compared, each pair once; most frequent pairs first.
    """
    rules = rules or SynonymRules()
    attribute_words = {w for a in attributes for w in a.split()}
    merged = {m.source for m in rules.merges if m.kind == "entity"} | {s.source for s in rules.splits}
    no = {frozenset(p) for p in rejected}
    labels = sorted((lab for lab in counts if lab and lab not in merged), key=lambda lab: (-counts[lab], lab))[:max_labels]
    out = []
    for i, a in enumerate(labels):
        wa = set(a.split())
        for b in labels[i + 1 :]:
            if frozenset((a, b)) in no:
                continue
            reason = ""
            if a.replace(" ", "") == b.replace(" ", ""):
                reason = "same letters without spaces"
            elif min(len(a), len(b)) >= 5 and abs(len(a) - len(b)) <= 2:
                d = edit_distance(a, b)
                if d == 1 or (d == 2 and min(len(a), len(b)) >= 9):
                    reason = f"{d} typing edit{'s' if d > 1 else ''} apart"
            if not reason:
                wb = set(b.split())
                if _refines(a, b, attribute_words) or _refines(b, a, attribute_words):
                    continue
                if wa < wb or wb < wa:
                    reason = f"shares the word{'s' if len(wa & wb) > 1 else ''} {' '.join(sorted(wa & wb))!r}"
            if reason:
                # a is at least as frequent as b (the list is sorted), so b goes into a.
                out.append(Suggestion(b, a, reason, counts[b], counts[a]))
    return sorted(out, key=lambda s: (-(s.source_count + s.into_count), s.into, s.source))


def _refines(longer: str, shorter: str, attribute_words: set[str]) -> bool:
    """``longer`` is ``shorter`` with leading attribute words: "yellow tag" refines "tag" when "yellow" is an attribute."""
    if not longer.endswith(" " + shorter):
        return False
    lead = longer[: -len(shorter) - 1].split()
    return bool(lead) and all(w in attribute_words for w in lead)
