"""Exceptions and warnings raised by the estimator.

The service maps these to HTTP statuses in one place, so every failure the
estimator can report on purpose is one of the classes below.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

from pydantic_core import PydanticCustomError

__all__ = [
    "ConfigError",
    "ConfigProblem",
    "ConfigProblems",
    "ObservabilityWarning",
    "QuantityError",
    "ReadingRefused",
    "StagewatchError",
    "config_error",
    "join_key",
    "raise_problems",
]


class StagewatchError(Exception):
    """Base class of every error stagewatch raises on purpose."""


@dataclass(frozen=True)
class ConfigProblem:
    """One fault in a train description: where it is and what is wrong.

    Parameters
    ----------
    key : str
        Dotted path to the offending entry, list positions in brackets,
        e.g. ``vessels[1].volume``; ``<file>`` for a file that cannot be read.
    reason : str
        What is wrong, in words an engineer can act on.
    """

    key: str
    reason: str

    def __str__(self) -> str:
        return f"{self.key}: {self.reason}"


class ConfigError(StagewatchError):
    """A train description that cannot be used, with every problem found in it."""

    def __init__(self, problems: Iterable[ConfigProblem], source: str = "train config") -> None:
        self.problems: list[ConfigProblem] = list(problems)
        self.source = source
        super().__init__(self.problems, source)

    def __str__(self) -> str:
        count = len(self.problems)
        noun = "problem" if count == 1 else "problems"
        lines = [f"invalid {self.source} ({count} {noun}):"]
        lines.extend(f"  {problem}" for problem in self.problems)
        return "\n".join(lines)


class QuantityError(StagewatchError, ValueError):
    """A quantity written with a missing, unknown or wrong unit, or a non-finite value."""

    def __init__(self, reason: str, key: str = "") -> None:
        self.reason = reason
        self.key = key
        super().__init__(f"{key}: {reason}" if key else reason)


class ReadingRefused(StagewatchError):
    """A reading the estimator will not use (too old, unknown tag, not finite, ...)."""

    def __init__(self, tag: str, reason: str) -> None:
        self.tag = tag
        self.reason = reason
        super().__init__(tag, reason)

    def __str__(self) -> str:
        return f"reading of tag {self.tag!r} refused: {self.reason}"


class ObservabilityWarning(UserWarning):
    """The configured measurements cannot pin down every estimated state."""


# Helpers of the file parsers (estimator.config, service.bridge.config): a pydantic
# validator reports a fault with :func:`config_error`, or several with
# :func:`raise_problems`, keyed relative to where it runs; the parser turns them into
# :class:`ConfigProblem` rows with :func:`join_key`.


class ConfigProblems(ValueError):
    """Several faults found by one validator, keyed relative to where it runs."""

    def __init__(self, problems: Sequence[tuple[str, str]]) -> None:
        self.problems = list(problems)
        super().__init__("; ".join(f"{key}: {reason}" for key, reason in self.problems))


def raise_problems(problems: Sequence[tuple[str, str]]) -> None:
    """Raise :class:`ConfigProblems` when there is any (key, reason) pair."""
    if problems:
        raise ConfigProblems(problems)


def config_error(reason: str) -> PydanticCustomError:
    """Return a validator's fault in words, shown as given (braces never formatted)."""
    return PydanticCustomError("config", "{reason}", {"reason": reason})


def join_key(key: str, relative: str) -> str:
    """Dotted key of ``relative`` (``"a.b"`` or ``"[2].c"``) under ``key``."""
    if not relative:
        return key
    if not key or relative.startswith("["):
        return key + relative
    return f"{key}.{relative}"
