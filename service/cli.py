"""The ``stagewatch`` command line.

One entry point for every way of driving stagewatch from a shell. Imports stay
light at module level (typer only) so ``stagewatch --help`` answers at once;
numerics, web and database modules are imported inside the commands that need
them.

Exit status: 0 on success, 1 when the command ran and failed, 2 for a usage or
input problem (a missing file, an invalid train configuration).
"""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Any

import typer

from service.cli_support import fail

__all__ = ["app", "main"]

app = typer.Typer(
    name="stagewatch",
    help=(
        "Soft sensor and state estimator for cascades of stirred-tank reactors. "
        "A monitoring aid, not a protection layer."
    ),
    no_args_is_help=True,
    add_completion=False,
)


def _plural(count: int, noun: str) -> str:
    """Write ``count`` with ``noun`` in the right number (``1 vessel``, ``3 vessels``)."""
    return f"{count} {noun}" if count == 1 else f"{count} {noun}s"


@app.command(help="Print the installed stagewatch version.")
def version() -> None:
    """Print the installed stagewatch version.

    Raises
    ------
    typer.Exit
        With status 1 when the package metadata is missing (not installed).
    """
    from importlib.metadata import PackageNotFoundError
    from importlib.metadata import version as package_version

    try:
        typer.echo(f"stagewatch {package_version('stagewatch')}")
    except PackageNotFoundError:
        raise fail("stagewatch is not installed; run `make venv` first", code=1) from None


@app.command(help="Validate a train configuration (TOML) and summarise it.")
def check(
    train: Annotated[
        Path,
        typer.Argument(metavar="TRAIN.toml", help="Train configuration file to validate."),
    ],
) -> None:
    """Validate a train configuration and print a one-line summary.

    Parameters
    ----------
    train : pathlib.Path
        The train's TOML file.

    Then the observability report at the nominal operating point: which states
    the configured measurements cannot determine, and what to measure instead. An
    unobservable train is a warning, not an error (exit 0): its other states are
    still estimated.

    Raises
    ------
    typer.Exit
        With status 2 when the file is missing or unreadable, or when the
        configuration is invalid; every problem found is printed, one a line.
    """
    if not train.is_file():
        what = "is not a file" if train.exists() else "does not exist"
        raise fail(f"error: {train} {what}")

    from estimator.config import load_train_config
    from estimator.errors import ConfigError

    try:
        config = load_train_config(train)
    except ConfigError as exc:
        raise fail(str(exc)) from None
    except OSError as exc:
        raise fail(f"error: cannot read {train}: {exc.strerror or exc}") from None

    typer.echo(
        f"ok: {config.name}, {_plural(len(config.vessels), 'vessel')}, "
        f"{len(config.species)} species"
    )

    from estimator.model import TrainModel
    from estimator.observability import observability_report

    report = observability_report(TrainModel.from_config(config))
    prefix = "observability" if report.observable else "warning"
    typer.echo(f"{prefix}: {report.message()}")


@app.command(help="Simulate a short invented scenario, estimate it, print estimates beside truth.")
def demo(
    seed: Annotated[int, typer.Option(help="Random seed for the simulated plant noise.")] = 7,
    hours: Annotated[float, typer.Option(help="Length of the simulated run, in hours.")] = 12.0,
) -> None:
    """Simulate an invented scenario, run the estimator on it, print estimates beside truth.

    Parameters
    ----------
    seed : int
        Seed of the random generator for the simulated measurement noise.
    hours : float
        Length of the simulated run [h].

    Raises
    ------
    typer.Exit
        With status 2 when ``hours`` is not a positive finite number.
    """
    import math

    if not (math.isfinite(hours) and hours > 0):
        raise fail(f"error: --hours must be a positive number of hours, got {hours}")

    from service.demo import run_demo

    run_demo(seed=seed, hours=hours)


_FORMS = ("long", "wide")
_FORMATS = ("parquet", "csv", "csv.gz")


def _problem_lines(exc: Exception) -> str:
    """One line per problem of a configuration error: ``error: FILE: key: reason``."""
    from estimator.errors import ConfigError

    if isinstance(exc, ConfigError):
        return "\n".join(f"error: {exc.source}: {p.key}: {p.reason}" for p in exc.problems)
    return f"error: {exc}"


