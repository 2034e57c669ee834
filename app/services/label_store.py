"""A campaign's labels kept in memory between requests and brought up to date by reading only what changed.

Every results page starts from all of a campaign's labels; at tens of thousands of labels reading and
decoding them again after each new one cost seconds. Here each campaign's labels are read once, then
each request reads only the labels stored since (ids above the highest one held); when labels were undone
since (the withdrawn labels' count or highest id moved) the held ones no longer stored are dropped. What is held is
checked against the labels' count and highest id (``store.labels_version``); any difference (a label
committed late with a lower id, a database replaced underneath) reads everything again, so what is
held is always exactly the stored labels.

The distinct labels are read (normalised, through the synonym rules, attribute words split off) once
per rule set and attribute words, and the judgments handed on as arrays of codes
(:class:`analysis.concept_votes.ReadJudgments`), so the work per request grows with the distinct
labels, not with the labels. A cold read takes the rows from SQLite's driver as plain tuples, the stored
entities as bytes, so each distinct text is decoded (and checked for damage) once.
"""

from __future__ import annotations

import json
import sqlite3
import threading
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import numpy.typing as npt
from sqlalchemy import LargeBinary, String, cast, select, type_coerce
from sqlalchemy.orm import Session

from analysis.concept_votes import Reading, ReadJudgments, read_label, sorted_distinct
from analysis.concepts import Judgment, typed_attribute_words
from analysis.synonyms import SynonymRules

from .. import store
from ..campaigns.judgments import entities_of
from ..models import Label, Person, WithdrawnLabel
from . import label_snapshot

Entities = tuple[tuple[str, tuple[str, ...]], ...]
_REGION, _PERSON, _ENTITIES, _UNSURE = range(4)
_NO_ROWS = np.zeros((0, 4), dtype=np.int64)
_READINGS_KEPT = 4


@dataclass
class _Held:
    """One campaign's labels as last read, in id order: their ids, and per label (region, person code, entities code, unsure)."""

    ids: npt.NDArray[np.int64] = field(default_factory=lambda: np.zeros(0, dtype=np.int64))
    rows: npt.NDArray[np.int64] = field(default_factory=lambda: _NO_ROWS)
    loaded: bool = False
    clients: npt.NDArray[np.bytes_] = field(default_factory=lambda: np.zeros(0, dtype="S1"))  # per label: its client id, to find undone labels
    withdrawn: tuple[int, int | None] = (0, None)  # withdrawn labels' count and highest id when last read
    saved: int = -1  # labels held when last written to the snapshot file (-1: not since read)
    people: list[str] = field(default_factory=list)
    person_ids: list[int] = field(default_factory=list)  # per person code
    person_code: dict[int, int] = field(default_factory=dict)  # person id -> code (index into people)
    entities: list[Entities] = field(default_factory=list)
    attributes: list[frozenset[str]] = field(default_factory=list)  # per entities code: the attribute words as typed
    entities_code: dict[object, int] = field(default_factory=dict)  # stored text (or bytes) -> code
    # Readings of (entities code, class) per (rules, attribute words), the few most recently used: the first labels of a
    # campaign (the settling page's checkpoints) may use other attribute words than all of them, and pages alternate.
    read_with: dict[tuple[SynonymRules, frozenset[str]], tuple[dict[tuple[int, str | None], int], list[Reading]]] = field(default_factory=dict)
    # The readings kept in the snapshot file: (digest of their rules and attribute words, their entries); and the digest
    # of those last written there.
    kept_readings: tuple[str, dict[tuple[int, str | None], Reading]] = ("", {})
    saved_readings: str = ""
    lock: threading.Lock = field(default_factory=threading.Lock)


def _text(raw: object) -> tuple[str, Entities]:
    """A stored entities value (JSON text, its UTF-8 bytes, or a list where the driver decodes JSON itself) -> (text, entities)."""
    if isinstance(raw, bytes):
        try:
            raw = raw.decode("utf-8")
        except UnicodeDecodeError:
            raise sqlite3.DatabaseError("database disk image is malformed: a text value is not UTF-8") from None
    key = raw if isinstance(raw, str) else json.dumps(raw)
    return key, entities_of(json.loads(raw) if isinstance(raw, str) else raw)  # type: ignore[arg-type]


