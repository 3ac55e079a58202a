"""Alembic's environment for stagewatch: run migrations on the service's database.

Alembic runs this file for every command. The connection comes from
:func:`service.migrations.alembic_config` (``config.attributes["connection"]``)
when stagewatch drives Alembic; run by Alembic's own command line, the database is
``sqlalchemy.url`` from its configuration, else the service settings'
``database_url``, opened through :class:`service.store.Store` so that SQLite gets
the same pragmas as in the service.
"""

from __future__ import annotations

from alembic import context
from sqlalchemy.engine import Connection

from service.migrations import metadata
from service.settings import load_settings
from service.store import Store


def _run(connection: Connection) -> None:
    """Configure the migration context on ``connection`` and run what is pending."""
    context.configure(
        connection=connection,
        target_metadata=metadata(),
        # SQLite cannot ALTER most things; batch operations copy the table instead,
        # and do plain ALTERs on PostgreSQL.
        render_as_batch=True,
        compare_type=True,
    )
    with context.begin_transaction():
        context.run_migrations()


def _main() -> None:
    if context.is_offline_mode():
        raise RuntimeError("stagewatch migrations run against a database, not as SQL text")
    given = context.config.attributes.get("connection")
    if isinstance(given, Connection):
        _run(given)
        return
    url = context.config.get_main_option("sqlalchemy.url") or load_settings().database_url
    store = Store(url)
    try:
        with store.engine.connect() as connection:
            _run(connection)
    finally:
        store.close()


_main()
