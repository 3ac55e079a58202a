"""Self-test of tests/conftest.py: under CI=true a skip becomes a failure."""

from __future__ import annotations

from pathlib import Path

import pytest

pytest_plugins = ["pytester"]

CONFTEST = Path(__file__).with_name("conftest.py")

SKIP_IN_TEST = """
import pytest

def test_needs_missing_module():
    pytest.importorskip("module_that_does_not_exist")
"""

SKIP_AT_IMPORT = """
import pytest

pytest.importorskip("module_that_does_not_exist")

def test_never_collected():
    pass
"""

XFAIL = """
import pytest

@pytest.mark.xfail(reason="known gap", strict=True)
def test_known_gap():
    raise AssertionError
"""


@pytest.fixture
def inner(pytester: pytest.Pytester) -> pytest.Pytester:
    pytester.makeconftest(CONFTEST.read_text())
    return pytester


def test_skip_in_test_fails_under_ci(
    inner: pytest.Pytester, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("CI", "true")
    inner.makepyfile(SKIP_IN_TEST)
    result = inner.runpytest_subprocess()
    result.assert_outcomes(failed=1)
    result.stdout.fnmatch_lines(["*skipped under CI=true*module_that_does_not_exist*"])
    assert result.ret == pytest.ExitCode.TESTS_FAILED


def test_skip_in_test_stays_a_skip_without_ci(
    inner: pytest.Pytester, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.delenv("CI", raising=False)
    inner.makepyfile(SKIP_IN_TEST)
    result = inner.runpytest_subprocess()
    result.assert_outcomes(skipped=1)
    assert result.ret == pytest.ExitCode.OK


def test_module_level_skip_fails_under_ci(
    inner: pytest.Pytester, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("CI", "true")
    inner.makepyfile(SKIP_AT_IMPORT)
    result = inner.runpytest_subprocess()
    result.assert_outcomes(errors=1)
    result.stdout.fnmatch_lines(["*skipped under CI=true*module_that_does_not_exist*"])
    assert result.ret != pytest.ExitCode.OK


def test_xfail_is_not_turned_into_a_failure(
    inner: pytest.Pytester, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setenv("CI", "true")
    inner.makepyfile(XFAIL)
    result = inner.runpytest_subprocess()
    result.assert_outcomes(xfailed=1)
    assert result.ret == pytest.ExitCode.OK
