"""A campaign's labels kept in memory between requests and brought up to date by reading only what changed.

Every results page starts from all of a campaign's labels; at tens of thousands of labels reading and
decoding them again after each new one cost seconds. Here each campaign's labels are read once, then
each request reads only the labels stored since (ids above the highest one held) and the labels undone
since (withdrawn rows above the highest withdrawn id held, matched by their client id). What is held is
checked against the labels' count and highest id (``store.labels_version``); any difference (a label
committed late with a lower id, a database replaced underneath) reads everything again, so what is
held is always exactly the stored labels.

The distinct labels are read (normalised, through the synonym rules, attribute words split off) once
per rule set and attribute words, and the judgments handed on as arrays of codes
(:class:`analysis.concept_votes.ReadJudgments`), so the work per request grows with the distinct
labels, not with the labels.
"""

from __future__ import annotations

import json
import threading
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt
from sqlalchemy import String, select, type_coerce
from sqlalchemy.orm import Session

from analysis.concept_votes import Reading, ReadJudgments, read_label
from analysis.concepts import Judgment, typed_attribute_words
from analysis.synonyms import SynonymRules

from ..campaigns.judgments import entities_of
from ..models import Label, Person, WithdrawnLabel

Entities = tuple[tuple[str, tuple[str, ...]], ...]
_REGION, _PERSON, _ENTITIES, _UNSURE = range(4)


@dataclass
class _Held:
    """One campaign's labels as last read: id -> (region, person code, entities code, unsure), in id order."""

    rows: dict[int, tuple[int, int, int, bool]] = field(default_factory=dict)
    client_of: dict[int, str] = field(default_factory=dict)  # label id -> client id (to find undone labels)
    withdrawn: tuple[int, int | None] = (0, None)  # withdrawn labels' count and highest id when last read
    people: list[str] = field(default_factory=list)
    person_code: dict[str, int] = field(default_factory=dict)
    entities: list[Entities] = field(default_factory=list)
    entities_code: dict[str, int] = field(default_factory=dict)  # stored text -> code
    # Readings of (entities code, class) for one (rules, attribute words).
    table: tuple[tuple[int, int, tuple[int, int | None]], npt.NDArray[np.int64]] | None = None  # rows as an array, for (count, last id, withdrawn)
    read_with: tuple[SynonymRules, frozenset[str]] | None = None
    reading_of: dict[tuple[int, str | None], int] = field(default_factory=dict)
    readings: list[Reading] = field(default_factory=list)
    lock: threading.Lock = field(default_factory=threading.Lock)


def _decoded(raw: object) -> tuple[str, Entities]:
    key = raw if isinstance(raw, str) else json.dumps(raw)  # a driver that decodes JSON itself gives lists
    return key, entities_of(json.loads(raw) if isinstance(raw, str) else raw)  # type: ignore[arg-type]


