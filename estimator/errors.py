"""Exceptions and warnings raised by the estimator.

The service maps these to HTTP statuses in one place, so every failure the
estimator can report on purpose is one of the classes below.
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

__all__ = [
    "ConfigError",
    "ConfigProblem",
    "FilterDiverged",
    "ObservabilityWarning",
    "QuantityError",
    "ReadingRefused",
    "StagewatchError",
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


class FilterDiverged(StagewatchError):
    """The filter's state or covariance stopped being finite or positive definite."""


class ObservabilityWarning(UserWarning):
    """The configured measurements cannot pin down every estimated state."""
