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
from typing import Annotated

import typer

__all__ = ["app", "main"]

EXIT_INPUT_ERROR = 2

app = typer.Typer(
    name="stagewatch",
    help=(
        "Soft sensor and state estimator for cascades of stirred-tank reactors. "
        "A monitoring aid, not a protection layer."
    ),
    no_args_is_help=True,
    add_completion=False,
)


def _fail(message: str, code: int = EXIT_INPUT_ERROR) -> typer.Exit:
    """Print ``message`` to stderr and build the exit to raise.

    Parameters
    ----------
    message : str
        What went wrong and, where it helps, what to do about it.
    code : int
        Process exit status.

    Returns
    -------
    typer.Exit
        The exception for the caller to raise (``raise _fail(...)``), so that
        type checkers see the command end there.
    """
    typer.echo(message, err=True)
    return typer.Exit(code)


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
        raise _fail("stagewatch is not installed; run `make venv` first", code=1) from None


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
        raise _fail(f"error: {train} {what}")

    from estimator.config import load_train_config
    from estimator.errors import ConfigError

    try:
        config = load_train_config(train)
    except ConfigError as exc:
        raise _fail(str(exc)) from None
    except OSError as exc:
        raise _fail(f"error: cannot read {train}: {exc.strerror or exc}") from None

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
        raise _fail(f"error: --hours must be a positive number of hours, got {hours}")

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
        raise _fail(f"error: --form must be one of {', '.join(_FORMS)}, got {form!r}")
    if file_format not in _FORMATS:
        raise _fail(f"error: --format must be one of {', '.join(_FORMATS)}, got {file_format!r}")
    if days is not None and not (math.isfinite(days) and days > 0):
        raise _fail(f"error: --days must be a positive number of days, got {days}")
    if not (math.isfinite(truth_every) and truth_every > 0):
        raise _fail(f"error: --truth-every must be a positive number of seconds, got {truth_every}")
    for path in (config, scenario):
        if not path.is_file():
            what = "is not a file" if path.exists() else "does not exist"
            raise _fail(f"error: {path} {what}")

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
        raise _fail(_problem_lines(exc)) from None
    if days is not None:
        plan = dataclasses.replace(plan, duration=days * 86400.0)
    model = TrainModel.from_config(train)
    began = time.perf_counter()
    try:
        run = simulate(model, plan, seed=seed)
    except ValueError as exc:
        raise _fail(f"error: {scenario}: {exc}") from None
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
        raise _fail(f"error: {exc}", code=1) from None
    except OSError as exc:
        raise _fail(f"error: cannot write into {out}: {exc.strerror or exc}", code=1) from None

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


def main() -> None:
    """Run the command line (the ``stagewatch`` console script)."""
    app()