def _size(path: Path) -> str:
    """File size in kB or MB, for people."""
    size = path.stat().st_size
    return f"{size / 1e6:.2f} MB" if size >= 1e6 else f"{size / 1e3:.0f} kB"


@app.command(
    name="simulate",
    help=(
        "Simulate a train under a scenario file and write what its historian would hold "
        "(DIR/archive.<ext>) and the truth (DIR/truth.<ext>)."
    ),
)
def simulate_command(
    config: Annotated[
        Path, typer.Option("--config", metavar="TRAIN.toml", help="Train configuration file.")
    ],
    scenario: Annotated[
        Path, typer.Option("--scenario", metavar="SCENARIO.toml", help="Scenario file.")
    ],
    out: Annotated[Path, typer.Option("--out", metavar="DIR", help="Folder to write into.")],
    days: Annotated[
        float | None,
        typer.Option(help="Length of the run in days (default: the scenario's duration)."),
    ] = None,
    seed: Annotated[
        int | None, typer.Option(help="Random seed (default: the scenario's seed).")
    ] = None,
    form: Annotated[
        str, typer.Option(help="Archive layout: long (time, tag, value, received) or wide.")
    ] = "long",
    file_format: Annotated[
        str, typer.Option("--format", help="File format: parquet, csv or csv.gz.")
    ] = "parquet",
    truth_every: Annotated[
        float, typer.Option(help="Interval of the rows of the truth file, in seconds.")
    ] = 60.0,
) -> None:
    """Simulate a train under a scenario; write its archive and its truth.

    Parameters
    ----------
    config : pathlib.Path
        The train's TOML file.
    scenario : pathlib.Path
        The scenario's TOML file (see :mod:`estimator.scenario`).
    out : pathlib.Path
        Folder for ``archive.<ext>`` and ``truth.<ext>``; created if missing.
    days : float, optional
        Run length [d], overriding the scenario's.
    seed : int, optional
        Seed of the noise generator, overriding the scenario's.
    form : str
        ``"long"`` or ``"wide"`` archive.
    file_format : str
        ``"parquet"`` (zstd), ``"csv"`` or ``"csv.gz"``.
    truth_every : float
        Down-sampling interval of the truth file [s].

    Raises
    ------
    typer.Exit
        Status 2 for bad input (a missing file, an invalid train or scenario, a
        bad option), each problem on one line; status 1 when writing fails.
    """
    import dataclasses
    import math
    import time

    if form not in _FORMS:
        raise fail(f"error: --form must be one of {', '.join(_FORMS)}, got {form!r}")
    if file_format not in _FORMATS:
        raise fail(f"error: --format must be one of {', '.join(_FORMATS)}, got {file_format!r}")
    if days is not None and not (math.isfinite(days) and days > 0):
        raise fail(f"error: --days must be a positive number of days, got {days}")
    if not (math.isfinite(truth_every) and truth_every > 0):
        raise fail(f"error: --truth-every must be a positive number of seconds, got {truth_every}")
    for path in (config, scenario):
        if not path.is_file():
            what = "is not a file" if path.exists() else "does not exist"
            raise fail(f"error: {path} {what}")

    from estimator.config import load_train_config
    from estimator.errors import ConfigError
    from estimator.model import TrainModel
    from estimator.scenario import load_scenario
    from estimator.simulate import simulate
    from service.archive import (
        ArchiveError,
        simulation_columns,
        write_archive,
        write_truth,
    )

    try:
        train = load_train_config(config)
        plan = load_scenario(scenario, train)
    except ConfigError as exc:
        raise fail(_problem_lines(exc)) from None
    if days is not None:
        plan = dataclasses.replace(plan, duration=days * 86400.0)
    model = TrainModel.from_config(train)
    began = time.perf_counter()
    try:
        run = simulate(model, plan, seed=seed)
    except ValueError as exc:
        raise fail(f"error: {scenario}: {exc}") from None
    elapsed = time.perf_counter() - began

    readings = simulation_columns(run, train)
    if form == "wide":
        late = int((run.received > run.reading_times).sum())
        if late:
            typer.echo(
                f"note: wide form has no 'received' column; {_plural(late, 'delayed reading')} "
                "keep only their sample time"
            )
        readings = dataclasses.replace(readings, received=None)
    archive_path = out / f"archive.{file_format}"
    truth_path = out / f"truth.{file_format}"
    try:
        write_archive(archive_path, readings, form="wide" if form == "wide" else "long")
        rows = write_truth(truth_path, run, model, every=truth_every)
    except ArchiveError as exc:
        raise fail(f"error: {exc}", code=1) from None
    except OSError as exc:
        raise fail(f"error: cannot write into {out}: {exc.strerror or exc}", code=1) from None

    steps = len(run.times) - 1
    typer.echo(
        f"simulated {train.name}: {steps * plan.step / 86400:g} d at {plan.step:g} s "
        f"({steps:,} steps, seed {plan.seed if seed is None else seed}) in {elapsed:.1f} s"
    )
    typer.echo(
        f"wrote {archive_path}: {len(readings):,} readings of "
        f"{_plural(len(readings.names), 'tag')}, {form} form ({_size(archive_path)})"
    )
    typer.echo(f"wrote {truth_path}: {rows:,} rows every {truth_every:g} s ({_size(truth_path)})")


