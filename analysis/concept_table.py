"""The image-by-concept table: each image's classes and confidence, which concepts its regions carry,
and how much of its saliency lies on them."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Literal

import numpy as np
import pandas as pd
from scipy import sparse

from .errors import InvalidInputError
from .rules import RegionMass, RuleTable, mine_rules
from .sampling import Design

Target = Literal["predicted", "true", "errors"]
TARGETS: tuple[Target, ...] = ("predicted", "true", "errors")
META_COLUMNS = ["true_class", "predicted_class", "confidence", "correct", "split"]
CORRECT = "correct"


@dataclass(frozen=True)
class ConceptTable:
    """One row per image (index: image id).

    ``meta`` holds META_COLUMNS; ``presence`` says whether any of the image's regions carries each
    concept; ``share`` is the share of the image's saliency mass on regions carrying it (0..1).
    ``method`` and ``threshold`` record how region labels became concepts. ``families`` maps each
    refinement among the columns to its entity ("yellow tag" -> "tag"); an image that shows a
    refinement shows its entity.
    """

    meta: pd.DataFrame
    presence: pd.DataFrame
    share: pd.DataFrame
    regions: RegionMass
    method: str
    threshold: float
    families: Mapping[str, str] = field(default_factory=dict)
    # A sampled campaign's design (each row's stratum, each stratum's images); None = every image was labelled.
    design: Design | None = None

    @property
    def sampled(self) -> bool:
        return self.design is not None

    @property
    def stands_for(self) -> int:
        """Images the estimates stand for: the table's rows, or for a sample the images of the strata it covers."""
        return int(round(self.design.represented)) if self.design is not None else len(self.meta)

    @property
    def concepts(self) -> list[str]:
        return list(self.presence.columns)

    def __len__(self) -> int:
        return len(self.meta)

    def targets(self, target: Target) -> pd.Series:
        """The class each image counts under: predicted, true, or for errors "true -> predicted" (others "correct")."""
        if target == "predicted":
            return self.meta["predicted_class"].astype(str)
        if target == "true":
            return self.meta["true_class"].astype(str)
        if target == "errors":
            label = self.meta["true_class"].astype(str) + " -> " + self.meta["predicted_class"].astype(str)
            return label.where(~self.meta["correct"], CORRECT)
        raise InvalidInputError(f"target must be one of {', '.join(TARGETS)}; got {target!r}.")

    def rules(self, *, target: Target = "predicted", min_support: float = 0.02, max_len: int = 2, min_lift: float = 1.0,
              min_count: int = 1, prune: bool = True) -> RuleTable:
        """Concept rules for the chosen target, with each rule's saliency share; "correct" is not a target class.

        A sampled table's rates are weighted estimates with design-based intervals (analysis.weighted_rules).
        """
        rules = mine_rules(self.presence, self.targets(target), min_support=min_support, max_len=max_len, min_lift=min_lift, min_count=min_count,
                           prune=prune, saliency=self.regions, families=self.families, design=self.design)
        if target == "errors":
            kept = rules.rules[rules.rules["class"] != CORRECT].reset_index(drop=True)
            return replace(rules, rules=kept)
        return rules

    def example_regions(self, concepts: Sequence[str], rows: pd.Series, *, limit: int = 6) -> list[int]:
        """Ids of regions carrying any of ``concepts`` in the images where ``rows`` is true, most salient first."""
        if self.regions.ids is None or not concepts:
            return []
        cols = [self.presence.columns.get_loc(c) for c in concepts if c in self.presence.columns]
        on = np.asarray(self.regions.carries[:, cols].sum(axis=1)).ravel() > 0
        on &= rows.to_numpy(dtype=bool)[self.regions.region_image]
        picked = np.nonzero(on)[0]
        picked = picked[np.argsort(-self.regions.mass[picked], kind="stable")][:limit]
        return [int(self.regions.ids[i]) for i in picked]

    def frame(self) -> pd.DataFrame:
        """A flat export: meta, then "concept: X" (0/1) and "saliency share: X" per concept, and the method."""
        presence = self.presence.astype(int).add_prefix("concept: ")
        share = self.share.round(4).add_prefix("saliency share: ")
        return pd.concat([self.frame_meta(), presence, share], axis=1)

    def frame_meta(self) -> pd.DataFrame:
        """The columns of :meth:`frame` before the concepts: the method, the sampling weight of a sample, then META_COLUMNS."""
        out = self.meta.copy()
        out.insert(0, "aggregation", self.method)
        if self.design is not None:
            out.insert(1, "sampling weight", self.design.weights)
        return out


