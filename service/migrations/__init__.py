"""Database schema versions (Alembic): upgrade, current revision, and the start-up check.

The store's tables (:mod:`service.store`) are the schema's definition; each change
to them ships as a revision in ``versions/``, and a test runs the revisions on a
fresh SQLite and PostgreSQL database and checks that they build exactly what the
tables define, so the two cannot drift apart.

How a database gets its schema:

- **Fresh database** (no stagewatch table): :func:`prepare_schema` creates every
  table from the store's definition and stamps it with the newest revision (the
  head) in one step; no migration runs.
- **Database from before migrations existed** (stagewatch tables, no version
  table): it was made by the same definition as the first revision, so
  :func:`prepare_schema` stamps it with :data:`BASELINE` and treats it as below.
- **Versioned database**: at the head, the service starts. Behind it, the service
  refuses to start and says to run ``stagewatch db upgrade`` (after a backup):
  schema changes happen only when an operator asks for them. At a revision this
  version does not know (a newer stagewatch made it), it refuses too.

``stagewatch db upgrade`` (:func:`upgrade`) runs the pending revisions in order,
each in a transaction; ``stagewatch db current`` (:func:`current`) reports where a
database stands. A developer who changes the tables writes the next revision with
``python -m service.migrations "what changed"`` (:func:`autogenerate_revision`)
and reviews it.
"""

from __future__ import annotations

import tempfile
from importlib import resources
from pathlib import Path
from typing import TYPE_CHECKING

from sqlalchemy import MetaData, inspect

if TYPE_CHECKING:
    from alembic.config import Config
    from alembic.script import ScriptDirectory

    from service.store import Store

__all__ = [
    "BASELINE",
    "SchemaError",
    "SchemaStatus",
    "alembic_config",
    "autogenerate_revision",
    "current",
    "head",
    "metadata",
    "prepare_schema",
    "upgrade",
]

BASELINE = "0001"
"""The first revision: the schema as it stood when migrations were introduced."""


class SchemaError(RuntimeError):
    """The database's schema is not the one this version of stagewatch needs; says what to do."""


def metadata() -> MetaData:
    """Return the store's table definitions (what the head revision must build)."""
    from service.store import _Base

    return _Base.metadata


def alembic_config(store: Store | None = None, location: Path | None = None) -> Config:
    """Build Alembic's configuration for this package's revisions.

    Parameters
    ----------
    store : Store, optional
        The database to act on. Commands that only read the revision files
        (``heads``, ``history``) need none.
    location : Path, optional
        Another copy of this folder (for tests); this package's own by default.

    Returns
    -------
    alembic.config.Config
        With ``script_location`` at ``service/migrations``; no ``alembic.ini`` is
        read.
    """
    from alembic.config import Config

    config = Config()
    where = str(location) if location is not None else str(resources.files(__name__))
    config.set_main_option("script_location", where)
    if store is not None:
        config.attributes["store"] = store
    return config


def _scripts() -> ScriptDirectory:
    from alembic.script import ScriptDirectory

    return ScriptDirectory.from_config(alembic_config())


def head() -> str:
    """Return the newest revision id of this version of stagewatch."""
    heads = _scripts().get_heads()
    if len(heads) != 1:
        raise SchemaError(f"the revisions have {len(heads)} heads, not one: {heads}")
    return heads[0]


class SchemaStatus:
    """Where a database stands: its revision, the head, and whether tables exist.

    Attributes
    ----------
    revision : str or None
        The revision stamped in the database; None when it has no version table.
    head : str
        The newest revision this version of stagewatch knows.
    has_tables : bool
        Whether any stagewatch table exists.
    known : bool
        Whether ``revision`` is one of this version's revisions (or None).
    """

    def __init__(self, revision: str | None, head: str, has_tables: bool, known: bool) -> None:
        self.revision = revision
        self.head = head
        self.has_tables = has_tables
        self.known = known

    @property
    def current(self) -> bool:
        """Whether the database is at the head."""
        return self.revision == self.head

    def describe(self) -> str:
        """Say where the database stands, in one line."""
        if self.revision is None:
            if self.has_tables:
                return f"no schema revision (made before migrations; it is {BASELINE})"
            return "empty: no stagewatch tables yet"
        if not self.known:
            return f"at revision {self.revision}, unknown to this version (head {self.head})"
        if self.current:
            return f"at revision {self.revision} (head)"
        return f"at revision {self.revision}; head is {self.head}: run `stagewatch db upgrade`"