@app.command(
    name="replay",
    help=(
        "Replay an archive (CSV or Parquet, long or wide form) through the estimator; "
        "write the estimates, gated and refused readings, and a report into DIR."
    ),
)
def replay_command(
    archive: Annotated[
        Path,
        typer.Argument(metavar="ARCHIVE", help="Archive file: .csv, .csv.gz or .parquet."),
    ],
    config: Annotated[
        Path, typer.Option("--config", metavar="TRAIN.toml", help="Train configuration file.")
    ],
    out: Annotated[Path, typer.Option("--out", metavar="DIR", help="Folder to write into.")],
    truth: Annotated[
        Path | None,
        typer.Option(
            "--truth", metavar="FILE", help="Truth of a simulated run, to score the estimates."
        ),
    ] = None,
    chunk_hours: Annotated[
        float, typer.Option(help="Hours of arrival time handed to the estimator at once.")
    ] = 24.0,
    quiet: Annotated[bool, typer.Option("--quiet", help="Show no progress bar.")] = False,
    ignore_unknown: Annotated[
        bool,
        typer.Option(
            "--ignore-unknown",
            help="Skip (and count) readings of tags the train does not have, instead of stopping.",
        ),
    ] = False,
) -> None:
    """Replay an archive through the estimator and print its key figures.

    Parameters
    ----------
    archive : pathlib.Path
        The archive (see :func:`service.replay.replay`).
    config : pathlib.Path
        The train's TOML file.
    out : pathlib.Path
        Folder for ``estimates.parquet``/``.csv``, ``gated.csv``, ``steps.csv``, ``alerts.csv``,
        ``refused.csv``, ``summary.json``, ``report.html`` and ``plots/``.
    truth : pathlib.Path, optional
        Truth file (wide: ``time``, ``<vessel>.<species>`` [mol/m^3], ``activity``).
    chunk_hours : float
        Chunk of arrival time per session call [h].
    quiet : bool
        Hide the progress bar.
    ignore_unknown : bool
        Skip readings of unknown tags instead of refusing the archive.

    Raises
    ------
    typer.Exit
        Status 2 for bad input (a missing file, an invalid train, an unreadable
        archive, a missing column, unknown tags), on one line; status 1 when
        writing fails.
    """
    import math

    if not (math.isfinite(chunk_hours) and chunk_hours > 0):
        raise fail(f"error: --chunk-hours must be a positive number of hours, got {chunk_hours}")
    for path in (archive, config, truth):
        if path is not None and not path.is_file():
            what = "is not a file" if path.exists() else "does not exist"
            raise fail(f"error: {path} {what}")

    from estimator.config import load_train_config
    from estimator.errors import ConfigError
    from service.archive import ArchiveError
    from service.replay import replay as run_replay

    try:
        train = load_train_config(config)
    except ConfigError as exc:
        raise fail(_problem_lines(exc)) from None
    try:
        summary = run_replay(
            archive,
            train,
            out,
            truth=truth,
            chunk_seconds=chunk_hours * 3600.0,
            progress=not quiet,
            ignore_unknown=ignore_unknown,
        )
    except ArchiveError as exc:
        raise fail("error: " + " ".join(str(exc).split())) from None
    except OSError as exc:
        raise fail(f"error: cannot write into {out}: {exc.strerror or exc}", code=1) from None
    for line in _replay_lines(summary):
        typer.echo(line)


