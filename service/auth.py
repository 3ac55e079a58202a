"""API keys and roles: who may call which route of the service.

A client sends its key in either header::

    Authorization: Bearer sw_...
    X-API-Key: sw_...

Each key has one role, and the roles are ordered ``read < ingest < admin``: a key
may call every route that needs its role or a lower one. ``read`` sees trains,
estimates and alerts; ``ingest`` also posts readings (the historian bridge);
``admin`` also changes configuration and manages keys.

Routes state what they need with the ``Annotated`` aliases, and receive the
:class:`Caller`::

    @router.post("/readings")
    async def create_readings(batch: ReadingsIn, caller: IngestAccess) -> ...

The dependency finds the settings in ``app.state.settings`` and the key store in
``app.state.keys`` (through :func:`get_settings` and :func:`get_key_store`, which
tests override). Only a SHA-256 hash of each key is stored; the key itself is
shown once, when it is created.

Two settings change the rules:

- ``bootstrap_key``: this key is accepted as an ``admin`` key besides the stored
  ones, so a fresh installation can be used before any key is stored.
- ``require_keys = false``: no key is checked and **every request is treated as
  an administrator's**. :func:`service.settings.check_listen_safety` allows this
  only when the service listens on a loopback address.

Lookups are cached in memory for :data:`DEFAULT_CACHE_TTL` seconds (see
:class:`KeyCache`), so a revoked key keeps working for at most that long.
"""

from __future__ import annotations

import enum
import functools
import hashlib
import hmac
import secrets
import time
from collections.abc import Awaitable, Callable, Sequence
from dataclasses import dataclass
from datetime import datetime
from typing import Annotated, Protocol

from fastapi import Depends, HTTPException, Request, status
from fastapi.security import APIKeyHeader, HTTPAuthorizationCredentials, HTTPBearer
from starlette.concurrency import run_in_threadpool

from service.settings import Settings

__all__ = [
    "DEFAULT_CACHE_TTL",
    "KEY_PREFIX",
    "AdminAccess",
    "Caller",
    "IngestAccess",
    "KeyCache",
    "KeyRecord",
    "KeyStore",
    "ReadAccess",
    "Role",
    "get_key_cache",
    "get_key_store",
    "get_settings",
    "hash_key",
    "key_matches",
    "new_key",
    "require",
]

KEY_PREFIX = "sw_"
DEFAULT_CACHE_TTL = 5.0  # [s]; the longest a revoked key keeps working

_RANK = {"read": 0, "ingest": 1, "admin": 2}


class Role(enum.StrEnum):
    """What a key may do, ordered ``READ < INGEST < ADMIN``.

    Comparisons follow that order (``Role.ADMIN >= Role.INGEST``), not the
    alphabetical order a plain string would give, and accept role names
    (``Role.INGEST >= "read"``).
    """

    READ = "read"
    INGEST = "ingest"
    ADMIN = "admin"

    @property
    def rank(self) -> int:
        """Position in the order: 0 for read, 1 for ingest, 2 for admin."""
        return _RANK[self.value]

    def allows(self, needed: Role) -> bool:
        """Whether a key with this role may call a route that needs ``needed``."""
        return self.rank >= needed.rank

    def __lt__(self, other: object) -> bool:
        return self.rank < _role_of(other).rank

    def __le__(self, other: object) -> bool:
        return self.rank <= _role_of(other).rank

    def __gt__(self, other: object) -> bool:
        return self.rank > _role_of(other).rank

    def __ge__(self, other: object) -> bool:
        return self.rank >= _role_of(other).rank


def _role_of(other: object) -> Role:
    """Return the role ``other`` names; raise TypeError for anything else."""
    if isinstance(other, str):
        try:
            return Role(other)
        except ValueError:
            pass
    raise TypeError(f"cannot order a role against {other!r}")


def new_key() -> str:
    """Make a new API key: ``sw_`` and 43 URL-safe characters (256 random bits).

    Returns
    -------
    str
        The key. Show it to its owner once and store only :func:`hash_key` of it.
        The prefix makes a leaked key easy to recognise in logs and secret
        scanners.
    """
    return KEY_PREFIX + secrets.token_urlsafe(32)


def hash_key(key: str) -> str:
    """Hash an API key for storage and look-up.

    Parameters
    ----------
    key : str
        The key as the client sends it.

    Returns
    -------
    str
        SHA-256 of the UTF-8 key, 64 lowercase hex digits.

    Notes
    -----
    Passwords need a slow, salted hash (scrypt, Argon2) because people choose
    them from a small space that an attacker holding the hashes can search. These
    keys are 256-bit random tokens from :func:`new_key`: no dictionary covers
    them and no amount of guessing finds one, so a slow hash adds no protection
    and would cost milliseconds on every request. A salt is unnecessary for the
    same reason, and leaving it out lets the hash itself be the indexed look-up
    column.
    """
    return hashlib.sha256(key.encode("utf-8")).hexdigest()


