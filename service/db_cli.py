"""``stagewatch db``: the database schema's revision, and upgrading it.

Both commands work on the database the service uses (``database_url`` from the
settings: environment, settings file or default)::

    stagewatch db current     # where the schema stands
    stagewatch db upgrade     # run the pending revisions (back up first)

The service itself never changes an existing schema: after installing a new
version of stagewatch, stop the service, back up the database, run
``stagewatch db upgrade``, start the service. See :mod:`service.migrations`.

Exit status: 0 on success, 1 when the database cannot be used or the upgrade
failed, 2 for invalid settings or an unsupported database URL. ``current`` also
exits 3 when the schema is not at this version's head, so a script can test it.
"""

from __future__ import annotations

import typer

from service.cli_support import EXIT_FAILURE, fail, one_line, open_database

__all__ = ["db_app"]

EXIT_NOT_CURRENT = 3

db_app = typer.Typer(
    name="db",
    help="The database schema: show its revision, or upgrade it.",
    no_args_is_help=True,
    add_completion=False,
)


@db_app.command("current", help="Show the database's schema revision and this version's head.")
def db_current() -> None:
    """Print where the schema stands; exit 3 unless it is at the head."""
    from service.migrations import current

    with open_database() as (store, shown):
        status = current(store)
    typer.echo(f"{shown}: {status.describe()}")
    if not status.current:
        raise typer.Exit(EXIT_NOT_CURRENT)


@db_app.command("upgrade", help="Run the pending schema revisions (back the database up first).")
def db_upgrade(
    revision: str = typer.Argument("head", help="Revision to upgrade to; the newest by default."),
) -> None:
    """Upgrade the schema to ``revision`` and say from where to where."""
    from alembic.util import CommandError

    from service.migrations import SchemaError, current, upgrade

    with open_database() as (store, shown):
        before = current(store)
        try:
            after = upgrade(store, revision)
        except SchemaError as exc:
            raise fail(f"{shown}: {exc}", EXIT_FAILURE) from None
        except CommandError as exc:  # an unknown target revision, say
            raise fail(f"revision {revision!r}: {one_line(exc)}") from None
    was = before.revision or ("no revision" if before.has_tables else "empty")
    if before.revision == after.revision:
        typer.echo(f"{shown}: already at revision {after.revision}, nothing to do")
    else:
        typer.echo(f"{shown}: upgraded from {was} to revision {after.revision}")