def _texts(held: _Held) -> list[str]:
    """Each entities code's stored text (its key as text: every code has one)."""
    texts = [""] * len(held.entities)
    for key, code in held.entities_code.items():
        if isinstance(key, str):
            texts[code] = key
    return texts


def _empty(held: _Held) -> None:
    """Back to nothing held (its lock kept: the caller holds it)."""
    fresh = _Held()
    for name in held.__dataclass_fields__:
        if name != "lock":
            setattr(held, name, getattr(fresh, name))


class LabelStore:
    """Each campaign's labels, held per process and shared by the app's request threads."""

    def __init__(self, *, campaigns_kept: int = 8, snapshots: Path | None = None, save_every: int = 256) -> None:
        """``snapshots``: a folder where each campaign's labels are kept between runs (:mod:`.label_snapshot`), rewritten
        when the labels held have grown by ``save_every`` or an eighth since last written; None keeps nothing."""
        self._held: dict[int, _Held] = {}
        self._kept = campaigns_kept
        self._lock = threading.Lock()
        self._snapshots = snapshots
        self._save_every = max(1, save_every)

    @property
    def snapshots(self) -> Path | None:
        """The folder where results' inputs are kept between runs (None: nothing is kept)."""
        return self._snapshots

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

    def _fetch(self, s: Session, campaign_id: int, after: int) -> list[tuple[int, object, int, int, object, int]]:
        """(id, client id, region, person id, entities as stored, unsure) of the campaign's labels with ids above ``after``, in id order.

        On SQLite the rows come straight from the driver (``store.plain_rows``) with the entities as bytes: each distinct
        text is decoded (and checked) once, not once per row, and no row objects are made (at 100,000 labels that was
        most of a cold read)."""
        sqlite = s.connection().dialect.name == "sqlite"
        client, entities = ((cast(Label.client_id, LargeBinary), cast(Label.entities, LargeBinary)) if sqlite
                            else (Label.client_id, type_coerce(Label.entities, String)))
        rows = store.plain_rows(s, select(Label.id, client, Label.region_id, Label.person_id, entities, Label.unsure)
                                .where(Label.campaign_id == campaign_id, Label.id > after).order_by(Label.id))
        if sqlite:
            return rows  # the six columns asked for
        # A driver that decodes JSON itself gives lists: kept as their JSON text, one key per distinct value.
        return [(i, c, r, p, e if isinstance(e, (str, bytes)) else json.dumps(e), u) for i, c, r, p, e, u in rows]

    def _add(self, s: Session, held: _Held, rows: list[tuple[int, object, int, int, object, int]]) -> None:
        if not rows:
            return
        ids, clients, regions, persons, raws, unsure = zip(*rows)
        new_people = sorted({int(p) for p in set(persons)} - held.person_code.keys())
        if new_people:
            names = {int(i): str(name) for i, name in s.execute(select(Person.id, Person.name).where(Person.id.in_(new_people)))}
            for p in new_people:
                held.person_code[p] = len(held.people)
                held.people.append(str(names.get(p, f"person {p}")))
                held.person_ids.append(p)
        codes = held.entities_code
        for raw in set(raws):
            if raw not in codes:
                text, entities = _text(raw)
                code = codes.get(text)
                if code is None:
                    code = codes[text] = len(held.entities)
                    held.entities.append(entities)
                    held.attributes.append(frozenset(a for _, attrs in entities for a in attrs))
                codes[raw] = code
        n = len(ids)
        block = np.empty((n, 4), dtype=np.int64)
        block[:, _REGION] = np.fromiter(regions, dtype=np.int64, count=n)
        person = held.person_code
        block[:, _PERSON] = np.fromiter((person[int(p)] for p in persons), dtype=np.int64, count=n)
        block[:, _ENTITIES] = np.fromiter((codes[r] for r in raws), dtype=np.int64, count=n)
        block[:, _UNSURE] = np.fromiter((bool(u) for u in unsure), dtype=np.int64, count=n)
        held.ids = np.concatenate([held.ids, np.fromiter(ids, dtype=np.int64, count=n)])
        held.rows = np.concatenate([held.rows, block])
        held.clients = np.concatenate([held.clients, label_snapshot.client_bytes(clients)])

    def _reload(self, s: Session, held: _Held, campaign_id: int, withdrawn: tuple[int, int | None]) -> None:
        held.ids, held.rows, held.clients = np.zeros(0, dtype=np.int64), _NO_ROWS, np.zeros(0, dtype="S1")
        self._add(s, held, self._fetch(s, campaign_id, 0))
        held.withdrawn, held.loaded, held.saved = withdrawn, True, -1

    def _drop_withdrawn(self, s: Session, held: _Held, campaign_id: int, withdrawn: tuple[int, int | None]) -> None:
        """Drop the held labels undone since last read, found by their client ids (SQLite may hand an undone id out again)."""
        since = held.withdrawn[1] or 0
        gone = label_snapshot.client_bytes(s.execute(select(WithdrawnLabel.client_id).where(WithdrawnLabel.campaign_id == campaign_id, WithdrawnLabel.id > since)).scalars().all())
        keep = ~np.isin(held.clients, gone)
        held.ids, held.rows, held.clients = held.ids[keep], held.rows[keep], held.clients[keep]
        held.withdrawn = withdrawn

    def _refresh(self, s: Session, held: _Held, campaign_id: int, version: tuple[object, ...]) -> None:
        """Bring ``held`` up to ``version`` (store.labels_version: campaign, count, highest id, withdrawn count, highest withdrawn id, ...)."""
        n, last, wn, wlast = version[1], version[2], version[3], version[4]
        withdrawn = (int(str(wn)), None if wlast is None else int(str(wlast)))
        if not held.loaded and not self._restore(s, held, campaign_id, withdrawn):
            self._reload(s, held, campaign_id, withdrawn)
        else:
            if withdrawn != held.withdrawn:
                self._drop_withdrawn(s, held, campaign_id, withdrawn)
            self._add(s, held, self._fetch(s, campaign_id, int(held.ids[-1]) if len(held.ids) else 0))
        if len(held.ids) != n or (len(held.ids) and int(held.ids[-1]) != last):
            self._reload(s, held, campaign_id, withdrawn)
        if self._snapshots is not None and (held.saved < 0 or len(held.ids) - held.saved >= max(self._save_every, held.saved // 8)):
            self._save(self._snapshots, campaign_id, held, s)

    def _restore(self, s: Session, held: _Held, campaign_id: int, withdrawn: tuple[int, int | None]) -> bool:
        """Fill ``held`` from the campaign's snapshot file when it is whole and the database still holds its labels (less
        any undone since); False (``held`` left empty) otherwise."""
        if self._snapshots is None:
            return False
        snap = label_snapshot.read(self._snapshots, s, campaign_id)
        if snap is None:
            return False
        held.ids, held.rows, held.clients, held.withdrawn = snap.ids, snap.rows, snap.clients, snap.withdrawn
        names = {int(i): str(name) for i, name in s.execute(select(Person.id, Person.name).where(Person.id.in_(snap.person_ids)))}
        held.person_ids = list(snap.person_ids)
        held.people = [names.get(p, f"person {p}") for p in snap.person_ids]
        held.person_code = {p: i for i, p in enumerate(snap.person_ids)}
        held.entities = list(snap.entities)
        held.attributes = [frozenset(a for _, attrs in ents for a in attrs) for ents in snap.entities]
        held.entities_code = {t: i for i, t in enumerate(snap.texts)}
        held.kept_readings, held.saved_readings = snap.readings, snap.readings[0]
        up_to = int(snap.ids[-1]) if len(snap.ids) else 0
        if withdrawn != held.withdrawn:
            self._drop_withdrawn(s, held, campaign_id, withdrawn)
        if (label_snapshot.database_sums(s, campaign_id, up_to) != self._sums(held)
                or not np.array_equal(label_snapshot.database_clients(s, campaign_id, up_to), held.clients)):
            _empty(held)  # the labels are read whole
            return False
        held.loaded, held.saved = True, len(snap.ids)
        return True

    @staticmethod
    def _sums(held: _Held) -> tuple[int, ...]:
        return label_snapshot.label_sums(held.ids, held.rows, held.person_ids, [len(t) for t in _texts(held)])

    @staticmethod
    def _save(folder: Path, campaign_id: int, held: _Held, s: Session) -> None:
        ident = label_snapshot.identity(s, campaign_id)
        if ident is None:
            return
        snap = label_snapshot.Snapshot(campaign_id, ident, held.ids, held.rows, held.clients, tuple(held.person_ids), tuple(_texts(held)),
                                       tuple(held.entities), held.withdrawn, held.kept_readings)
        label_snapshot.write(folder, snap)
        held.saved, held.saved_readings = len(held.ids), held.kept_readings[0]  # not tried again until as many more labels, written or not

    def judgments(self, s: Session, campaign_id: int, version: tuple[object, ...]) -> list[Judgment]:
        """The campaign's labels as judgments, oldest first (as ``campaigns.judgments``), read incrementally."""
        held = self._slot(campaign_id)
        with held.lock:
            self._refresh(s, held, campaign_id, version)
            return [Judgment(r, held.people[p], held.entities[e], bool(u)) for r, p, e, u in held.rows.tolist()]

    def nth_id(self, s: Session, campaign_id: int, version: tuple[object, ...], n: int) -> int | None:
        """The id of the campaign's ``n``-th label in id order (1 is the first), as of ``version``; None when there are fewer."""
        held = self._slot(campaign_id)
        with held.lock:
            self._refresh(s, held, campaign_id, version)
            return int(held.ids[n - 1]) if 0 < n <= len(held.ids) else None

    def read(self, s: Session, campaign_id: int, version: tuple[object, ...], *, rules: SynonymRules,
             region_class: Mapping[int, str], limit: int | None = None) -> ReadJudgments:
        """The usable judgments read (see :func:`analysis.concept_votes.read_judgments`; the same result), the first ``limit`` labels when given."""
        held = self._slot(campaign_id)
        with held.lock:
            self._refresh(s, held, campaign_id, version)
            table = held.rows if limit is None else held.rows[:limit]
            table = table[table[:, _UNSURE] == 0]
            used_entities = sorted_distinct(table[:, _ENTITIES])
            words = typed_attribute_words(frozenset().union(*(held.attributes[e] for e in used_entities.tolist())), rules=rules)
            reading_of, readings = held.read_with.pop((rules, words)) if (rules, words) in held.read_with else ({}, [])
            digest = label_snapshot.readings_digest(rules, words)
            if not readings and held.kept_readings[0] == digest:  # read by an earlier run of the server, kept in the file
                for key, reading in held.kept_readings[1].items():
                    reading_of[key] = len(readings)
                    readings.append(reading)
            while len(held.read_with) >= _READINGS_KEPT:
                held.read_with.pop(next(iter(held.read_with)))
            held.read_with[(rules, words)] = (reading_of, readings)  # the most recently used last
            classes = sorted({c for c in region_class.values()})
            class_code = {c: i + 1 for i, c in enumerate(classes)}  # 0: a region outside the campaign
            region_ids = table[:, _REGION]
            regions, at = np.unique(region_ids, return_inverse=True)
            region_cls = np.array([class_code.get(region_class.get(r, ""), 0) for r in regions.tolist()], dtype=np.int64)
            key = table[:, _ENTITIES] * (len(classes) + 1) + region_cls[at.reshape(-1)]
            distinct, which = np.unique(key, return_inverse=True)
            codes = np.empty(len(distinct), dtype=np.int64)
            for i, k in enumerate(distinct.tolist()):
                e, c = divmod(k, len(classes) + 1)
                cls = classes[c - 1] if c else None
                found = reading_of.get((e, cls))
                if found is None:
                    found = reading_of[(e, cls)] = len(readings)
                    readings.append(read_label(held.entities[e], cls, rules=rules, words=words))
                codes[i] = found
            if limit is None and self._snapshots is not None and held.saved >= 0 and held.saved_readings != digest:
                held.kept_readings = (digest, {key: readings[i] for key, i in reading_of.items()})
                self._save(self._snapshots, campaign_id, held, s)  # the next start reads these instead of reading every label again
            people = table[:, _PERSON]
            used_people = sorted_distinct(people)
            annotators = tuple(sorted(held.people[p] for p in used_people.tolist()))
            recode = np.zeros(len(held.people), dtype=np.int64)
            for p in used_people.tolist():
                recode[p] = annotators.index(held.people[p])
            return ReadJudgments(region_ids.copy(), annotators, recode[people], tuple(readings), codes[which.reshape(-1)], words)