def key_matches(key: str, key_hash: str) -> bool:
    """Whether ``key`` hashes to ``key_hash``, compared in constant time.

    Parameters
    ----------
    key : str
        The key presented.
    key_hash : str
        A stored :func:`hash_key` value.

    Returns
    -------
    bool
        True when they match. The comparison takes the same time wherever the
        hashes first differ.
    """
    return hmac.compare_digest(hash_key(key), key_hash.lower())


class KeyRecord(Protocol):
    """A stored API key, as the store returns it (never the key itself)."""

    @property
    def id(self) -> int:
        """Key number, unique in the store."""

    @property
    def name(self) -> str:
        """Name given at creation (who or what uses the key)."""

    @property
    def role(self) -> str:
        """Role name: ``"read"``, ``"ingest"`` or ``"admin"``."""

    @property
    def created_at(self) -> datetime:
        """When the key was created."""

    @property
    def revoked_at(self) -> datetime | None:
        """When the key was revoked; None while it is valid."""


class KeyStore(Protocol):
    """Where API keys are kept: the part of ``service.store.Store`` auth uses."""

    def add_api_key(self, name: str, role: str, key_hash: str) -> int:
        """Store a key's hash under a name and role; return the key's id."""
        ...

    def find_api_key_by_hash(self, key_hash: str) -> KeyRecord | None:
        """Return the key with this hash, revoked or not; None when there is none."""
        ...

    def revoke_api_key(self, key_id_or_name: int | str) -> bool:
        """Revoke a key by id or name; False when there is no such valid key."""
        ...

    def list_api_keys(self) -> Sequence[KeyRecord]:
        """Return every key, revoked ones included."""
        ...


@dataclass(frozen=True)
class Caller:
    """Who made a request, as the access dependencies hand it to a route.

    Attributes
    ----------
    name : str
        The key's name; ``"bootstrap"`` for the settings' bootstrap key and
        ``"anonymous"`` when keys are not required.
    role : Role
        The key's role (not the role the route needed).
    key_id : int or None
        The stored key's id; None for the bootstrap key and when keys are not
        required.
    """

    name: str
    role: Role
    key_id: int | None = None


class KeyCache:
    """Remember key look-ups for a few seconds, so ingest does not query per request.

    Parameters
    ----------
    ttl : float
        How long an answer is reused [s]. A key revoked in the store keeps
        working for at most this long in a running service.
    max_entries : int
        Most hashes remembered. When full, expired entries are dropped, and if
        that is not enough the whole cache is cleared: random keys sent by a
        misbehaving client cannot grow memory without bound.
    clock : callable
        Returns the current time [s]; monotonic by default.

    Notes
    -----
    Unknown hashes are remembered too, so a client with a wrong key does not
    reach the database on every request either. That never hides a newly created
    key: its hash cannot have been presented before the key existed.
    """

    def __init__(
        self,
        ttl: float = DEFAULT_CACHE_TTL,
        max_entries: int = 10_000,
        clock: Callable[[], float] = time.monotonic,
    ) -> None:
        if ttl < 0:
            raise ValueError(f"ttl must be >= 0 s, got {ttl}")
        if max_entries < 1:
            raise ValueError(f"max_entries must be >= 1, got {max_entries}")
        self.ttl = ttl
        self.max_entries = max_entries
        self._clock = clock
        self._entries: dict[str, tuple[float, KeyRecord | None]] = {}

    def __len__(self) -> int:
        return len(self._entries)

    def clear(self) -> None:
        """Forget every answer (after revoking a key through the API, say)."""
        self._entries.clear()

    async def lookup(self, store: KeyStore, key_hash: str) -> KeyRecord | None:
        """Find a key by hash, from memory when asked within the last ``ttl`` seconds.

        Parameters
        ----------
        store : KeyStore
            Asked on a miss, in a worker thread (the store is synchronous).
        key_hash : str
            :func:`hash_key` of the presented key.

        Returns
        -------
        KeyRecord or None
            The record (possibly revoked), or None when the store has no such key.
        """
        now = self._clock()
        entry = self._entries.get(key_hash)
        if entry is not None and entry[0] > now:
            return entry[1]
        record = await run_in_threadpool(store.find_api_key_by_hash, key_hash)
        if len(self._entries) >= self.max_entries:
            self._evict(self._clock())
        self._entries[key_hash] = (self._clock() + self.ttl, record)
        return record

    def _evict(self, now: float) -> None:
        self._entries = {h: e for h, e in self._entries.items() if e[0] > now}
        if len(self._entries) >= self.max_entries:
            self._entries.clear()


async def get_settings(request: Request) -> Settings:
    """Return the service settings kept in ``app.state.settings``.

    This and the other getters are ``async`` only so that FastAPI calls them on
    the event loop: a plain ``def`` dependency costs a thread-pool hop per request.

    Raises
    ------
    RuntimeError
        When the app was built without settings.
    """
    settings = getattr(request.app.state, "settings", None)
    if not isinstance(settings, Settings):
        raise RuntimeError("app.state.settings is not set: build the app with create_app()")
    return settings


