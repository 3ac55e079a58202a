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


def main() -> None:
    """Run the command line (the ``stagewatch`` console script)."""
    app()