class LabelStore:
    """Each campaign's labels, held per process and shared by the app's request threads."""

    def __init__(self, *, campaigns_kept: int = 8) -> None:
        self._held: dict[int, _Held] = {}
        self._kept = campaigns_kept
        self._lock = threading.Lock()

    def _slot(self, campaign_id: int) -> _Held:
        with self._lock:
            held = self._held.pop(campaign_id, None) or _Held()
            while len(self._held) >= self._kept:
                self._held.pop(next(iter(self._held)))
            self._held[campaign_id] = held  # the most recently used last
            return held

    def forget(self, campaign_id: int) -> None:
        with self._lock:
            self._held.pop(campaign_id, None)

    def _add(self, held: _Held, rows: object) -> None:
        for label_id, client, region, name, raw, unsure in rows:  # type: ignore[attr-defined]
            p = held.person_code.get(name)
            if p is None:
                p = held.person_code[name] = len(held.people)
                held.people.append(name)
            text = raw if isinstance(raw, str) else json.dumps(raw)
            e = held.entities_code.get(text)
            if e is None:
                e = held.entities_code[text] = len(held.entities)
                held.entities.append(_decoded(raw)[1])
            held.rows[int(label_id)] = (int(region), p, e, bool(unsure))
            held.client_of[int(label_id)] = str(client)

    def _query(self, campaign_id: int):  # type: ignore[no-untyped-def]
        return (select(Label.id, Label.client_id, Label.region_id, Person.name, type_coerce(Label.entities, String), Label.unsure)
                .join(Person, Person.id == Label.person_id).where(Label.campaign_id == campaign_id).order_by(Label.id))

    def _reload(self, s: Session, held: _Held, campaign_id: int, withdrawn: tuple[int, int | None]) -> None:
        held.rows.clear()
        held.client_of.clear()
        self._add(held, s.connection().execute(self._query(campaign_id)))
        held.withdrawn = withdrawn

    def _refresh(self, s: Session, held: _Held, campaign_id: int, version: tuple[object, ...]) -> None:
        """Bring ``held`` up to ``version`` (store.labels_version: campaign, count, highest id, withdrawn count, highest withdrawn id, ...)."""
        n, last, wn, wlast = version[1], version[2], version[3], version[4]
        withdrawn = (int(str(wn)), None if wlast is None else int(str(wlast)))
        if not held.rows and not held.client_of:
            self._reload(s, held, campaign_id, withdrawn)
        else:
            if withdrawn != held.withdrawn:
                since = held.withdrawn[1] or 0
                gone = set(s.execute(select(WithdrawnLabel.client_id).where(WithdrawnLabel.campaign_id == campaign_id, WithdrawnLabel.id > since)).scalars())
                for label_id in [i for i, c in held.client_of.items() if c in gone] if gone else []:
                    del held.rows[label_id]
                    del held.client_of[label_id]
                held.withdrawn = withdrawn
            top = next(reversed(held.rows), 0) if held.rows else 0
            self._add(held, s.connection().execute(self._query(campaign_id).where(Label.id > top)))
        if len(held.rows) != n or (held.rows and next(reversed(held.rows)) != last):
            self._reload(s, held, campaign_id, withdrawn)

    def judgments(self, s: Session, campaign_id: int, version: tuple[object, ...]) -> list[Judgment]:
        """The campaign's labels as judgments, oldest first (as ``campaigns.judgments``), read incrementally."""
        held = self._slot(campaign_id)
        with held.lock:
            self._refresh(s, held, campaign_id, version)
            return [Judgment(r, held.people[p], held.entities[e], u) for r, p, e, u in held.rows.values()]

    def read(self, s: Session, campaign_id: int, version: tuple[object, ...], *, rules: SynonymRules,
             region_class: Mapping[int, str], limit: int | None = None) -> ReadJudgments:
        """The usable judgments read (see :func:`analysis.concept_votes.read_judgments`; the same result), the first ``limit`` labels when given."""
        held = self._slot(campaign_id)
        with held.lock:
            self._refresh(s, held, campaign_id, version)
            state = (len(held.rows), next(reversed(held.rows), 0) if held.rows else 0, held.withdrawn)
            if held.table is None or held.table[0] != state:
                held.table = (state, np.array(list(held.rows.values()), dtype=np.int64).reshape(-1, 4))
            table = held.table[1]
            if limit is not None:
                table = table[:limit]
            table = table[table[:, _UNSURE] == 0]
            used_entities = np.unique(table[:, _ENTITIES])
            words = typed_attribute_words({a for e in used_entities for _, attrs in held.entities[e] for a in attrs}, rules=rules)
            if held.read_with != (rules, words):
                held.read_with, held.reading_of, held.readings = (rules, words), {}, []
            classes = sorted({c for c in region_class.values()})
            class_code = {c: i + 1 for i, c in enumerate(classes)}  # 0: a region outside the campaign
            region_ids = table[:, _REGION]
            regions, at = np.unique(region_ids, return_inverse=True)
            region_cls = np.array([class_code.get(region_class.get(int(r), ""), 0) for r in regions], dtype=np.int64)
            key = table[:, _ENTITIES] * (len(classes) + 1) + region_cls[at.reshape(-1)]
            distinct, which = np.unique(key, return_inverse=True)
            codes = np.empty(len(distinct), dtype=np.int64)
            for i, k in enumerate(distinct.tolist()):
                e, c = divmod(k, len(classes) + 1)
                cls = classes[c - 1] if c else None
                found = held.reading_of.get((e, cls))
                if found is None:
                    found = held.reading_of[(e, cls)] = len(held.readings)
                    held.readings.append(read_label(held.entities[e], cls, rules=rules, words=words))
                codes[i] = found
            people = table[:, _PERSON]
            used_people = np.unique(people)
            annotators = tuple(sorted(held.people[p] for p in used_people))
            recode = np.zeros(len(held.people), dtype=np.int64)
            for p in used_people.tolist():
                recode[p] = annotators.index(held.people[p])
            return ReadJudgments(region_ids.copy(), annotators, recode[people], tuple(held.readings), codes[which.reshape(-1)], words)
