"""A campaign's labels as the label store last held them, kept in a file beside the database so that a restarted
server reads only the labels stored since, not every label again (at 100,000 labels a full read is about half a second).

The file is a cache, never a source of truth: it is used only when the database still holds exactly its labels. What
it holds is checked against the database (the labels up to its highest id, less those undone since: their client ids
in id order, their count, and sums of their ids, regions, people, not-sure marks and id-weighted products of region,
person and answer length; the campaign's name and creation time) and against itself (codes in range, ids rising, its
own sums); anything else, a file torn by a crash or a different database included, is ignored and the labels are read
whole. Labels are only ever stored or undone, never changed, and every submission's client id is new, so the same
client ids mean the same labels; the sums check that the file's rows are theirs. Written whole or not at all (a temporary file renamed over the old), owner-only, in the project's ``cache``
folder; no pickled objects are read back (numpy arrays and JSON only).
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import tempfile
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import BinaryIO

import numpy as np
import numpy.typing as npt
from sqlalchemy import BigInteger, LargeBinary, Text, case, cast, func, select
from sqlalchemy.orm import Session

from analysis.concept_votes import Reading
from analysis.synonyms import SynonymRules

from .. import store
from ..db import owner_only
from ..models import Campaign, Label

log = logging.getLogger("heedmap")

# Bumped whenever what a file holds, or how labels are read (the readings kept with them), changes.
FORMAT = "heedmap label snapshot 2"
Entities = tuple[tuple[str, tuple[str, ...]], ...]


@dataclass(frozen=True)
class Snapshot:
    """What the label store holds for one campaign (see ``label_store._Held``), as written to and read from its file."""

    campaign_id: int
    identity: tuple[str, str]  # the campaign's name and creation time: another campaign given the same id does not match
    ids: npt.NDArray[np.int64]
    rows: npt.NDArray[np.int64]  # per label: region, person code, entities code, unsure
    clients: npt.NDArray[np.bytes_]  # per label: its client id (to find undone labels)
    person_ids: tuple[int, ...]  # per person code
    texts: tuple[str, ...]  # per entities code: the stored text
    entities: tuple[Entities, ...]  # per entities code: read
    withdrawn: tuple[int, int | None]
    # Each (entities code, class)'s reading under one set of synonym rules and attribute words: (their digest, readings)
    readings: tuple[str, dict[tuple[int, str | None], Reading]] = ("", {})

    def sums(self) -> tuple[int, ...]:
        """As :func:`database_sums` reads them from the database."""
        return label_sums(self.ids, self.rows, self.person_ids, [len(t) for t in self.texts])


_P = 1_000_003  # products taken modulo a prime: their sums stay far inside 64 bits


def label_sums(ids: npt.NDArray[np.int64], rows: npt.NDArray[np.int64], person_ids: Sequence[int], text_lengths: Sequence[int]) -> tuple[int, ...]:
    """(count, highest id, sums of ids, regions, person ids and not-sure marks, and of each label's id times its region, its
    person and its stored text's length, modulo a prime): sums alone would not see two labels' answers swapped."""
    if not len(ids):
        return (0, 0, 0, 0, 0, 0, 0, 0, 0)
    persons = np.asarray(person_ids, dtype=np.int64)[rows[:, 1]]
    lengths = np.asarray(text_lengths, dtype=np.int64)[rows[:, 2]]
    return (len(ids), int(ids[-1]), int(ids.sum()), int(rows[:, 0].sum()), int(persons.sum()), int(rows[:, 3].sum()),
            *(int((ids * v % _P).sum()) for v in (rows[:, 0], persons, lengths)))


def readings_digest(rules: SynonymRules, words: frozenset[str]) -> str:
    """What readings depend on besides the label and its region's class: the synonym rules and the attribute words."""
    return hashlib.sha256(repr((rules, sorted(words))).encode()).hexdigest()


def identity(s: Session, campaign_id: int) -> tuple[str, str] | None:
    c = s.get(Campaign, campaign_id)
    return None if c is None else (c.name, c.created_at.isoformat() if c.created_at else "")


def database_sums(s: Session, campaign_id: int, up_to: int) -> tuple[int, ...]:
    """:func:`label_sums` of the campaign's labels with ids up to ``up_to``, computed by the database."""
    label_id = cast(Label.id, BigInteger)
    row = s.execute(select(func.count(Label.id), func.coalesce(func.max(Label.id), 0), func.coalesce(func.sum(Label.id), 0),
                           func.coalesce(func.sum(Label.region_id), 0), func.coalesce(func.sum(Label.person_id), 0),
                           func.coalesce(func.sum(case((Label.unsure, 1), else_=0)), 0),
                           *(func.coalesce(func.sum(label_id * v % _P), 0)
                             for v in (Label.region_id, Label.person_id, func.length(cast(Label.entities, Text)))))
                    .where(Label.campaign_id == campaign_id, Label.id <= up_to)).one()
    return tuple(int(v) for v in row)


def database_clients(s: Session, campaign_id: int, up_to: int) -> npt.NDArray[np.bytes_]:
    """The client ids of the campaign's labels with ids up to ``up_to``, in id order. Each submission's client id is
    new and stays spent after an undo, so equal arrays mean the same labels, whatever else happened to the
    database (a backup restored and the same regions labelled again, by the same people, with answers as long)."""
    found = store.plain_rows(s, select(cast(Label.client_id, LargeBinary)).where(Label.campaign_id == campaign_id, Label.id <= up_to).order_by(Label.id))
    return client_bytes([c for (c,) in found])


def client_bytes(clients: Sequence[object]) -> npt.NDArray[np.bytes_]:
    """Client ids (text, or their bytes from SQLite) as one bytes array."""
    if not clients:
        return np.zeros(0, dtype="S1")
    return np.array([c if isinstance(c, bytes) else str(c).encode() for c in clients], dtype=np.bytes_)


def path_for(folder: Path, campaign_id: int) -> Path:
    return folder / f"labels-{int(campaign_id)}.npz"


def write_whole(folder: Path, name: str, write: Callable[[BinaryIO], object]) -> bool:
    """Write file ``name`` in ``folder`` (made owner-only) whole or not at all: a temporary file renamed over the old one.
    False (logged, nothing else changed) when it cannot be written: these files are caches, never needed."""
    tmp = None
    try:
        folder.mkdir(mode=0o700, parents=True, exist_ok=True)
        owner_only(folder)
        fd, tmp = tempfile.mkstemp(dir=folder, prefix=".", suffix=".tmp")  # created owner-only
        with os.fdopen(fd, "wb") as fh:
            write(fh)
        os.replace(tmp, folder / name)
        return True
    except OSError as exc:
        log.info("could not keep %s beside the database (%s); it is computed again when needed", name, exc)
        if tmp is not None:
            try:
                os.unlink(tmp)
            except OSError:
                pass
        return False


def write(folder: Path, snap: Snapshot) -> bool:
    """Write ``snap`` whole or not at all; False when the folder cannot be written."""
    meta = {"format": FORMAT, "campaign": snap.campaign_id, "identity": list(snap.identity), "person_ids": list(snap.person_ids),
            "texts": list(snap.texts), "entities": [[[e, list(a)] for e, a in ents] for ents in snap.entities],
            "withdrawn": list(snap.withdrawn), "sums": list(snap.sums()), "readings_of": snap.readings[0],
            "readings": [[e, cls, list(r.families.items()), r.main] for (e, cls), r in snap.readings[1].items()]}
    return write_whole(folder, path_for(folder, snap.campaign_id).name, lambda fh: np.savez(
        fh, meta=np.frombuffer(json.dumps(meta).encode(), dtype=np.uint8), ids=snap.ids, rows=snap.rows, clients=snap.clients))


def _checked(meta: dict[str, object], ids: npt.NDArray[np.generic], rows: npt.NDArray[np.generic], clients: npt.NDArray[np.generic],
             campaign_id: int) -> Snapshot | None:
    """The snapshot if the file is whole and consistent in itself, else None."""
    if meta.get("format") != FORMAT or meta.get("campaign") != campaign_id:
        return None
    n = len(ids)
    if ids.dtype != np.int64 or ids.ndim != 1 or rows.dtype != np.int64 or rows.shape != (n, 4) or clients.dtype.kind != "S" or clients.shape != (n,):
        return None
    person_ids, texts, found, ident, withdrawn = (meta.get(k) for k in ("person_ids", "texts", "entities", "identity", "withdrawn"))
    if not (isinstance(person_ids, list) and isinstance(texts, list) and isinstance(found, list) and isinstance(ident, list)
            and isinstance(withdrawn, list) and len(texts) == len(found) and len(ident) == 2 and len(withdrawn) == 2):
        return None
    if n and (np.any(np.diff(ids) <= 0) or rows[:, 1].min() < 0 or rows[:, 1].max() >= len(person_ids)
              or rows[:, 2].min() < 0 or rows[:, 2].max() >= len(texts) or not np.isin(rows[:, 3], (0, 1)).all()):
        return None
    entities = tuple(tuple((str(e), tuple(str(a) for a in attrs)) for e, attrs in ents) for ents in found)
    readings: dict[tuple[int, str | None], Reading] = {}
    kept = meta.get("readings")
    if isinstance(kept, list) and isinstance(meta.get("readings_of"), str):
        for e, cls, fam, main in kept:
            if not (isinstance(e, int) and 0 <= e < len(texts) and (cls is None or isinstance(cls, str)) and isinstance(main, str)):
                return None
            families = {str(c): str(f) for c, f in fam}
            readings[(e, cls)] = Reading(families, tuple(families), main)
    snap = Snapshot(campaign_id, (str(ident[0]), str(ident[1])), ids.astype(np.int64, copy=False), rows.astype(np.int64, copy=False),
                    clients.astype(np.bytes_, copy=False), tuple(int(p) for p in person_ids),
                    tuple(str(t) for t in texts), entities, (int(withdrawn[0]), None if withdrawn[1] is None else int(withdrawn[1])),
                    (str(meta["readings_of"]), readings) if readings else ("", {}))
    return snap if list(snap.sums()) == meta.get("sums") else None


def read(folder: Path, s: Session, campaign_id: int) -> Snapshot | None:
    """The campaign's snapshot if its file is whole and the database still holds exactly its labels (those up to its
    highest id, less any undone since, which the label store then finds as usual); else None."""
    path = path_for(folder, campaign_id)
    try:
        if not path.is_file():
            return None
        with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as z:  # our handle: closed when the file is torn too
            meta = json.loads(z["meta"].tobytes().decode())
            snap = _checked(meta, z["ids"], z["rows"], z["clients"], campaign_id) if isinstance(meta, dict) else None
    except Exception as exc:  # noqa: BLE001 - a cache: whatever is wrong with the file, the labels are read from the database
        log.info("ignored the kept labels of campaign %s (%s); reading them from the database", campaign_id, exc)
        return None
    if snap is None or identity(s, campaign_id) != snap.identity:
        return None
    return snap
