"""What conversion the design model expects of each vessel.

Two expectations, both of the design model (design activity) at the measured
inputs:

- the steady state of the balances at the current flow, temperatures and feed: for
  first order A -> B the product form ``X_n = 1 - prod_{j<=n} 1 / (1 + k_j tau_j)``
  (Levenspiel, *Chemical Reaction Engineering*, 3rd ed., ch. 6; Fogler, *Elements
  of CRE*, 5th ed., sec. 5.3), and for A <=> B the vessel-by-vessel solution of the
  same balances (:func:`design_conversion`, computed for many rows at once);
- the dynamic one (:class:`DesignTwin`): the same balances integrated through the
  measured input history, so after a feed step or a throughput change it moves as
  the vessels do rather than jumping to the new steady state at once.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numba
import numpy as np

from estimator.model import (
    IP_N,
    IP_REACTANT,
    IP_S,
    FloatArray,
    TrainModel,
    steady_concentrations_into,
)
from estimator.propagate import propagate_into, workspace

if TYPE_CHECKING:
    from estimator.session import EstimateBatch


def design_conversion(
    model: TrainModel, inputs: FloatArray, activity: float | None = None
) -> FloatArray:
    """Steady-state reactant conversion after each vessel, for rows of inputs.

    Parameters
    ----------
    model : TrainModel
        The train.
    inputs : ndarray, shape (k, 1 + N + S)
        Rows of [q, T_1..T_N, C_feed_1..C_feed_S] [m^3/s, K, mol/m^3].
    activity : float, optional
        Catalyst activity [-]; the design activity when omitted.

    Returns
    -------
    ndarray, shape (k, N)
        ``1 - C_A,i / C_A,feed`` at steady state [-]; 0 where the feed holds no
        reactant. With no flow a vessel is at its reaction equilibrium.

    Notes
    -----
    Each row is :func:`estimator.model.steady_concentrations` at its inputs (each
    vessel's balances for A and B solved from its inlet).
    """
    a = model.config.estimator.design_activity if activity is None else activity
    u = np.ascontiguousarray(np.atleast_2d(np.asarray(inputs, dtype=np.float64)))
    out = np.empty((len(u), int(model.ip[IP_N])))
    _steady_conversions(u, float(a), model.ip, model.fp, out)
    return out


@numba.njit(cache=True, error_model="numpy")
def _steady_conversions(
    inputs: FloatArray, activity: float, ip: np.ndarray, fp: FloatArray, out: FloatArray
) -> None:
    """Write :func:`design_conversion` of each row of ``inputs`` into ``out`` (k, N)."""
    n_v = ip[IP_N]
    n_s = inputs.shape[1] - 1 - n_v
    ia = ip[IP_REACTANT]
    conc = np.empty(n_v * n_s)
    for r in range(inputs.shape[0]):
        u = inputs[r]
        steady_concentrations_into(u[0], u[1 : 1 + n_v], u[1 + n_v :], activity, ip, fp, conc)
        feed = u[1 + n_v + ia]
        for i in range(n_v):
            out[r, i] = 1.0 - conc[i * n_s + ia] / feed if feed > 0.0 else 0.0


def feed_inputs(model: TrainModel, inputs: FloatArray, states: FloatArray) -> FloatArray:
    """Input rows with each feed species that is a filter state set to its estimate.

    The filter holds measured feed concentrations as states (feed model "state");
    their input columns then keep the nominal value, so the expectation must take
    the estimate instead.
    """
    u = np.array(inputs, dtype=np.float64, copy=True)
    n_vessels = int(model.ip[IP_N])
    for s, idx in enumerate(model.layout.feed):
        if idx >= 0:
            u[:, 1 + n_vessels + s] = states[:, idx]
    return u


@numba.njit(cache=True, error_model="numpy")
def _twin_run(
    x: FloatArray,
    t: float,
    u: FloatArray,
    times: FloatArray,
    inputs: FloatArray,
    feed_state: np.ndarray,
    activity_state: int,
    activity: float,
    ip: np.ndarray,
    fp: FloatArray,
    out: FloatArray,
) -> float:
    """Integrate the design model row by row; write each row's concentrations.

    Between rows the inputs of the earlier row are held (as in the filter). At each
    row the feed states take the row's feed and the activity the design value.
    Returns the time reached [s]; ``x`` and ``u`` are updated in place.
    """
    n = x.shape[0]
    n_v = ip[IP_N]
    ws = workspace(n, n_v * ip[IP_S])
    cov = np.zeros((n, n))
    noise = np.zeros((n, n))
    for k in range(times.shape[0]):
        dt = times[k] - t
        if dt > 0.0:
            propagate_into(x, cov, u, dt, ip, fp, noise, ws)
            for i in range(n):
                for j in range(n):
                    cov[i, j] = 0.0
            t = times[k]
        for c in range(u.shape[0]):
            u[c] = inputs[k, c]
        for s in range(feed_state.shape[0]):
            if feed_state[s] >= 0:
                x[feed_state[s]] = inputs[k, 1 + n_v + s]
        if activity_state >= 0:
            x[activity_state] = activity
        for c in range(out.shape[1]):
            out[k, c] = x[c]
    return t


@dataclass(frozen=True)
class TwinMark:
    """A :class:`DesignTwin`'s state at one time: x (n,) or None, t [s], u (1 + N + S,)."""

    x: FloatArray | None
    t: float
    u: FloatArray

    def to_dict(self) -> dict[str, Any]:
        """Return the mark as JSON-safe builtins (for checkpoints)."""
        return {
            "x": None if self.x is None else self.x.tolist(),
            "t": self.t if np.isfinite(self.t) else None,
            "u": self.u.tolist(),
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> TwinMark:
        """Rebuild a mark from :meth:`to_dict` output."""
        x, t = data["x"], data["t"]
        return cls(
            None if x is None else np.array(x, dtype=np.float64),
            -np.inf if t is None else float(t),
            np.array(data["u"], dtype=np.float64),
        )


class DesignTwin:
    """The design model run alongside the filter: the dynamic expectation.

    Fed the filter's estimate rows in time order (each row's inputs: flow,
    temperatures, and the feed as estimated), it integrates the balances exactly
    between rows with the design activity and returns every vessel's reactant
    conversion, ``1 - C_A,i / C_A,feed``. It starts at the steady state of its
    first row's inputs. An :data:`~estimator.alerts.ExpectedConversion`: the alert
    engine calls it with each update's new rows.
    """

    def __init__(self, model: TrainModel) -> None:
        self.model = model
        lay = model.layout
        self.x: FloatArray | None = None
        self.t = -np.inf
        self.u = model.nominal_inputs()
        self._feed_state = np.array(lay.feed, dtype=np.int64)
        self._activity = float(model.config.estimator.design_activity)

    def __call__(self, estimates: EstimateBatch) -> FloatArray:
        """Return the expected conversion of each vessel at each row [-], shape (k, N)."""
        return self.run(estimates.time, estimates.inputs)

    def run(self, times: FloatArray, inputs: FloatArray) -> FloatArray:
        """Advance through rows (times [s], inputs (k, 1 + N + S) SI); conversions (k, N)."""
        model, lay = self.model, self.model.layout
        times = np.ascontiguousarray(times, dtype=np.float64)
        inputs = np.ascontiguousarray(inputs, dtype=np.float64).reshape(len(times), model.n_inputs)
        keep = times > self.t  # rows already passed are not run again
        times, inputs = times[keep], inputs[keep]
        n_v, n_s = lay.n_vessels, lay.n_species
        out = np.full((int(keep.size), n_v), np.nan)
        if len(times) == 0:
            return out
        if self.x is None:
            self.x = model.steady_state(inputs[0], activity=self._activity)
            self.t = float(times[0])
            self.u = inputs[0].copy()
        conc = np.empty((len(times), lay.n_concentrations))
        self.t = _twin_run(
            self.x, self.t, self.u, times, inputs, self._feed_state,
            lay.activity, self._activity, model.ip, model.fp, conc,
        )  # fmt: skip
        ia = int(model.ip[IP_REACTANT])
        c_a = conc.reshape(len(times), n_v, n_s)[:, :, ia]
        feed_a = inputs[:, 1 + n_v + ia][:, None]
        with np.errstate(divide="ignore", invalid="ignore"):
            out[keep] = np.where(feed_a > 0.0, 1.0 - c_a / feed_a, 0.0)
        return out

    def mark(self) -> TwinMark:
        """Return where the twin is now, to :meth:`resume` from after a revision."""
        return TwinMark(None if self.x is None else self.x.copy(), self.t, self.u.copy())

    def resume(self, mark: TwinMark | None) -> None:
        """Go back to a :meth:`mark` (None: to the start, before any row)."""
        if mark is None:
            self.x, self.t, self.u = None, -np.inf, self.model.nominal_inputs()
            return
        self.x = None if mark.x is None else mark.x.copy()
        self.t = mark.t
        self.u = mark.u.copy()

    def state_dict(self) -> dict[str, Any]:
        """Return the twin's state as JSON-safe builtins (for checkpoints)."""
        return self.mark().to_dict()

    def load(self, data: dict[str, Any]) -> None:
        """Resume from :meth:`state_dict` output (of a twin of the same train)."""
        mark = TwinMark.from_dict(data)
        if mark.x is not None and mark.x.shape != (self.model.layout.n,):
            raise ValueError("design twin state of another state layout")
        self.resume(mark)
