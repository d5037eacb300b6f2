"""Local accounts of an office service: names, roles, argon2 password hashes, and the secret
that signs session cookies.  Kept in the project store's database (schema 6), so that
``python -m server users … --data DIR`` and ``serve --data DIR`` share them.

No accounts at all is the workstation mode (one user, no sign-in).  An account is never
deleted, only disabled, so that the names in the review trail keep meaning someone; a
disabled account counts as configured, so disabling everyone never reopens the service.
"""

from __future__ import annotations

import math
import re
import secrets
import threading
import time
from dataclasses import dataclass
from datetime import UTC, datetime

from argon2 import PasswordHasher
from argon2.exceptions import InvalidHashError, VerificationError, VerifyMismatchError

from server.store.roles import ROLES
from server.store.sqlite import Actor, Store

#: Password length bounds: long enough to resist guessing, short enough to hash cheaply.
MIN_PASSWORD, MAX_PASSWORD = 10, 256
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._@-]{0,63}$")
#: Passwords refused outright (lower case): the first ones any guesser tries.
_COMMON = frozenset(
    {
        "password",
        "password1",
        "password12",
        "password123",
        "passw0rd",
        "1234567890",
        "0123456789",
        "12345678910",
        "123456789a",
        "qwertyuiop",
        "asdfghjkl",
        "iloveyou12",
        "letmein123",
        "welcome123",
        "changeme",
        "changeme123",
        "stationfit",
        "stationfit1",
        "surveyor123",
        "administrator",
    }
)
_HASHER = PasswordHasher()
#: Password checks at once: each takes argon2's 64 MiB, so a burst of sign-ins (from many
#: addresses, before the failure limit counts them) waits here instead of taking the memory.
_CHECKS_AT_ONCE = threading.BoundedSemaphore(2)
#: Verified when the name is unknown, so that a wrong name costs as long as a wrong password.
_DUMMY_HASH = _HASHER.hash("not a password of anyone " + secrets.token_hex(8))


class AccountError(ValueError):
    """An account command that cannot be followed; the message says why."""


@dataclass(frozen=True, slots=True)
class User:
    """One account as stored (never its hash)."""

    id: int
    name: str
    role: str
    disabled: str | None
    session_epoch: int
    created: str
    last_sign_in: str | None

    @property
    def actor(self) -> Actor:
        """This account as the store records who acted."""
        return Actor(self.id, self.name, self.role)

    @property
    def active(self) -> bool:
        return self.disabled is None


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def check_name(name: str) -> str:
    """The account name, or ``AccountError``: 1-64 letters, digits, '.', '_', '@', '-'."""
    if not _NAME.match(name):
        raise AccountError(
            "An account name is 1 to 64 letters, digits, '.', '_', '@' or '-', "
            "starting with a letter or digit."
        )
    return name


def check_role(role: str) -> str:
    """The role, or ``AccountError`` naming the roles there are."""
    if role not in ROLES:
        raise AccountError(f"There is no role '{role[:40]}'; choose one of {', '.join(ROLES)}.")
    return role


def password_problem(password: str, name: str) -> str:
    """Why a password is refused ('' when it is accepted).

    Length is what makes a password hard to guess, so the rule is length, not a mix of
    character classes: 10 to 256 characters, not the account name, not one character
    repeated, and not one of the passwords every guesser tries first.
    """
    if len(password) < MIN_PASSWORD:
        return f"A password needs at least {MIN_PASSWORD} characters; a few words make a good one."
    if len(password) > MAX_PASSWORD:
        return f"A password may have at most {MAX_PASSWORD} characters."
    lowered = password.lower()
    if name and name.lower() in lowered:
        return "A password must not contain the account name."
    if len(set(password)) < 3:
        return "A password must not be one or two characters repeated."
    if lowered in _COMMON:
        return "This password is among the first ones anyone guesses; choose another."
    return ""


def generated_password() -> str:
    """A random password of 20 characters (about 119 bits), for ``--generate``."""
    return secrets.token_urlsafe(15)


