"""Simulated annotators for the demo only: they read the part mask under a region and name it,
with synonyms, typos and mistakes at a reliability of their own."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from .scenes import PARTS

SYNONYMS: dict[str, list[str]] = {
    "cap": ["Cap", "lid", "caps"], "label band": ["label", "Label Band", "label-band"], "tag": ["Tag", "tags", "yellow tag"],
    "rim": ["rim", "Rims"], "body": ["body"], "belt": ["belt", "conveyor belt"], "pull tab": ["pull tab", "tab"],
    "gable top": ["gable top", "top"], "print": ["print", "text"], "paper scrap": ["paper scrap", "paper"],
    "patch": ["patch", "square", "pink patch"],
}


@dataclass(frozen=True)
class SimulatedAnnotator:
    """A demo annotator: ``accuracy`` is the chance of naming a part correctly."""

    name: str
    accuracy: float
    synonym_rate: float = 0.2
    typo_rate: float = 0.05


def visible_parts(region_mask: npt.NDArray[np.bool_], part_mask: npt.NDArray[np.uint8]) -> list[str]:
    """Parts a careful person would name: covering >= 10% of the region, or mostly inside it; belt only if alone."""
    inside = np.bincount(part_mask[region_mask].ravel(), minlength=len(PARTS))
    total = np.bincount(part_mask.ravel(), minlength=len(PARTS))
    area = max(1, int(region_mask.sum()))
    named = [PARTS[i] for i in range(1, len(PARTS)) if inside[i] and (inside[i] / area >= 0.1 or inside[i] / total[i] >= 0.5)]
    return named or ["belt"]


def _typo(word: str, rng: np.random.Generator) -> str:
    if len(word) < 4:
        return word
    i = int(rng.integers(1, len(word) - 1))
    return word[:i] + word[i + 1] + word[i] + word[i + 2 :]


def simulate_label(annotator: SimulatedAnnotator, truth: list[str], attributes: dict[str, list[str]], rng: np.random.Generator) -> list[tuple[str, list[str]]]:
    """What this annotator writes for a region whose true parts are ``truth``; [] = nothing recognisable."""
    out: list[tuple[str, list[str]]] = []
    for part in truth:
        if rng.random() > annotator.accuracy:
            if rng.random() < 0.5:
                continue  # missed it
            part = PARTS[int(rng.integers(1, len(PARTS)))]  # named the wrong thing
        word = part
        if rng.random() < annotator.synonym_rate and part in SYNONYMS:
            options = SYNONYMS[part]
            word = options[int(rng.integers(len(options)))]
        if rng.random() < annotator.typo_rate:
            word = _typo(word, rng)
        attrs = [a for a in attributes.get(part, []) if rng.random() < 0.8]
        out.append((word, attrs))
    return out


def demo_crowd(n: int, seed: int = 0) -> list[SimulatedAnnotator]:
    """``n`` annotators of varied reliability (accuracy from 0.95 down to about 0.7)."""
    rng = np.random.default_rng(seed)
    return [SimulatedAnnotator(name=f"sim-{i + 1}", accuracy=float(0.95 - 0.25 * i / max(1, n - 1) + rng.uniform(-0.02, 0.02))) for i in range(n)]