def _replay_lines(summary: Any) -> list[str]:
    """Return the key figures of a replay (a ``ReplaySummary``), one line each, for people."""
    s = summary

    def nis(name: str, stats: Any) -> str:
        where = "inside" if stats.inside else "OUTSIDE"
        return (
            f"{name}: {stats.mean:.3f} per dof over {stats.dof:,} dof, 95 % interval "
            f"[{stats.low:.3f}, {stats.high:.3f}]: {where}"
        )

    lines = [
        f"replayed {s.train}: {s.readings:,} readings ({s.form} form, ordered by "
        f"{s.ordered_by}), {s.time_steps:,} estimate times in {s.elapsed:.1f} s "
        f"({s.steps_per_second:,.0f}/s)",
        f"archive: {s.unsorted:,} unsorted, {s.duplicates:,} duplicate, "
        f"{s.conflicts:,} conflicting, {s.unknown:,} of unknown tags, {s.refused:,} refused",
        f"gated: {s.gated:,} of {s.measurement_readings:,} analyzer and lab readings "
        f"({100 * s.gated_share:.2f} %); {_plural(s.steps, 'reading')} taken as a step",
    ]
    if s.nis is not None and s.nis.dof:
        lines.append(nis("NIS, all updates", s.nis))
        lines += [nis(f"NIS, {tag}", stats) for tag, stats in s.nis_by_tag.items() if stats.dof]
    if s.accuracy:
        lines.append(
            f"RMSE against the truth after {s.warm_up / 3600:.2f} h warm-up, as a share of "
            f"the mean feed reactant ({s.feed_reactant_mean:.4g} mol/m^3):"
        )
        for a in s.accuracy:
            kind = "measured" if a.measured else "estimated"
            lines.append(
                f"  {a.vessel} {a.species}: {a.rmse:.3g} mol/m^3 ({100 * a.share:.2f} %), {kind}"
            )
    if s.activity_rmse is not None:
        lines.append(
            f"activity: RMSE {s.activity_rmse:.3g}, largest error {s.activity_max_error:.3g}"
        )
    for lab in s.lab:
        lines.append(
            f"lab {lab.tag} ({lab.species} in {lab.vessel}): {lab.count} results, "
            f"RMSE {lab.rmse:.3g} mol/m^3, bias {lab.bias:+.3g} mol/m^3"
        )
    alerts = getattr(s, "alerts", None)
    if alerts is not None:
        rules = ", ".join(f"{rule} {n}" for rule, n in sorted(alerts.by_rule.items()) if n)
        lines.append(
            f"alerts: {alerts.activations} activations ({rules or 'none'}); at most "
            f"{alerts.per_10_min_max} in 10 min, {alerts.chattering} chattering"
        )
    report = s.files.get("report")
    lines.append(f"report: {report}" if report else f"files: {s.out}")
    return lines


@app.command(help="Run the REST service (uvicorn, one worker).")
def serve(
    host: Annotated[str | None, typer.Option(help="Address to listen on.")] = None,
    port: Annotated[int | None, typer.Option(help="TCP port.")] = None,
    train: Annotated[
        list[Path] | None,
        typer.Option(help="Train TOML to register at start if no train of its name exists."),
    ] = None,
) -> None:
    """Run the service until interrupted; checkpoints every train on the way out.

    Refuses to listen on a non-loopback address unless API keys exist.
    """
    from service.settings import SettingsError, UnsafeBinding, check_listen_safety, load_settings

    try:
        overrides: dict[str, Any] = {}
        if host is not None:
            overrides["host"] = host
        if port is not None:
            overrides["port"] = port
        settings = load_settings(**overrides)
    except SettingsError as exc:
        raise fail(f"error: {exc}") from None

    import uvicorn

    from service.app import _open_store, create_app
    from service.migrations import SchemaError

    try:
        store = _open_store(settings)
    except SchemaError as exc:
        raise fail(f"error: {exc}") from None
    keys = any(k.revoked_at is None for k in store.list_api_keys())
    try:
        check_listen_safety(settings, keys_configured=keys)
    except UnsafeBinding as exc:
        store.close()
        raise fail(f"error: {exc}") from None
    for path in train or []:
        _register_train(store, path)
    app_ = create_app(settings, store=store)
    typer.echo(f"stagewatch: API docs at http://{settings.host}:{settings.port}/docs", err=True)
    try:
        uvicorn.run(app_, host=settings.host, port=settings.port, log_level="warning")
    finally:
        store.close()


