"""What the ``stagewatch`` commands share: one-line failures and opening the database.

Exit status across the commands: 1 when something outside the input failed (the
database cannot be used), 2 for bad input (settings, an unsupported database URL,
a bad option).
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import TYPE_CHECKING

import typer

if TYPE_CHECKING:
    from service.store import Store

__all__ = ["EXIT_FAILURE", "EXIT_INPUT_ERROR", "fail", "one_line", "open_database"]

EXIT_FAILURE = 1
EXIT_INPUT_ERROR = 2


def fail(message: str, code: int = EXIT_INPUT_ERROR) -> typer.Exit:
    """Print ``message`` to stderr and build the exit to raise.

    Parameters
    ----------
    message : str
        One line: what went wrong and, where it helps, what to do about it.
    code : int
        Process exit status.

    Returns
    -------
    typer.Exit
        The exception for the caller to raise (``raise fail(...)``), so that type
        checkers see the command end there.
    """
    typer.echo(message, err=True)
    return typer.Exit(code)


def one_line(exc: BaseException) -> str:
    """Return the first line of an exception's message (drivers add pages of context)."""
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


@contextmanager
def open_database(*, check_schema: bool = False) -> Iterator[tuple[Store, str]]:
    """Open the service's database from the settings; yield it and its URL for messages.

    The folder of a SQLite file is created. With ``check_schema`` a new database
    gets this version's tables and an existing one must have them
    (:func:`service.migrations.prepare_schema`), as when the service opens it. The
    URL is shown with any password masked.

    Raises
    ------
    typer.Exit
        Status 2 for invalid settings or database URL; 1 when the database cannot
        be opened (``cannot open the database ...``) or fails while the block uses
        it (``cannot use the database ...``).
    """
    from sqlalchemy.exc import ArgumentError, SQLAlchemyError

    from service.migrations import SchemaError, prepare_schema
    from service.settings import SettingsError, load_settings
    from service.store import Store, StoreUnavailable

    try:
        settings = load_settings()
    except SettingsError as exc:
        raise fail(str(exc)) from None
    url = settings.database_url
    try:
        store = Store(url)
    except (ValueError, ArgumentError) as exc:
        raise fail(f"database_url: {one_line(exc)}") from None
    shown = store.engine.url.render_as_string(hide_password=True)
    try:
        if url.startswith("sqlite:///"):
            Path(url.removeprefix("sqlite:///")).parent.mkdir(parents=True, exist_ok=True)
        if check_schema:
            prepare_schema(store)
    except (OSError, SQLAlchemyError, SchemaError, StoreUnavailable) as exc:
        store.close()
        raise fail(f"cannot open the database {shown}: {one_line(exc)}", EXIT_FAILURE) from None
    try:
        yield store, shown
    except (OSError, SQLAlchemyError, StoreUnavailable) as exc:
        raise fail(f"cannot use the database {shown}: {one_line(exc)}", EXIT_FAILURE) from None
    finally:
        store.close()
