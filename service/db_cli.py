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

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING

import typer

if TYPE_CHECKING:
    from service.store import Store

__all__ = ["db_app"]

EXIT_FAILURE = 1
EXIT_INPUT_ERROR = 2
EXIT_NOT_CURRENT = 3

db_app = typer.Typer(
    name="db",
    help="The database schema: show its revision, or upgrade it.",
    no_args_is_help=True,
    add_completion=False,
)


def _fail(message: str, code: int = EXIT_FAILURE) -> typer.Exit:
    """Print ``message`` (one line) to stderr and build the exit for the caller to raise."""
    typer.echo(message, err=True)
    return typer.Exit(code)


def _one_line(exc: BaseException) -> str:
    """Return the first line of an exception's message (drivers add pages of context)."""
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


@contextmanager
def _database() -> Iterator[tuple[Store, str]]:
    """Open the service's database from the settings; yield it and its URL for messages."""
    from sqlalchemy.exc import ArgumentError, SQLAlchemyError

    from service.settings import SettingsError, load_settings
    from service.store import Store, StoreUnavailable

    try:
        settings = load_settings()
    except SettingsError as exc:
        raise _fail(str(exc), EXIT_INPUT_ERROR) from None
    url = settings.database_url
    try:
        store = Store(url)
    except (ValueError, ArgumentError) as exc:
        raise _fail(f"database_url: {_one_line(exc)}", EXIT_INPUT_ERROR) from None
    shown = store.engine.url.render_as_string(hide_password=True)
    try:
        if url.startswith("sqlite:///"):
            Path(url.removeprefix("sqlite:///")).parent.mkdir(parents=True, exist_ok=True)
        yield store, shown
    except (OSError, SQLAlchemyError, StoreUnavailable) as exc:
        raise _fail(f"cannot use the database {shown}: {_one_line(exc)}") from None
    finally:
        store.close()


@db_app.command("current", help="Show the database's schema revision and this version's head.")
def db_current() -> None:
    """Print where the schema stands; exit 3 unless it is at the head."""
    from service.migrations import current

    with _database() as (store, shown):
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

    with _database() as (store, shown):
        before = current(store)
        try:
            after = upgrade(store, revision)
        except SchemaError as exc:
            raise _fail(f"{shown}: {exc}") from None
        except CommandError as exc:  # an unknown target revision, say
            raise _fail(f"revision {revision!r}: {_one_line(exc)}", EXIT_INPUT_ERROR) from None
    was = before.revision or ("no revision" if before.has_tables else "empty")
    if before.revision == after.revision:
        typer.echo(f"{shown}: already at revision {after.revision}, nothing to do")
    else:
        typer.echo(f"{shown}: upgraded from {was} to revision {after.revision}")
