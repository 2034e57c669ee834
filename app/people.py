"""People, roles and invite links: tokens are random, stored hashed, revocable and expiring.

A signed-in browser holds a cookie naming its invite and signed with the project key, so
revoking the invite signs that browser out at its next request. The anti-forgery token of a
session is derived from the cookie with the same key, so it needs no storage either.

The key lives in ``secret.key`` in the project folder, created owner-only (0600), never in the
database (which more people may read); rotating it signs every browser out.
"""

from __future__ import annotations

import hashlib
import hmac
import os
import re
import secrets
from dataclasses import dataclass
from datetime import datetime, timedelta
from pathlib import Path

from sqlalchemy import bindparam, func, select
from sqlalchemy.orm import Session

from .errors import ConflictError, ForbiddenError, InvalidRequestError, NotFoundError
from .models import ROLES, Invite, Person, utcnow

_NAME = re.compile(r"^[\w .@'-]{1,40}$")
_COOKIE_ID = re.compile(r"[0-9]{1,18}")


@dataclass(frozen=True)
class Viewer:
    """Who is asking: the person behind a valid invite."""

    person_id: int
    name: str
    role: str
    invite_id: int
    campaign_id: int | None

    def can(self, role: str) -> bool:
        """Roles are ordered (annotator < reviewer < analyst < admin); a higher role can do what a lower one can."""
        return ROLES.index(self.role) >= ROLES.index(role)


@dataclass(frozen=True)
class InviteInfo:
    id: int
    person: str
    role: str
    campaign_id: int | None
    note: str
    created_at: datetime
    expires_at: datetime
    revoked_at: datetime | None
    last_used_at: datetime | None

    def state(self, now: datetime) -> str:
        if self.revoked_at is not None:
            return "revoked"
        return "expired" if self.expires_at <= now else "active"


def check_name(name: str) -> str:
    """A person's display name: 1-40 letters, digits, spaces or . @ ' - _."""
    name = " ".join(name.split())
    if not _NAME.match(name):
        raise InvalidRequestError(f"a name must be 1-40 letters, digits, spaces or . @ ' - _; got {name[:50]!r}.")
    return name


KEY_FILE = "secret.key"


class KeyFileError(ForbiddenError):
    status_code = 503
    code = "key_unavailable"


def key_path(project_dir: Path) -> Path:
    return Path(project_dir) / KEY_FILE


def _write_key(path: Path, *, replace: bool = True) -> bytes:
    """A new random key written owner-only and swapped in whole (no reader sees half a key).

    ``replace=False`` puts it in place only if no key is there yet (a hard link fails on an existing
    name): several server processes starting at once all end up with the one key that won.
    """
    key = secrets.token_bytes(32)
    tmp = path.with_name(f".{KEY_FILE}.{os.getpid()}.{secrets.token_hex(4)}")
    fd = os.open(tmp, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o600)
    try:
        os.write(fd, key.hex().encode() + b"\n")
        os.fsync(fd)
    finally:
        os.close(fd)
    if replace:
        os.replace(tmp, path)
        return key
    try:
        os.link(tmp, path)
    except FileExistsError:
        return load_key(path.parent, create=False)  # another process made it first: use theirs
    finally:
        os.unlink(tmp)
    return key


def load_key(project_dir: Path, *, create: bool = True) -> bytes:
    """The project's signing key from its owner-only file, made on first use."""
    path = key_path(project_dir)
    try:
        st = path.stat()
        if st.st_uid == os.getuid() and st.st_mode & 0o077:
            path.chmod(0o600)  # a copied or restored key file is made owner-only again
        raw = path.read_text(encoding="ascii").strip()
        key = bytes.fromhex(raw)
        if len(key) < 32:
            raise ValueError("short key")
        return key
    except FileNotFoundError:
        if not create:
            raise KeyFileError(f"the project has no signing key ({path}); start 'heedmap serve' once where it can write, or run 'heedmap keys --rotate'.") from None
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        raise KeyFileError(f"cannot read the signing key {path} ({exc}); make a new one with 'heedmap keys --rotate' (everyone signs in again).") from None
    try:
        return _write_key(path, replace=False)
    except OSError as exc:
        raise KeyFileError(f"cannot write the signing key {path}: {exc.strerror or exc}. The project folder must be writable by you.") from None


