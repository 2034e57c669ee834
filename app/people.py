"""People, roles and invite links: tokens are random, stored hashed, revocable and expiring.

A signed-in browser holds a cookie naming its invite and signed with the project key, so
revoking the invite signs that browser out at its next request. The anti-forgery token of a
session is derived from the cookie with the same key, so it needs no storage either.
"""

from __future__ import annotations

import hashlib
import hmac
import re
import secrets
from dataclasses import dataclass
from datetime import datetime, timedelta

from sqlalchemy import select
from sqlalchemy.orm import Session

from .errors import ForbiddenError, InvalidRequestError, NotFoundError
from .models import ROLES, Invite, Person, Secret, utcnow

_NAME = re.compile(r"^[\w .@'-]{1,40}$")


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


def project_key(s: Session) -> bytes:
    """The project's signing key, made on first use."""
    row = s.get(Secret, "cookie_key")
    if row is None:
        row = Secret(name="cookie_key", value=secrets.token_hex(32))
        s.add(row)
        s.flush()
    return bytes.fromhex(row.value)


def _hash(token: str) -> str:
    return hashlib.sha256(token.encode()).hexdigest()


def ensure_person(s: Session, name: str, role: str) -> int:
    """The id of the person called ``name``, created with ``role`` if new; an existing person's role is updated."""
    if role not in ROLES:
        raise InvalidRequestError(f"role must be one of {', '.join(ROLES)}; got {role!r}.")
    name = check_name(name)
    person = s.scalar(select(Person).where(Person.name == name))
    if person is None:
        person = Person(name=name, role=role)
        s.add(person)
        s.flush()
    else:
        person.role = role
    return person.id


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


def viewer_from_cookie(s: Session, key: bytes, cookie: str | None, *, now: datetime | None = None) -> Viewer | None:
    """The viewer a session cookie stands for; None when there is none or it is not ours."""
    if not cookie or "." not in cookie:
        return None
    raw_id, _, _ = cookie.partition(".")
    if not raw_id.isdigit() or not hmac.compare_digest(cookie, session_cookie(key, int(raw_id))):
        return None
    # One query per request: the invite and its person together.
    row = s.execute(
        select(Invite.id, Invite.campaign_id, Invite.expires_at, Invite.revoked_at, Person.id, Person.name, Person.role)
        .join(Person, Person.id == Invite.person_id).where(Invite.id == int(raw_id))
    ).first()
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