def _checked_meta(meta: pd.DataFrame) -> pd.DataFrame:
    """The image metadata's columns in table order, with ``correct`` added; a clear error when any is missing."""
    missing = [c for c in ("true_class", "predicted_class", "confidence", "split") if c not in meta.columns]
    if missing:
        raise InvalidInputError(f"image metadata lacks {missing}.")
    if len(meta) == 0:
        raise InvalidInputError("no images given; run saliency and collect labels first.")
    meta = meta[["true_class", "predicted_class", "confidence", "split"]].copy()
    meta["correct"] = meta["true_class"].astype(str) == meta["predicted_class"].astype(str)
    return meta[META_COLUMNS]


def build_concept_table(
    meta: pd.DataFrame,
    image_regions: Mapping[int, Sequence[int]],
    region_mass: Mapping[int, float],
    region_concepts: Mapping[int, Mapping[str, float]],
    *,
    method: str,
    threshold: float = 0.5,
    families: Mapping[str, str] | None = None,
) -> ConceptTable:
    """Assemble the table from per-image regions, each region's saliency share and its concepts.

    Parameters
    ----------
    meta
        Indexed by image id, with true_class, predicted_class, confidence and split.
    image_regions
        Every image's regions (an image with none gets no concept).
    region_mass
        Share of its image's saliency inside each region.
    region_concepts
        Concepts present per region (from aggregation).
    families
        Refinement -> entity (``PresenceVotes.families``); a region carrying a refinement carries
        its entity too, so the entity's column counts every image that shows any of its refinements.
    """
    meta = _checked_meta(meta)
    parent = dict(families or {})

    def with_entities(found: Mapping[str, float]) -> set[str]:
        out = set(found)
        for c in found:
            seen = {c}
            while c in parent and parent[c] not in seen:  # refinements of refinements reach the top entity
                c = parent[c]
                seen.add(c)
                out.add(c)
        return out

    # Regions show the same few concept sets again and again: each distinct set is completed with its entities once.
    completed: dict[frozenset[str], set[str]] = {}

    def carried_by(found: Mapping[str, float]) -> set[str]:
        key = frozenset(found)
        out = completed.get(key)
        if out is None:
            out = completed[key] = with_entities(found)
        return out

    carried = {r: carried_by(region_concepts.get(r, {})) for image in meta.index.tolist() for r in image_regions.get(image, ())}
    concepts = sorted({c for cs in carried.values() for c in cs})
    col = {c: j for j, c in enumerate(concepts)}
    row = {image: i for i, image in enumerate(meta.index)}
    r_image: list[int] = []
    r_mass: list[float] = []
    r_rows: list[int] = []
    r_cols: list[int] = []
    r_ids: list[int] = []
    for image in meta.index:
        for r in image_regions.get(image, ()):
            k = len(r_image)
            r_ids.append(int(r))
            r_image.append(row[image])
            r_mass.append(float(region_mass.get(r, 0.0)))
            for c in carried[r]:
                r_rows.append(k)
                r_cols.append(col[c])
    carries = sparse.csc_matrix((np.ones(len(r_rows), dtype=bool), (r_rows, r_cols)), shape=(len(r_image), len(concepts)))
    regions = RegionMass(np.array(r_image, dtype=np.int64), np.array(r_mass, dtype=np.float64), carries, np.array(r_ids, dtype=np.int64))
    return _assembled(meta, regions, concepts, method=method, threshold=threshold, families=parent)


def concept_table_from_regions(meta: pd.DataFrame, regions: RegionMass, concepts: Sequence[str], *, method: str, threshold: float = 0.5,
                               families: Mapping[str, str] | None = None) -> ConceptTable:
    """:func:`build_concept_table` from its regions already as arrays: each region's image row (in ``meta``'s order),
    saliency share and id, and which of ``concepts`` (sorted) it carries, entities of its refinements included."""
    return _assembled(_checked_meta(meta), regions, list(concepts), method=method, threshold=threshold, families=families or {})


def _assembled(meta: pd.DataFrame, regions: RegionMass, concepts: list[str], *, method: str, threshold: float, families: Mapping[str, str]) -> ConceptTable:
    n_regions = len(regions.region_image)
    carries = regions.carries
    to_image = sparse.csr_matrix((np.ones(n_regions), (regions.region_image, np.arange(n_regions))), shape=(len(meta), n_regions))
    share = to_image @ sparse.csr_matrix(carries.multiply(regions.mass[:, None]))
    count = to_image @ carries.astype(np.float64)
    presence = pd.DataFrame(count.toarray() > 0, index=meta.index, columns=concepts)
    share_frame = pd.DataFrame(np.asarray(share.todense()).clip(0, 1), index=meta.index, columns=concepts)
    shown = set(concepts)
    kept = {c: e for c, e in families.items() if c in shown and e in shown}
    return ConceptTable(meta, presence, share_frame, regions, method, threshold, kept)