def rotate_key(project_dir: Path) -> None:
    """Replace the signing key: every session cookie and anti-forgery token made with the old one stops working."""
    try:
        _write_key(key_path(project_dir))
    except OSError as exc:
        raise KeyFileError(f"cannot write the signing key {key_path(project_dir)}: {exc.strerror or exc}.") from None


def _hash(token: str) -> str:
    return hashlib.sha256(token.encode()).hexdigest()


def _check_role(role: str) -> None:
    if role not in ROLES:
        raise InvalidRequestError(f"role must be one of {', '.join(ROLES)}; got {role!r}.")


def ensure_person(s: Session, name: str, role: str) -> int:
    """The id of the person called ``name``, created with ``role`` if new.

    An existing person keeps their role: an invite never changes it (that would change what
    their live sessions may do). A different role is refused; ``set_role`` changes it on purpose.
    """
    _check_role(role)
    name = check_name(name)
    person = s.scalar(select(Person).where(Person.name == name))
    if person is None:
        person = Person(name=name, role=role)
        s.add(person)
        s.flush()
    elif person.role != role:
        raise ConflictError(
            f"{name} is on the project already as {person.role}; an invite does not change a role. Invite them as {person.role}, "
            f"choose another name for a new person, or change their role on purpose (admin page, or 'heedmap role --name {name!r} --role {role}')."
        )
    return person.id


def set_role(s: Session, name: str, role: str) -> str:
    """Change a person's role on purpose (an admin's action); returns the old role. The last admin stays admin."""
    _check_role(role)
    person = s.scalar(select(Person).where(Person.name == check_name(name)))
    if person is None:
        raise NotFoundError(f"nobody called {name!r} is on the project.")
    old = person.role
    if old == "admin" and role != "admin":
        admins = s.scalar(select(func.count()).select_from(Person).where(Person.role == "admin")) or 0
        if admins <= 1:
            raise ConflictError(f"{person.name} is the project's only admin; make someone else admin first.")
    person.role = role
    return old


def create_invite(s: Session, *, name: str, role: str, campaign_id: int | None = None, days: float = 14, note: str = "", now: datetime | None = None) -> tuple[int, str]:
    """A new invite link for ``name`` as ``role``; returns (invite id, token). The token is shown once."""
    if not 0 < days <= 365:
        raise InvalidRequestError(f"an invite must last between a minute and 365 days; got {days} days.")
    now = now or utcnow()
    person_id = ensure_person(s, name, role)
    token = secrets.token_urlsafe(24)
    row = Invite(token_hash=_hash(token), person_id=person_id, campaign_id=campaign_id, note=note[:200], created_at=now, expires_at=now + timedelta(days=days))
    s.add(row)
    s.flush()
    return row.id, token


def admin_invite(s: Session, *, days: float = 1, note: str = "") -> tuple[str, str]:
    """An invite for the project's first admin (made as "admin" when there is none); returns (name, token)."""
    person = s.scalar(select(Person).where(Person.role == "admin").order_by(Person.id).limit(1))
    name = person.name if person is not None else "admin"
    if person is None and s.scalar(select(Person.id).where(Person.name == name)) is not None:
        name = "project admin"
    return name, create_invite(s, name=name, role="admin", days=days, note=note)[1]


def _check_live(expires_at: datetime, revoked_at: datetime | None, now: datetime) -> None:
    if revoked_at is not None:
        raise ForbiddenError("this invite link was revoked; ask the project's admin for a new one.")
    if expires_at <= now:
        raise ForbiddenError(f"this invite link expired on {expires_at:%Y-%m-%d %H:%M} UTC; ask the project's admin for a new one.")


