"""Suite-wide pytest set-up.

Two jobs:

- Point stagewatch's cache root (numba's on-disk cache lives below it, in a folder
  keyed on the estimator's sources) at ``<repo>/.cache`` unless the caller chose
  one, so ``pytest`` run directly works as well as ``make test``.
- Under ``CI=true``, turn every skipped test into a failure. A test skipped on the
  CI machine is almost always a dependency that failed to install (an
  ``importorskip``, a missing Debian package), and a green run that quietly
  checked less is worse than a red one. Expected failures (``xfail``) are left
  alone: they are not skips.
"""

from __future__ import annotations

import os
from collections.abc import Generator
from pathlib import Path

import pytest

REPO_ROOT = Path(__file__).resolve().parent.parent

# Before any test module imports the estimator, which sets NUMBA_CACHE_DIR from it.
os.environ.setdefault("STAGEWATCH_CACHE_DIR", str(REPO_ROOT / ".cache"))


def _strict_ci() -> bool:
    """Whether skips must count as failures (the variable is read per report)."""
    return os.environ.get("CI") == "true"


def _skip_reason(longrepr: object) -> str:
    """The reason text of a skip report, whatever shape pytest stored it in."""
    # Skips are stored as (path, lineno, "Skipped: <reason>").
    if isinstance(longrepr, tuple) and len(longrepr) == 3:
        return str(longrepr[2]).removeprefix("Skipped: ")
    return str(longrepr)


def _failure_text(longrepr: object) -> str:
    return (
        f"skipped under CI=true, which counts as a failure: {_skip_reason(longrepr)}\n"
        "Install the missing dependency (pip extra or scripts/system-deps.sh) "
        "rather than letting CI check less than it claims."
    )


@pytest.hookimpl(wrapper=True)
def pytest_runtest_makereport(
    item: pytest.Item, call: pytest.CallInfo[None]
) -> Generator[None, pytest.TestReport, pytest.TestReport]:
    """Fail, under CI=true, a test that was skipped in setup, call or teardown."""
    report = yield
    if _strict_ci() and report.skipped and not hasattr(report, "wasxfail"):
        report.outcome = "failed"
        report.longrepr = _failure_text(report.longrepr)
    return report


@pytest.hookimpl(wrapper=True)
def pytest_make_collect_report(
    collector: pytest.Collector,
) -> Generator[None, pytest.CollectReport, pytest.CollectReport]:
    """Fail, under CI=true, a module skipped at import (module-level importorskip)."""
    report = yield
    if _strict_ci() and report.skipped:
        report.outcome = "failed"
        report.longrepr = _failure_text(report.longrepr)
    return report
