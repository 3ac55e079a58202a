"""``stagewatch keys``: create, list and revoke the service's API keys.

The commands work on the database the service uses (``database_url`` from the
settings: environment, settings file or default), so they run beside a live
service or before its first start. Only a hash of each key is stored; ``create``
prints the key once, alone on standard output so a script can capture it::

    KEY=$(stagewatch keys create --role ingest --name historian-bridge)

A running service notices a revocation within a few seconds (its key cache).

Exit status: 0 on success, 1 when the database cannot be used, 2 for bad input
(an unknown role, an empty or duplicate name, no such key, invalid settings or an
unsupported database URL).
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Annotated

import typer

from service.cli_support import fail, open_database

__all__ = ["keys_app"]

MAX_NAME_LENGTH = 100

keys_app = typer.Typer(
    name="keys",
    help="Create, list and revoke API keys (only their hashes are stored).",
    no_args_is_help=True,
    add_completion=False,
)


def _check_name(name: str) -> str:
    """Return ``name`` stripped, or exit 2 when it cannot name a key."""
    name = name.strip()
    if not name:
        raise fail("--name must not be empty")
    if name.isdigit():
        raise fail(f"--name {name!r}: a name must not be all digits (revoke takes ids too)")
    if len(name) > MAX_NAME_LENGTH:
        raise fail(f"--name: at most {MAX_NAME_LENGTH} characters, got {len(name)}")
    if not name.isprintable():
        raise fail(f"--name {name!r}: only printable characters")
    return name


def _format_time(moment: datetime | None) -> str:
    """Write a time as ``2026-03-02 08:00:00Z`` (UTC; naive times are taken as UTC)."""
    if moment is None:
        return "-"
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return moment.astimezone(UTC).strftime("%Y-%m-%d %H:%M:%SZ")


@keys_app.command("create", help="Create an API key and print it (shown only this once).")
def create_key(
    role: Annotated[
        str, typer.Option("--role", help="read, ingest or admin (each includes the ones before).")
    ],
    name: Annotated[
        str, typer.Option("--name", help="Who or what uses the key, e.g. historian-bridge.")
    ],
) -> None:
    """Create a key, store its hash and print the key once.

    Parameters
    ----------
    role : str
        ``read``, ``ingest`` or ``admin``.
    name : str
        A name for the key, unique among keys that are not revoked.

    Raises
    ------
    typer.Exit
        Status 2 for an unknown role or a bad or duplicate name.
    """
    from service.auth import Role, hash_key, new_key

    try:
        chosen = Role(role.strip().lower())
    except ValueError:
        choices = ", ".join(r.value for r in Role)
        raise fail(f"unknown role {role!r}: choose one of {choices}") from None
    name = _check_name(name)
    with open_database(check_schema=True) as (store, _):
        clash = [k for k in store.list_api_keys() if k.name == name and k.revoked_at is None]
        if clash:
            raise fail(
                f"a key named {name!r} exists already (id {clash[0].id}): "
                "choose another name or revoke that key first"
            )
        key = new_key()
        key_id = store.add_api_key(name, chosen.value, hash_key(key))
    typer.echo(key)
    typer.echo(
        f"created API key {key_id} {name!r} with role {chosen.value}; "
        "it is shown only this once: store it now",
        err=True,
    )


@keys_app.command("list", help="List API keys: id, name, role, created, revoked.")
def list_keys() -> None:
    """Print every key, revoked ones included, one a line under a header."""
    with open_database(check_schema=True) as (store, _):
        records = sorted(store.list_api_keys(), key=lambda k: k.id)
    if not records:
        typer.echo("no API keys: create one with `stagewatch keys create --role admin`", err=True)
        return
    rows = [("id", "name", "role", "created", "revoked")]
    rows += [
        (
            str(k.id),
            k.name,
            k.role,
            _format_time(k.created_at),
            _format_time(k.revoked_at),
        )
        for k in records
    ]
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    for row in rows:
        typer.echo("  ".join(cell.ljust(w) for cell, w in zip(row, widths, strict=True)).rstrip())


@keys_app.command("revoke", help="Revoke an API key by id or name.")
def revoke_key(
    id_or_name: Annotated[str, typer.Argument(metavar="ID_OR_NAME", help="The key's id or name.")],
) -> None:
    """Revoke a key; a running service refuses it within a few seconds.

    Parameters
    ----------
    id_or_name : str
        The key's id (digits) or its name.

    Raises
    ------
    typer.Exit
        Status 2 when no valid key has that id or name.
    """
    from service.auth import DEFAULT_CACHE_TTL

    target = id_or_name.strip()
    which: int | str = int(target) if target.isdigit() else target
    with open_database(check_schema=True) as (store, _):
        revoked = store.revoke_api_key(which)
    if not revoked:
        raise fail(f"no valid API key with id or name {target!r} (see `stagewatch keys list`)")
    typer.echo(
        f"revoked API key {target!r}; running services refuse it within {DEFAULT_CACHE_TTL:g} s"
    )
