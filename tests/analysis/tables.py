"""Concept tables for tests, built through build_concept_table from rows of (true, predicted, confidence, concepts)."""

from __future__ import annotations

import numpy as np
import pandas as pd

from analysis.concept_table import ConceptTable, build_concept_table


def table_from_rows(rows: list[tuple[str, str, float, set[str]]]) -> ConceptTable:
    """One region per concept per image, each with an equal share of the image's saliency."""
    meta = pd.DataFrame(
        [{"true_class": t, "predicted_class": p, "confidence": c, "split": "test"} for t, p, c, _ in rows],
        index=pd.Index(np.arange(100, 100 + len(rows)), name="image_id"),
    )
    image_regions, mass, concepts = {}, {}, {}
    region = 0
    for image, (_, _, _, cs) in zip(meta.index, rows):
        image_regions[int(image)] = []
        for c in sorted(cs):
            region += 1
            image_regions[int(image)].append(region)
            mass[region] = 1.0 / max(1, len(cs))
            concepts[region] = {c: 1.0}
    return build_concept_table(meta, image_regions, mass, concepts, method="majority")


def random_rows(seed: int, n: int = 300, concepts: tuple[str, ...] = ("cap", "tag", "rim", "label band", "body")) -> list[tuple[str, str, float, set[str]]]:
    rng = np.random.default_rng(seed)
    out = []
    for _ in range(n):
        t = str(rng.choice(["bottle", "can", "carton"]))
        cs = {c for c in concepts if rng.random() < 0.35}
        p = "can" if "tag" in cs and rng.random() < 0.8 else t if rng.random() < 0.85 else str(rng.choice(["bottle", "can", "carton"]))
        out.append((t, p, float(rng.uniform(0.4, 1.0)), cs))
    return out
