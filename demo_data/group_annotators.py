"""Simulated annotators labelling a group of crops (demo and benchmarks only).

Each reads only the part masks under the crops shown to them (never other people's answers): they
see each crop's parts with their own accuracy, name the part most of the crops show (with the same
synonyms and typos as on single crops), and untick the crops that do not show it, with a per-crop
error model: a crop that does not fit stays ticked with probability ``miss_misfit`` (overlooked in a
grid), and one that fits is unticked with probability ``drop_fit``. For each ticked crop that fits they add what
else they saw in it (its other parts, with their attributes as on a single crop), each overlooked with probability
``miss_other`` (and the named part's own attributes the group's name left out, such as its colour in that crop): a
crop's label is then what the group shares plus its own additions, as the app stores it.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .annotators import SYNONYMS, SimulatedAnnotator
from .scenes import PARTS


@dataclass(frozen=True)
class GroupErrors:
    miss_misfit: float = 0.15  # a crop that does not show the named part is left ticked
    drop_fit: float = 0.03  # a crop that shows it is unticked anyway
    miss_other: float = 0.1  # another part seen in a ticked crop is not added to that crop


DEFAULT_ERRORS = GroupErrors()


@dataclass(frozen=True)
class GroupJudgment:
    entities: list[tuple[str, list[str]]]  # what the ticked crops share
    ticked: list[bool]  # per crop shown, in order
    extras: list[list[tuple[str, list[str]]]]  # per crop shown: what it shows besides (empty for unticked ones)

    def crop_label(self, i: int) -> list[tuple[str, list[str]]]:
        """The label crop ``i`` gets (it must be ticked): what the group shares, then its own additions (an addition of the
        shared thing adds its attributes to it, as the app stores it)."""
        out = [(e, list(a)) for e, a in self.entities]
        for e, attrs in self.extras[i]:
            same = [k for k, (name, _) in enumerate(out) if name == e]
            if same:
                out[same[0]][1].extend(a for a in attrs if a not in out[same[0]][1])
            else:
                out.append((e, list(attrs)))
        return out


def _word(part: str, annotator: SimulatedAnnotator, rng: np.random.Generator) -> str:
    word = part
    if rng.random() < annotator.synonym_rate and part in SYNONYMS:
        options = SYNONYMS[part]
        word = options[int(rng.integers(len(options)))]
    if rng.random() < annotator.typo_rate and len(word) >= 4:
        i = int(rng.integers(1, len(word) - 1))
        word = word[:i] + word[i + 1] + word[i] + word[i + 2 :]
    return word


def judge_group(annotator: SimulatedAnnotator, truths: Sequence[Sequence[str]], attributes: Sequence[dict[str, list[str]]],
                rng: np.random.Generator, errors: GroupErrors | None = None) -> GroupJudgment | None:
    """What this annotator does with a group whose crops truly show ``truths`` (one list of parts per crop);
    ``attributes`` per crop: its scene's attributes of each part. None: they skip the group (nothing ticked)."""
    errors = errors or DEFAULT_ERRORS
    seen = [[p for p in parts if rng.random() < annotator.accuracy] for parts in truths]
    counts = Counter(p for parts in seen for p in set(parts))
    if not counts:
        return None
    part = min(counts, key=lambda p: (-counts[p], PARTS.index(p) if p in PARTS else len(PARTS)))
    fits = [part in parts for parts in truths]
    ticked = [bool(rng.random() >= errors.drop_fit) if fit else bool(rng.random() < errors.miss_misfit) for fit in fits]
    if not any(ticked):
        return None
    # Attributes every fitting ticked crop shares (colours differ between scenes, so usually few).
    shared: set[str] | None = None
    for fit, tick, attrs in zip(fits, ticked, attributes):
        if fit and tick:
            mine = set(attrs.get(part, []))
            shared = mine if shared is None else shared & mine
    attrs_named = sorted(a for a in (shared or set()) if rng.random() < 0.8)
    word = _word(part, annotator, rng)
    extras: list[list[tuple[str, list[str]]]] = []
    for fit, tick, parts, attrs in zip(fits, ticked, seen, attributes):
        added: list[tuple[str, list[str]]] = []
        if fit and tick:
            # The named part's own attributes that the group's name left out (its colour in this crop), then its other parts.
            own = [a for a in attrs.get(part, []) if a not in attrs_named and rng.random() < 0.8]
            if own and rng.random() >= errors.miss_other:
                added.append((word, own))
            added += [(_word(p, annotator, rng), [a for a in attrs.get(p, []) if rng.random() < 0.8])
                     for p in dict.fromkeys(parts) if p != part and rng.random() >= errors.miss_other]
        extras.append(added)
    return GroupJudgment([(word, attrs_named)], ticked, extras)
