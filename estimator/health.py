"""What the instruments did during an update: the input of the alert rules' health checks."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import ArrayLike

from estimator.model import FloatArray

if TYPE_CHECKING:
    from estimator.session import SessionOutput, TrainSession

__all__ = ["HealthInput", "empty_rows"]


def empty_rows(columns: int = 0) -> FloatArray:
    """Return an empty array of rows of ``columns`` values (a flat one for 0)."""
    return np.empty((0, columns)) if columns else np.empty(0)


@dataclass(frozen=True)
class HealthInput:
    """What the instruments did during one update, for the health rules.

    Attributes
    ----------
    reading_tags : tuple of str, shape (m,)
        Tag of each reading the session took (refused readings left out).
    reading_times : ndarray, shape (m,)
        Time stamp of each reading [s since the epoch].
    reading_values : ndarray, shape (m,)
        Each reading's value in SI [m^3/s, K, mol/m^3].
    gated_tags : tuple of str, shape (g,)
        Tag of each reading the filter gated (rejected) in the update.
    gated_times : ndarray, shape (g,)
        Their time stamps [s since the epoch].
    nis : ndarray, shape (r, 4)
        (sample time [s], NIS [-], degrees of freedom [-], measurement group) of
        each accepted update, as :attr:`SessionOutput.nis`.

    Notes
    -----
    Pass one with every :meth:`AlertEngine.update` (:meth:`empty` when nothing
    was read): the engine keeps its own windows of what it was given and judges
    staleness by the last reading it knows of. Readings and NIS rows seen again
    after a rewind are counted once.
    """

    reading_tags: tuple[str, ...] = ()
    reading_times: FloatArray = field(default_factory=empty_rows)
    reading_values: FloatArray = field(default_factory=empty_rows)
    gated_tags: tuple[str, ...] = ()
    gated_times: FloatArray = field(default_factory=empty_rows)
    nis: FloatArray = field(default_factory=lambda: empty_rows(4))

    @classmethod
    def empty(cls) -> HealthInput:
        """Return a health input of an update in which nothing was read."""
        return cls()

    @classmethod
    def concat(cls, parts: Sequence[HealthInput]) -> HealthInput:
        """Join the health inputs of successive updates, in order."""
        if len(parts) == 1:
            return parts[0]
        return cls(
            reading_tags=tuple(t for p in parts for t in p.reading_tags),
            reading_times=np.concatenate([empty_rows(), *(p.reading_times for p in parts)]),
            reading_values=np.concatenate([empty_rows(), *(p.reading_values for p in parts)]),
            gated_tags=tuple(t for p in parts for t in p.gated_tags),
            gated_times=np.concatenate([empty_rows(), *(p.gated_times for p in parts)]),
            nis=np.concatenate([empty_rows(4), *(p.nis.reshape(-1, 4) for p in parts)]),
        )

    def to_dict(self) -> dict[str, Any]:
        """Return the input as JSON-safe builtins (for a session checkpoint)."""
        return {
            "reading_tags": list(self.reading_tags),
            "reading_times": self.reading_times.tolist(),
            "reading_values": self.reading_values.tolist(),
            "gated_tags": list(self.gated_tags),
            "gated_times": self.gated_times.tolist(),
            "nis": self.nis.tolist(),
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> HealthInput:
        """Rebuild from :meth:`to_dict` output."""
        return cls(
            reading_tags=tuple(data["reading_tags"]),
            reading_times=np.array(data["reading_times"], dtype=np.float64),
            reading_values=np.array(data["reading_values"], dtype=np.float64),
            gated_tags=tuple(data["gated_tags"]),
            gated_times=np.array(data["gated_times"], dtype=np.float64),
            nis=np.array(data["nis"], dtype=np.float64).reshape(-1, 4),
        )

    @classmethod
    def from_session(
        cls,
        session: TrainSession,
        tags: Sequence[str],
        times: ArrayLike,
        values: ArrayLike,
        output: SessionOutput,
        *,
        si: bool = False,
    ) -> HealthInput:
        """Build the health input of one :meth:`TrainSession.ingest` call.

        Parameters
        ----------
        session : TrainSession
            The session that ingested the readings (for units).
        tags, times, values
            The readings as passed to :meth:`TrainSession.ingest` [tag, s, tag unit].
        output : SessionOutput
            What the call returned.
        si : bool
            Values are already SI (as for ``ingest(..., si=True)``).

        Returns
        -------
        HealthInput
        """
        tag_list = list(tags)
        t = np.asarray(times, dtype=np.float64)
        v = np.asarray(values, dtype=np.float64)
        if not si:
            v = session.to_si(session.codes(tag_list), v)
        refused = {(r.tag, float(r.time)) for r in output.refused}
        keep = [
            i
            for i, tag in enumerate(tag_list)
            if (tag, float(t[i])) not in refused and math.isfinite(float(v[i]))
        ]
        return cls(
            reading_tags=tuple(tag_list[i] for i in keep),
            reading_times=t[keep],
            reading_values=v[keep],
            gated_tags=tuple(g.tag for g in output.gated),
            gated_times=np.array([g.time for g in output.gated], dtype=np.float64),
            nis=np.asarray(output.nis, dtype=np.float64).reshape(-1, 4),
        )
