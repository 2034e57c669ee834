"""Read a table of images for rule mining: which columns are concepts, which one names the images,
which one holds the class; heedmap's own concept export or any 0/1 table with an id column."""

from __future__ import annotations

from dataclasses import dataclass, field

import pandas as pd

from .errors import InvalidInputError

TRUE = frozenset({"1", "1.0", "true", "yes"})
FALSE = frozenset({"0", "0.0", "false", "no", ""})
CONCEPT_PREFIX = "concept: "  # heedmap's concept export: "concept: X" (0/1) and "saliency share: X" per concept


@dataclass(frozen=True)
class RuleInput:
    """Presence of each concept per image (index: the image ids), each image's class, and the families found."""

    presence: pd.DataFrame
    classes: pd.Series
    families: dict[str, str] = field(default_factory=dict)
    source: str = "table"  # "heedmap concept export" or "table"
    id_column: str | None = None


def infer_families(presence: pd.DataFrame) -> dict[str, str]:
    """Refinement -> entity for columns named "<words> <entity>" where "<entity>" is a column too and every
    image showing the refinement shows the entity: how heedmap's own export writes "yellow tag" beside "tag".

    The longest such entity wins ("dark green belt" -> "green belt" when both are columns).
    """
    names = set(map(str, presence.columns))
    out: dict[str, str] = {}
    for c in map(str, presence.columns):
        words = c.split(" ")
        for start in range(1, len(words)):
            entity = " ".join(words[start:])
            if entity in names and not (presence[c].astype(bool) & ~presence[entity].astype(bool)).any():
                out[c] = entity
                break
    return out


def _as_presence(frame: pd.DataFrame, columns: list[str], *, hint: str) -> pd.DataFrame:
    text = frame[columns].astype(str).apply(lambda col: col.str.strip().str.lower())
    bad = [c for c in columns if not text[c].isin(TRUE | FALSE).all()]
    if bad:
        examples = ", ".join(f"{c!r} (e.g. {frame.loc[~text[c].isin(TRUE | FALSE), c].iloc[0]!r})" for c in bad[:3])
        raise InvalidInputError(f"concept columns must hold only 0/1 (or true/false, yes/no); {examples} {'does' if len(bad) == 1 else 'do'} not. {hint}")
    flags: pd.DataFrame = text.isin(TRUE)
    return flags


def read_rule_table(frame: pd.DataFrame, *, target: str, id_column: str | None = None, families: bool = True) -> RuleInput:
    """Split a table (read as text) into concept presence, classes and image ids.

    Parameters
    ----------
    frame
        One row per image, every cell as text.
    target
        The column holding each image's class.
    id_column
        A column naming the images (kept as the index, never read as a concept). heedmap's own
        concept export is recognised by its "concept: X" columns: its ``image_id`` is the id and its
        other columns (metadata, saliency shares) are left out.
    families
        Nest a column "<words> <entity>" under the column "<entity>" where the data allow it (see
        :func:`infer_families`).

    Raises
    ------
    InvalidInputError
        A named column is missing, ids repeat, or a concept column holds something other than 0/1
        (the message names the column and suggests ``--id`` for a column that looks like ids).
    """
    columns = [str(c) for c in frame.columns]
    for name, what in ((target, "target"), (id_column, "id")):
        if name is not None and name not in columns:
            raise InvalidInputError(f"the table has no column {name!r} (given as the {what} column); its columns are {columns[:20]}.")
    if id_column is not None and id_column == target:
        raise InvalidInputError(f"{id_column!r} cannot be both the id column and the target; name the class column with --target.")
    exported = [c for c in columns if c.startswith(CONCEPT_PREFIX)]
    if exported:
        source = "heedmap concept export"
        if id_column is None and "image_id" in columns:
            id_column = "image_id"
        concept_cols = [c for c in exported if c != target]
        hint = "Export the table again with 'heedmap export --what concepts'."
    else:
        source = "table"
        concept_cols = [c for c in columns if c not in (target, id_column)]
        guess = next((c for c in concept_cols if frame[c].astype(str).str.strip().str.lower().isin(TRUE | FALSE).mean() < 0.5
                      and frame[c].nunique() == len(frame)), None)
        hint = (f"If {guess!r} names the images, pass --id {guess}; otherwise drop or recode it." if guess else
                "Drop or recode them, or name an id column with --id COLUMN.")
    if not concept_cols:
        raise InvalidInputError(f"the table has no concept column besides {target!r}; add one 0/1 column per concept.")
    presence = _as_presence(frame, concept_cols, hint=hint)
    if exported:
        presence.columns = [c[len(CONCEPT_PREFIX):] for c in concept_cols]
    if id_column is not None:
        ids = frame[id_column].astype(str).str.strip()
        repeated = ids[ids.duplicated()]
        if not repeated.empty:
            raise InvalidInputError(f"the id column {id_column!r} repeats {repeated.iloc[0]!r}; give one row per image.")
        presence.index = pd.Index(ids, name=id_column)
    classes = pd.Series(frame[target].astype(str).str.strip().to_numpy(), index=presence.index, name=target)
    return RuleInput(presence, classes, infer_families(presence) if families else {}, source, id_column)