def current(store: Store) -> SchemaStatus:
    """Read where ``store``'s database stands (no change is made).

    Parameters
    ----------
    store : Store
        The database.

    Returns
    -------
    SchemaStatus
    """
    from alembic.runtime.migration import MigrationContext

    scripts = _scripts()
    tables = set(metadata().tables)
    with store.engine.connect() as conn:
        revision = MigrationContext.configure(conn).get_current_revision()
        existing = set(inspect(conn).get_table_names())
    known = revision is None or _known(scripts, revision)
    return SchemaStatus(revision, head(), bool(tables & existing), known)


def _known(scripts: ScriptDirectory, revision: str) -> bool:
    from alembic.util import CommandError

    try:
        return scripts.get_revision(revision) is not None
    except CommandError:
        return False


def _stamp(store: Store, revision: str) -> None:
    from alembic.runtime.migration import MigrationContext

    with store.engine.begin() as conn:
        MigrationContext.configure(conn).stamp(_scripts(), revision)


def prepare_schema(store: Store) -> str:
    """Give a fresh database the current schema, or check that an existing one has it.

    Called when the service (or ``stagewatch keys``) opens its database.

    Parameters
    ----------
    store : Store
        The database.

    Returns
    -------
    str
        The database's revision, which is then the head.

    Raises
    ------
    SchemaError
        When the database is behind the head (run ``stagewatch db upgrade``) or at
        a revision this version does not know.
    """
    status = current(store)
    if status.revision is None:
        if not status.has_tables:
            store.create_all()
            _stamp(store, "head")
            return status.head
        _stamp(store, BASELINE)
        status = current(store)
    if not status.known:
        raise SchemaError(
            f"the database schema is at revision {status.revision}, which this version of "
            f"stagewatch does not know (its newest is {status.head}): a newer version "
            "upgraded it; run that version, or restore a backup made before the upgrade"
        )
    if not status.current:
        raise SchemaError(
            f"the database schema is at revision {status.revision}, this version of "
            f"stagewatch needs {status.head}: back up the database, then run "
            "`stagewatch db upgrade`"
        )
    return status.head


def upgrade(store: Store, revision: str = "head") -> SchemaStatus:
    """Run the pending revisions up to ``revision``, oldest first.

    A fresh database gets every table; a database made before migrations is
    stamped :data:`BASELINE` first. Each revision runs in a transaction (both
    backends roll DDL back), so a failure leaves the database at the last
    revision that completed.

    Parameters
    ----------
    store : Store
        The database.
    revision : str
        Target revision; the head by default.

    Returns
    -------
    SchemaStatus
        Where the database stands afterwards.
    """
    from alembic import command

    status = current(store)
    if status.revision is None and status.has_tables:
        _stamp(store, BASELINE)
    elif not status.known:
        raise SchemaError(
            f"the database schema is at revision {status.revision}, which this version "
            "does not know: it cannot be upgraded by it"
        )
    config = alembic_config(store)
    with store.engine.begin() as conn:
        config.attributes["connection"] = conn
        command.upgrade(config, revision)
    return current(store)


def autogenerate_revision(message: str, location: Path | None = None) -> Path:
    """Write the next revision: what turns the head's schema into the store's tables.

    Runs every revision on a scratch SQLite database, compares it with
    :func:`metadata` and writes the difference as ``versions/NNNN_<slug>.py``
    (numbered after the head). Review it before committing: Alembic cannot tell a
    renamed column from a dropped and an added one, and never sees a changed
    check constraint.

    Parameters
    ----------
    message : str
        What changed, as the revision's title.
    location : Path, optional
        Another copy of this folder (for tests).

    Returns
    -------
    Path
        The new revision file.
    """
    from alembic import command
    from alembic.script import ScriptDirectory

    from service.store import Store

    previous = ScriptDirectory.from_config(alembic_config(location=location)).get_current_head()
    number = f"{int(previous or '0') + 1:04d}"
    with tempfile.TemporaryDirectory() as scratch:
        store = Store(f"sqlite:///{Path(scratch) / 'scratch.db'}")
        try:
            config = alembic_config(store, location)
            with store.engine.begin() as conn:
                config.attributes["connection"] = conn
                command.upgrade(config, "head")
                script = command.revision(config, message, autogenerate=True, rev_id=number)
        finally:
            store.close()
    if script is None or isinstance(script, list):
        raise SchemaError(f"Alembic wrote no single revision for {message!r}")
    return Path(script.path)
