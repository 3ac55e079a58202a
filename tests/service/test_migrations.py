"""Schema migrations: the revisions build exactly the store's tables, on both backends.

If someone changes a table in ``service/store.py`` without adding a revision (or
adds one that builds something else), ``test_migrations_build_exactly_the_store_tables``
fails and prints what differs.
"""

from __future__ import annotations

import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest
from alembic.autogenerate import compare_metadata
from alembic.runtime.migration import MigrationContext
from sqlalchemy import inspect, text
from typer.testing import CliRunner

from service import migrations
from service.app import _open_store
from service.cli import app as cli
from service.migrations import (
    BASELINE,
    SchemaError,
    autogenerate_revision,
    current,
    head,
    prepare_schema,
    upgrade,
)
from service.settings import Settings
from service.store import Store

STORE_TABLES = set(migrations.metadata().tables)


@pytest.fixture
def store(database_url: str) -> Iterator[Store]:
    opened = Store(database_url)
    yield opened
    opened.close()


def differences(store: Store) -> list[object]:
    """What Alembic's autogenerate would change to make the database match the tables."""
    with store.engine.connect() as conn:
        context = MigrationContext.configure(conn, opts={"compare_type": True})
        diff: list[object] = compare_metadata(context, migrations.metadata())
    return diff


def tables(store: Store) -> set[str]:
    with store.engine.connect() as conn:
        return set(inspect(conn).get_table_names())


def test_migrations_build_exactly_the_store_tables(store: Store):
    status = upgrade(store)
    assert status.current and status.revision == head()
    assert tables(store) == STORE_TABLES | {"alembic_version"}
    assert differences(store) == []
    # What autogenerate does not compare: check constraints, and SQLite's
    # AUTOINCREMENT on the journal (ids never reused after deletes).
    with store.engine.connect() as conn:
        checks = {c["name"] for c in inspect(conn).get_check_constraints("gated_readings")}
        assert "ck_gated_decision" in checks
        if store.dialect == "sqlite":
            sql = conn.execute(
                text("SELECT sql FROM sqlite_master WHERE type = 'table' AND name = 'readings'")
            ).scalar_one()
            assert "AUTOINCREMENT" in sql


def test_the_comparison_would_see_a_drift(store: Store):
    # The check above can fail: a database missing an index shows up as a difference.
    upgrade(store)
    with store.engine.begin() as conn:
        conn.execute(text("DROP INDEX ix_readings_train_journal"))
    assert any("ix_readings_train_journal" in repr(d) for d in differences(store))


def test_downgrade_to_nothing_and_up_again(store: Store):
    upgrade(store)
    upgrade_down = migrations.alembic_config(store)
    from alembic import command

    with store.engine.begin() as conn:
        upgrade_down.attributes["connection"] = conn
        command.downgrade(upgrade_down, "base")
    assert tables(store) - {"alembic_version"} == set()
    assert upgrade(store).current
    assert differences(store) == []


def test_a_fresh_database_gets_the_tables_and_the_head_stamp(store: Store):
    assert not current(store).has_tables
    assert prepare_schema(store) == head()
    status = current(store)
    assert status.current and status.has_tables
    assert differences(store) == []
    assert prepare_schema(store) == head()  # again: nothing to do


def test_a_database_from_before_migrations_is_stamped_with_the_baseline(store: Store):
    store.create_all()  # what every earlier version did
    status = current(store)
    assert status.revision is None and status.has_tables
    assert "before migrations" in status.describe()
    assert prepare_schema(store) == head()
    assert current(store).revision == head()
    assert BASELINE == "0001"


def test_a_database_behind_or_ahead_refuses_with_what_to_do(
    store: Store, monkeypatch: pytest.MonkeyPatch
):
    prepare_schema(store)
    # Behind: a newer stagewatch (its head after ours) opens today's database.
    monkeypatch.setattr(migrations, "head", lambda: "9999")
    monkeypatch.setattr(migrations, "_known", lambda scripts, revision: True)
    with pytest.raises(SchemaError, match="back up the database, then run `stagewatch db upgrade`"):
        prepare_schema(store)
    monkeypatch.undo()
    # Ahead: a database stamped by a newer stagewatch.
    with store.engine.begin() as conn:
        conn.execute(text("UPDATE alembic_version SET version_num = 'f00d'"))
    with pytest.raises(SchemaError, match="f00d, which this version of stagewatch does not know"):
        prepare_schema(store)
    assert "unknown to this version" in current(store).describe()


def test_the_service_opens_its_database_through_the_schema_check(database_url: str, tmp_path: Path):
    settings = Settings(data_dir=tmp_path, database_url=database_url)
    opened = _open_store(settings)
    try:
        assert current(opened).current
        with opened.engine.begin() as conn:
            conn.execute(text("UPDATE alembic_version SET version_num = 'f00d'"))
    finally:
        opened.close()
    with pytest.raises(SchemaError, match="f00d"):
        _open_store(settings)


def test_db_commands(database_url: str, monkeypatch: pytest.MonkeyPatch):
    monkeypatch.setenv("STAGEWATCH_DATABASE_URL", database_url)
    runner = CliRunner()
    r = runner.invoke(cli, ["db", "current"])
    assert r.exit_code == 3 and "empty: no stagewatch tables yet" in r.output
    r = runner.invoke(cli, ["db", "upgrade"])
    assert r.exit_code == 0, r.output
    assert f"upgraded from empty to revision {head()}" in r.output
    r = runner.invoke(cli, ["db", "current"])
    assert r.exit_code == 0 and f"at revision {head()} (head)" in r.output
    r = runner.invoke(cli, ["db", "upgrade"])
    assert r.exit_code == 0 and "nothing to do" in r.output
    r = runner.invoke(cli, ["db", "upgrade", "nope"])
    assert r.exit_code == 2 and "revision 'nope'" in r.output
    assert len(r.output.strip().splitlines()) == 1


def test_db_commands_name_a_bad_url_in_one_line(monkeypatch: pytest.MonkeyPatch):
    monkeypatch.setenv("STAGEWATCH_DATABASE_URL", "mysql://somewhere/db")
    r = CliRunner().invoke(cli, ["db", "current"])
    assert r.exit_code == 2
    assert r.output.strip().splitlines() == [
        "database_url: unsupported database URL 'mysql://somewhere/db': use sqlite:///<file> "
        "or postgresql+psycopg://<user>@<host>/<database>"
    ]


def test_the_revision_writer_numbers_the_next_revision_and_finds_no_change(tmp_path: Path):
    # On a copy of the revisions: with the tables unchanged, the next revision is
    # empty and follows the head.
    copy = tmp_path / "migrations"
    skip = shutil.ignore_patterns("__pycache__")
    shutil.copytree(Path(migrations.__file__).parent, copy, ignore=skip)
    path = autogenerate_revision("nothing changed", location=copy)
    assert path.parent == copy / "versions"
    number = f"{int(head()) + 1:04d}"
    assert path.name == f"{number}_nothing_changed.py"
    source = path.read_text()
    assert f"down_revision = {head()!r}" in source
    assert "op." not in source  # no operation: the head already builds every table
