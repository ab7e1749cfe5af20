"""Publishing keys: created by an operator, shown once, stored only as a hash.

A token looks like ``sbk1_<lookup>_<secret>``: `lookup` (16 hex digits, public) finds the key's
row; `secret` is 256 random bits. The database holds SHA-256 of the whole token.

Why a plain SHA-256 and no slow password hash (bcrypt, scrypt, Argon2): slow hashes exist to
make guessing a *low-entropy* secret from a stolen hash expensive. Our secrets are 256 random
bits chosen by the server, so guessing one from its hash takes about 2**256 tries whatever the
hash costs; a fast hash keeps checking a key on every request (which revocation requires)
cheap. The comparison runs in constant time (hmac.compare_digest) so response timing says
nothing about how much of a guessed hash matched.

Every check reads the key's row afresh: a revocation is seen by the very next request on every
replica, because nothing is cached.
"""

from __future__ import annotations

import hashlib
import hmac
import re
import secrets
from dataclasses import dataclass
from datetime import datetime

from sqlalchemy import Connection, Engine, select

from seedbed.registry.engine import is_postgres, reading, writing
from seedbed.registry.records import iso, now_utc, utc
from seedbed.registry.tables import KEY_NAME_LENGTH, publish_keys

TOKEN_PREFIX = "sbk1"
KEY_NAME_PATTERN = re.compile(rf"[a-z0-9][a-z0-9._-]{{0,{KEY_NAME_LENGTH - 1}}}")
_TOKEN_PATTERN = re.compile(r"sbk1_([0-9a-f]{16})_([A-Za-z0-9_-]{43})")


class KeyCommandError(Exception):
    """A key command that cannot be carried out (the message says why and what to do)."""


class KeyNameError(KeyCommandError):
    pass


class KeyExistsError(KeyCommandError):
    pass


class UnknownKeyError(KeyCommandError):
    pass


class KeyRevokedError(KeyCommandError):
    pass


class AuthenticationError(Exception):
    """The caller's token is missing, malformed, unknown or revoked (the message says which)."""


@dataclass(frozen=True)
class KeyInfo:
    name: str
    created_at: datetime
    revoked_at: datetime | None

    @property
    def active(self) -> bool:
        return self.revoked_at is None


@dataclass(frozen=True)
class NewKey:
    info: KeyInfo
    token: str  # shown once; never stored


def token_hash(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def check_key_name(name: str) -> None:
    if not KEY_NAME_PATTERN.fullmatch(name):
        raise KeyNameError(
            f"key name {name!r} is not allowed; use 1-{KEY_NAME_LENGTH} characters: lower-case "
            "letters, digits, '.', '_' or '-', starting with a letter or digit"
        )


def create_key(engine: Engine, name: str) -> NewKey:
    check_key_name(name)
    lookup = secrets.token_hex(8)
    token = f"{TOKEN_PREFIX}_{lookup}_{secrets.token_urlsafe(32)}"
    created = now_utc()
    with writing(engine) as conn:
        taken = conn.execute(select(publish_keys.c.name).where(publish_keys.c.name == name)).first()
        if taken is not None:
            # Names stay taken after revocation: recipes name their publisher, and a new key
            # under an old name would blur who published what.
            raise KeyExistsError(
                f"a key named {name!r} already exists (revoked or not); choose another name"
            )
        conn.execute(
            publish_keys.insert().values(
                name=name, lookup_id=lookup, token_sha256=token_hash(token), created_at=created
            )
        )
    return NewKey(KeyInfo(name, created, None), token)


def list_keys(engine: Engine) -> list[KeyInfo]:
    with reading(engine) as conn:
        rows = conn.execute(
            select(
                publish_keys.c.name, publish_keys.c.created_at, publish_keys.c.revoked_at
            ).order_by(publish_keys.c.name)
        ).all()
    return [
        KeyInfo(r.name, utc(r.created_at), None if r.revoked_at is None else utc(r.revoked_at))
        for r in rows
    ]


def revoke_key(engine: Engine, name: str) -> KeyInfo:
    with writing(engine) as conn:
        row = conn.execute(
            select(publish_keys.c.created_at, publish_keys.c.revoked_at).where(
                publish_keys.c.name == name
            )
        ).first()
        if row is None:
            raise UnknownKeyError(f"no key named {name!r}; `seedbed keys list` shows the names")
        if row.revoked_at is not None:
            raise KeyRevokedError(f"key {name!r} was already revoked at {iso(row.revoked_at)}")
        revoked = now_utc()
        conn.execute(
            publish_keys.update().where(publish_keys.c.name == name).values(revoked_at=revoked)
        )
    return KeyInfo(name, utc(row.created_at), revoked)


def bearer_token(header: str | None) -> str:
    """The token of an `Authorization: Bearer <token>` header."""
    if header is None or not header.strip():
        raise AuthenticationError(
            "this needs a publishing key: send Authorization: Bearer <key> "
            "(an operator creates one with `seedbed keys create NAME`)"
        )
    scheme, _, value = header.strip().partition(" ")
    if scheme.lower() != "bearer" or not value.strip():
        raise AuthenticationError("the Authorization header must be 'Bearer <key>'")
    return value.strip()


def identify(conn: Connection, token: str, *, lock: bool = False) -> str:
    """The name of the active key `token` belongs to. With `lock`, the key's row stays locked
    (PostgreSQL: FOR SHARE) until the transaction ends, so a revocation cannot commit between
    this check and the write that relies on it."""
    match = _TOKEN_PATTERN.fullmatch(token)
    if match is None:
        raise AuthenticationError("the key is not a seedbed publishing key (sbk1_...)")
    query = select(
        publish_keys.c.name, publish_keys.c.token_sha256, publish_keys.c.revoked_at
    ).where(publish_keys.c.lookup_id == match.group(1))
    if lock and is_postgres(conn):
        query = query.with_for_update(read=True)
    row = conn.execute(query).first()
    # Hash and compare even when no row matched, so unknown and wrong keys take equally long.
    stored = row.token_sha256 if row is not None else "0" * 64
    if not hmac.compare_digest(token_hash(token), stored) or row is None:
        raise AuthenticationError("the key is not valid")
    if row.revoked_at is not None:
        raise AuthenticationError(f"the key {row.name!r} was revoked at {iso(row.revoked_at)}")
    return str(row.name)


def authenticate(engine: Engine, token: str) -> str:
    with reading(engine) as conn:
        return identify(conn, token)