@app.command(name="live-demo", help="Run the service with the demo train, fed in accelerated time.")
def live_demo(
    port: Annotated[int, typer.Option(help="Loopback TCP port.")] = 8470,
    speed: Annotated[float, typer.Option(help="Archive seconds per wall-clock second.")] = 1800.0,
) -> None:
    """Start the service on 127.0.0.1 and feed it the demo month until Ctrl-C."""
    if not speed > 0:
        raise fail(f"error: --speed must be positive, got {speed}")
    from service.live_demo import run_live_demo

    run_live_demo(port=port, speed=speed)


def _register_train(store: Any, path: Path) -> None:
    """Register a train file unless a train of its name is already stored."""
    from estimator.config import load_train_config
    from estimator.errors import ConfigError

    try:
        config = load_train_config(path)
    except ConfigError as exc:
        raise fail(str(exc)) from None
    if store.get_train(config.name) is None:
        store.create_train(config.name, config.title, config.model_dump_json(), path.read_text())


@app.command(
    help=(
        "Run the historian bridge: read CSV drop folders and OPC UA servers, spool every "
        "reading locally, post them to the service, publish estimates back."
    )
)
def bridge(
    config: Annotated[
        Path, typer.Option("--config", metavar="BRIDGE.toml", help="Bridge configuration file.")
    ],
    once: Annotated[
        bool,
        typer.Option(
            "--once",
            help="Read every source once, drain the spool, exit (for cron): 0 when all was "
            "sent, 1 when readings are left for the next run.",
        ),
    ] = False,
    json_logs: Annotated[bool, typer.Option("--json-logs", help="Log JSON lines.")] = False,
) -> None:
    """Run the bridge until SIGTERM or SIGINT, or once with ``--once``.

    Parameters
    ----------
    config : pathlib.Path
        The bridge's TOML file (see :mod:`service.bridge.config`).
    once : bool
        Read each source once, drain the spool, append write-back once, exit.
    json_logs : bool
        Log JSON lines instead of text lines.

    Raises
    ------
    typer.Exit
        Status 2 for an invalid bridge file (one line per problem) or a setup
        problem (missing key, folder or secret; spool held by another bridge);
        status 1 when a ``--once`` run left readings in the spool.
    """
    if not config.is_file():
        what = "is not a file" if config.exists() else "does not exist"
        raise fail(f"error: {config} {what}")

    from estimator.errors import ConfigError
    from service.bridge.config import load_bridge_config
    from service.bridge.runner import BridgeSetupError, configure_logging, run_bridge

    try:
        settings = load_bridge_config(config)
    except ConfigError as exc:
        raise fail(_problem_lines(exc)) from None
    configure_logging(json_logs)
    try:
        status = run_bridge(settings, once=once)
    except BridgeSetupError as exc:
        raise fail(f"error: {config}: {exc}") from None
    if status:
        raise typer.Exit(status)


def _add_keys_commands() -> None:
    from service.keys_cli import keys_app

    app.add_typer(keys_app, name="keys", help="Create, list and revoke API keys.")


_add_keys_commands()


def _add_db_commands() -> None:
    from service.db_cli import db_app

    app.add_typer(db_app, name="db", help="Show the database schema's revision, or upgrade it.")


_add_db_commands()


def main() -> None:
    """Run the command line (the ``stagewatch`` console script)."""
    app()


if __name__ == "__main__":
    main()