async def get_key_store(request: Request) -> KeyStore:
    """Return the key store kept in ``app.state.keys``.

    Raises
    ------
    RuntimeError
        When the app has no key store.
    """
    store: KeyStore | None = getattr(request.app.state, "keys", None)
    if store is None:
        raise RuntimeError("app.state.keys is not set: the app has no key store")
    return store


async def get_key_cache(request: Request) -> KeyCache:
    """Return the app's :class:`KeyCache` (``app.state.key_cache``), made on first use."""
    cache: KeyCache | None = getattr(request.app.state, "key_cache", None)
    if cache is None:
        cache = KeyCache()
        request.app.state.key_cache = cache
    return cache


_bearer_scheme = HTTPBearer(
    auto_error=False,
    description="An API key: `Authorization: Bearer <key>`.",
)
_api_key_scheme = APIKeyHeader(
    name="X-API-Key",
    auto_error=False,
    description="An API key in the `X-API-Key` header (same keys as Bearer).",
)

_BEARER_CHALLENGE = {"WWW-Authenticate": "Bearer"}


def _unauthorized(detail: str) -> HTTPException:
    return HTTPException(status.HTTP_401_UNAUTHORIZED, detail=detail, headers=_BEARER_CHALLENGE)


def _presented_key(bearer: HTTPAuthorizationCredentials | None, api_key: str | None) -> str | None:
    """Return the key from ``Authorization: Bearer``, else from ``X-API-Key``."""
    if bearer is not None and bearer.credentials.strip():
        return bearer.credentials.strip()
    if api_key is not None and api_key.strip():
        return api_key.strip()
    return None


async def _authenticate(
    key: str | None, settings: Settings, store: KeyStore, cache: KeyCache
) -> Caller:
    """Identify who holds ``key``; raise HTTP 401 when no valid key matches."""
    if not settings.require_keys:
        return Caller(name="anonymous", role=Role.ADMIN)
    if key is None:
        raise _unauthorized("missing API key: send `Authorization: Bearer <key>` or `X-API-Key`")
    key_hash = hash_key(key)
    bootstrap = settings.bootstrap_key
    if bootstrap is not None and key_matches(bootstrap.get_secret_value(), key_hash):
        return Caller(name="bootstrap", role=Role.ADMIN)
    record = await cache.lookup(store, key_hash)
    if record is None:
        raise _unauthorized("unknown API key")
    if record.revoked_at is not None:
        raise _unauthorized(f"API key {record.name!r} was revoked")
    try:
        role = Role(record.role)
    except ValueError:
        raise HTTPException(
            status.HTTP_403_FORBIDDEN,
            detail=f"API key {record.name!r} has an unknown role {record.role!r}",
        ) from None
    return Caller(name=record.name, role=role, key_id=record.id)


@functools.cache
def require(role: Role) -> Callable[..., Awaitable[Caller]]:
    """Make the dependency that admits callers whose key has ``role`` or a higher one.

    Parameters
    ----------
    role : Role
        The least role the route needs.

    Returns
    -------
    callable
        An async FastAPI dependency returning the :class:`Caller`. It raises
        HTTP 401 (with ``WWW-Authenticate: Bearer``) when the key is missing,
        unknown or revoked, and HTTP 403 when its role is below ``role``. The
        same object is returned for the same role, so tests can put it in
        ``app.dependency_overrides``.

    Notes
    -----
    The key is read from ``Authorization: Bearer <key>`` or, failing that, from
    ``X-API-Key``. When ``settings.require_keys`` is false every request passes
    as an ``admin`` caller named ``"anonymous"``.
    """
    needed = Role(role)

    async def dependency(
        settings: Annotated[Settings, Depends(get_settings)],
        store: Annotated[KeyStore, Depends(get_key_store)],
        cache: Annotated[KeyCache, Depends(get_key_cache)],
        bearer: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer_scheme)],
        api_key: Annotated[str | None, Depends(_api_key_scheme)],
    ) -> Caller:
        caller = await _authenticate(_presented_key(bearer, api_key), settings, store, cache)
        if not caller.role.allows(needed):
            raise HTTPException(
                status.HTTP_403_FORBIDDEN,
                detail=(
                    f"API key {caller.name!r} has role {caller.role.value!r}; "
                    f"this route needs {needed.value!r} or higher"
                ),
            )
        return caller

    dependency.__name__ = dependency.__qualname__ = f"require_{needed.value}"
    return dependency


ReadAccess = Annotated[Caller, Depends(require(Role.READ))]
"""A route parameter admitting keys with role read, ingest or admin."""

IngestAccess = Annotated[Caller, Depends(require(Role.INGEST))]
"""A route parameter admitting keys with role ingest or admin."""

AdminAccess = Annotated[Caller, Depends(require(Role.ADMIN))]
"""A route parameter admitting admin keys only."""