class Accounts:
    """The accounts in one store's database."""

    #: Seconds a "no accounts" answer is trusted before the database is asked again: an
    #: account added from the command line takes effect within this, without every
    #: request of a workstation paying a query.
    RECHECK_SECONDS = 1.0

    def __init__(self, store: Store) -> None:
        self.store = store
        self._configured = False
        self._checked = -math.inf

    def configured(self) -> bool:
        """True once any account exists (then it stays true: accounts are never deleted)."""
        if not self._configured and not self.known_workstation():
            with self.store.reading() as db:
                self._configured = db.execute("SELECT 1 FROM users LIMIT 1").fetchone() is not None
            self._checked = time.monotonic()
        return self._configured

    def known_workstation(self) -> bool:
        """True when the store was found without accounts within ``RECHECK_SECONDS`` (no I/O)."""
        return not self._configured and time.monotonic() - self._checked < self.RECHECK_SECONDS

    # -- reading ---------------------------------------------------------------------

    def all(self) -> list[User]:
        """Every account, by name."""
        with self.store.reading() as db:
            rows = db.execute(
                f"SELECT {_COLUMNS} FROM users ORDER BY lower(name)"  # noqa: S608
            ).fetchall()
        return [User(*r) for r in rows]

    def get(self, user_id: int) -> User | None:
        with self.store.reading() as db:
            row = db.execute(
                f"SELECT {_COLUMNS} FROM users WHERE id = ?",  # noqa: S608
                (user_id,),
            ).fetchone()
        return None if row is None else User(*row)

    def named(self, name: str) -> User | None:
        """The account of this name (letter case aside), or None."""
        with self.store.reading() as db:
            row = db.execute(
                f"SELECT {_COLUMNS} FROM users WHERE lower(name) = lower(?)",  # noqa: S608
                (name,),
            ).fetchone()
        return None if row is None else User(*row)

    # -- changing ----------------------------------------------------------------------

    def add(self, name: str, role: str, password: str) -> User:
        """A new account; ``AccountError`` for a bad name, role or password, or a name taken."""
        check_name(name)
        check_role(role)
        problem = password_problem(password, name)
        if problem:
            raise AccountError(problem)
        digest = _HASHER.hash(password)
        with self.store.writing() as db:
            if db.execute("SELECT 1 FROM users WHERE lower(name) = lower(?)", (name,)).fetchone():
                raise AccountError(f"There is already an account named '{name}'.")
            db.execute(
                "INSERT INTO users (name, role, password_hash, created) VALUES (?, ?, ?, ?)",
                (name, role, digest, _now()),
            )
        self._configured = True
        user = self.named(name)
        assert user is not None
        return user

    def set_role(self, name: str, role: str) -> User:
        """Change an account's role; its sessions end (they carried the old role)."""
        check_role(role)
        return self._update(name, "role = ?", (role,))

    def set_disabled(self, name: str, disabled: bool) -> User:
        """Disable (sessions end, sign-in refused) or enable an account."""
        return self._update(name, "disabled = ?", (_now() if disabled else None,))

    def set_password(self, name: str, password: str) -> User:
        """A new password (checked like a first one); the account's sessions end."""
        user = self._existing(name)
        problem = password_problem(password, user.name)
        if problem:
            raise AccountError(problem)
        return self._update(name, "password_hash = ?", (_HASHER.hash(password),))

    def _existing(self, name: str) -> User:
        user = self.named(name)
        if user is None:
            raise AccountError(f"There is no account named '{name[:64]}'.")
        return user

    def _update(self, name: str, assignment: str, values: tuple[object, ...]) -> User:
        """One column changed and ``session_epoch`` raised, so every older session ends."""
        user = self._existing(name)
        with self.store.writing() as db:
            db.execute(  # the assignment is a constant of this module
                f"UPDATE users SET {assignment}, session_epoch = session_epoch + 1 "  # noqa: S608
                "WHERE id = ?",
                (*values, user.id),
            )
        changed = self.get(user.id)
        assert changed is not None
        return changed

    # -- signing in --------------------------------------------------------------------

    def authenticate(self, name: str, password: str) -> User | None:
        """The active account whose password this is, else None (same cost either way)."""
        with self.store.reading() as db:
            row = db.execute(
                f"SELECT {_COLUMNS}, password_hash FROM users WHERE lower(name) = lower(?)",  # noqa: S608
                (name[:64],),
            ).fetchone()
        digest = row[-1] if row is not None else _DUMMY_HASH
        try:
            with _CHECKS_AT_ONCE:
                _HASHER.verify(digest, password[:MAX_PASSWORD])
        except (VerifyMismatchError, VerificationError, InvalidHashError):
            return None
        if row is None:
            return None
        user = User(*row[:-1])
        if not user.active:
            return None
        with self.store.writing() as db:
            db.execute("UPDATE users SET last_sign_in = ? WHERE id = ?", (_now(), user.id))
            if _HASHER.check_needs_rehash(digest):  # the library's parameters were raised
                db.execute(
                    "UPDATE users SET password_hash = ? WHERE id = ?",
                    (_HASHER.hash(password), user.id),
                )
        return user

    def session_secret(self) -> bytes:
        """The key that signs session cookies: made once per data folder, kept in it."""
        with self.store.writing() as db:
            # made by whichever process comes first (a service and its command line at once)
            db.execute(
                "INSERT INTO service_keys (name, value) VALUES ('session', ?) "
                "ON CONFLICT (name) DO NOTHING",
                (secrets.token_hex(32),),
            )
            (value,) = db.execute(
                "SELECT value FROM service_keys WHERE name = 'session'"
            ).fetchone()
        return bytes.fromhex(value)


_COLUMNS = "id, name, role, disabled, session_epoch, created, last_sign_in"