def _invite_viewer(s: Session, invite: Invite, now: datetime) -> Viewer:
    _check_live(invite.expires_at, invite.revoked_at, now)
    person = s.get(Person, invite.person_id)
    if person is None:
        raise ForbiddenError("the person this invite was made for no longer exists.")
    return Viewer(person.id, person.name, person.role, invite.id, invite.campaign_id)


def check_invite(s: Session, token: str, *, now: datetime | None = None) -> Viewer:
    """Whom a live invite token signs in as; reads only. Errors say whether it is unknown, revoked or expired."""
    invite = s.scalar(select(Invite).where(Invite.token_hash == _hash(token)))
    if invite is None:
        raise ForbiddenError("this invite link is not valid; check that it was copied whole, or ask for a new one.")
    return _invite_viewer(s, invite, now or utcnow())


def redeem_invite(s: Session, token: str, *, now: datetime | None = None) -> Viewer:
    """Check an invite token and record its use; errors say whether it is unknown, revoked or expired."""
    now = now or utcnow()
    invite = s.scalar(select(Invite).where(Invite.token_hash == _hash(token)))
    if invite is None:
        raise ForbiddenError("this invite link is not valid; check that it was copied whole, or ask for a new one.")
    viewer = _invite_viewer(s, invite, now)
    invite.last_used_at = now
    return viewer


def session_cookie(key: bytes, invite_id: int) -> str:
    """The cookie value that signs a browser in through invite ``invite_id``."""
    return f"{invite_id}.{hmac.new(key, f'session|{invite_id}'.encode(), 'sha256').hexdigest()}"


_SESSION_VIEWER = (select(Invite.id, Invite.campaign_id, Invite.expires_at, Invite.revoked_at, Person.id, Person.name, Person.role)
                   .join(Person, Person.id == Invite.person_id).where(Invite.id == bindparam("invite")))


def viewer_from_cookie(s: Session, key: bytes, cookie: str | None, *, now: datetime | None = None) -> Viewer | None:
    """The viewer a session cookie stands for; None when there is none or it is not ours."""
    if not cookie or "." not in cookie:
        return None
    raw_id, _, _ = cookie.partition(".")
    # ASCII digits only, and short enough for SQLite's 64-bit integers ("²".isdigit() is true).
    if not _COOKIE_ID.fullmatch(raw_id) or not hmac.compare_digest(cookie, session_cookie(key, int(raw_id))):
        return None
    # One query per request, prebuilt: the invite and its person together.
    row = s.connection().execute(_SESSION_VIEWER, {"invite": int(raw_id)}).first()
    if row is None:
        return None
    invite_id, campaign_id, expires_at, revoked_at, person_id, name, role = row
    _check_live(expires_at, revoked_at, now or utcnow())
    return Viewer(person_id, name, role, invite_id, campaign_id)


def csrf_token(key: bytes, cookie: str) -> str:
    """The anti-forgery token for one session, bound to its cookie."""
    return hmac.new(key, f"csrf|{cookie}".encode(), "sha256").hexdigest()[:40]


def revoke_invite(s: Session, invite_id: int, *, now: datetime | None = None) -> None:
    invite = s.get(Invite, invite_id)
    if invite is None:
        raise NotFoundError(f"invite {invite_id} does not exist.")
    if invite.revoked_at is None:
        invite.revoked_at = now or utcnow()


def list_invites(s: Session) -> list[InviteInfo]:
    rows = s.execute(select(Invite, Person).join(Person, Person.id == Invite.person_id).order_by(Invite.id.desc())).all()
    return [InviteInfo(i.id, p.name, p.role, i.campaign_id, i.note, i.created_at, i.expires_at, i.revoked_at, i.last_used_at) for i, p in rows]
