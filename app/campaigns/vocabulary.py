"""The words a campaign's annotators typed, counted as labels are stored and undone.

The counts live in ``word_counts`` (raw normalised words, before synonym rules), changed in the
same transaction as the label, so reading the vocabulary costs the same on the last task of a
campaign as on the first.
"""

from __future__ import annotations

from collections import Counter
from collections.abc import Iterable
from typing import Any

from sqlalchemy import delete, select
from sqlalchemy.orm import Session

from analysis.concepts import normalise_label
from analysis.synonyms import SynonymRules

from ..db import dialect_insert
from ..models import Label, WordCount


def words_of(entities: Iterable[object] | None) -> Counter[tuple[str, str]]:
    """(kind, normalised word) -> uses in one label's entities ([[entity, [attributes]], ...])."""
    found: Counter[tuple[str, str]] = Counter()
    for e in entities or []:
        name = normalise_label(str(e[0]))  # type: ignore[index]
        if name:
            found["entity", name] += 1
        for a in e[1]:  # type: ignore[index]
            attr = normalise_label(str(a))
            if attr:
                found["attribute", attr] += 1
    return found


def _upsert(dialect: str) -> Any:
    stmt = dialect_insert(dialect, WordCount)
    return stmt.on_conflict_do_update(index_elements=["campaign_id", "kind", "word"], set_={"n": WordCount.n + stmt.excluded.n})


# Built once per database kind: it runs on every label stored, and building it (its "excluded" columns above all) cost more than running it.
_ADD = {name: _upsert(name) for name in ("sqlite", "postgresql")}


def add_words(s: Session, campaign_id: int, counts: Counter[tuple[str, str]], *, sign: int = 1) -> None:
    """Add (``sign`` 1) or take away (-1) one label's words from the campaign's counts."""
    if not counts:
        return
    conn = s.connection()
    # Rows in one order everywhere: two transactions counting the same words lock them in the same order (no deadlock on PostgreSQL).
    conn.execute(_ADD[conn.dialect.name], [{"campaign_id": campaign_id, "kind": k, "word": w, "n": sign * n} for (k, w), n in sorted(counts.items())])


def recount_words(s: Session, campaign_id: int) -> None:
    """Count the campaign's words again from its labels (for projects made before the counts were kept)."""
    s.execute(delete(WordCount).where(WordCount.campaign_id == campaign_id))
    total: Counter[tuple[str, str]] = Counter()
    for (raw,) in s.execute(select(Label.entities).where(Label.campaign_id == campaign_id)):
        total.update(words_of(raw))
    add_words(s, campaign_id, total)


def label_counts(s: Session, campaign_id: int, rules: SynonymRules | None = None) -> tuple[Counter[str], Counter[str]]:
    """How often each normalised entity and attribute was used in the campaign (through the rules)."""
    rules = rules or SynonymRules()
    entities: Counter[str] = Counter()
    attributes: Counter[str] = Counter()
    for kind, word, n in s.execute(select(WordCount.kind, WordCount.word, WordCount.n).where(WordCount.campaign_id == campaign_id, WordCount.n > 0).order_by(WordCount.id)):
        name = rules.entity(word) if kind == "entity" else rules.attribute(word)
        if name:
            (entities if kind == "entity" else attributes)[name] += n
    return entities, attributes
