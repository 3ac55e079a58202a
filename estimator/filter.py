"""Extended Kalman filter for the cascade: compiled step kernels and the event runner.

The filter state is the augmented vector of :mod:`estimator.model` (every species
in every vessel, the activity, the measured feed concentrations and any
inlet-analyzer biases). Between readings the state and covariance are propagated
exactly for held inputs (:mod:`estimator.propagate`); each analyzer or lab reading
is a scalar update (or a vector update for readings of one analyzer taken
together) with

- chi-square innovation gating: a reading whose normalised innovation squared
  exceeds the ``gate_probability`` quantile is rejected, and kept with its value
  and NIS as a gated reading;
- the Joseph-form covariance update ``P = (I - K H) P (I - K H)^T + K R K^T``,
  evaluated in O(n^2) for a scalar H;
- non-negative concentrations, activity and feed states by estimate projection:
  the update is projected on the active bounds in the P^-1 metric;
- a symmetric positive-definite covariance: symmetrised after every update, and
  after every propagation also checked by a Cholesky factorisation (a failure adds
  the smallest diagonal load that restores it). Both are done per event, never at
  the end of a batch, so the state after each event is the same bits however the
  readings were batched, rewound or continued.

Matrices: x (n,), P (n, n), u (1 + N + S,), H a row of ones at the measured state
and its bias, R the reading variance [unit^2], S = H P H^T + R.

The event runner processes a time-ordered log of input changes and measurements in
one compiled call; the Python class :class:`CascadeFilter` keeps that log, keeps
snapshots of (t, x, P, u) and rewinds to the last snapshot before a late reading
(analyzer dead time, lab results, late historian batches), then runs forward
again.

References
----------
Y. Bar-Shalom, X. R. Li, T. Kirubarajan, *Estimation with Applications to Tracking
and Navigation*, Wiley 2001, ch. 5 (consistency) and 10 (the EKF).
D. Simon, "Kalman filtering with state constraints: a survey of linear and
nonlinear algorithms", IET Control Theory & Applications 4(8):1303-1318, 2010
(estimate projection).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from typing import Literal

import numba
import numpy as np
from numpy.typing import ArrayLike
from scipy.stats import chi2

from estimator.model import (
    FP_ACTIVITY,
    IP_ACTIVITY,
    IP_FEED,
    IP_N,
    IP_REACTANT,
    IP_S,
    FloatArray,
    IntArray,
    TrainModel,
    steady_concentrations_into,
)
from estimator.propagate import propagate_into, workspace

#: Feed reactant concentration below which conversion is reported as 0 [mol/m^3].
_LEAST_FEED = 1e-6
#: Largest concentration a reading may report [mol/m^3] (above any liquid's).
_MOST_CONCENTRATED = 1e5

KIND_INPUT = 0
KIND_MEASUREMENT = 1

STATUS_PENDING = -1
STATUS_INPUT = 0
STATUS_ACCEPTED = 1
STATUS_GATED = 2
STATUS_STEP = 3  # accepted as a real step after persistent gating

_MAX_GROUP = 8

# The divergence monitor (run_events' ``monitor``, one row per measurement group and
# a last row for the train). A group's row: faded sums of its capped NIS, of its
# signed normalised innovation and of its degrees of freedom, and the time they were
# faded to. The last row: the start of the current watch, and the time, mean NIS per
# degree of freedom and group of the last re-initialisation (NaN before any).
MON_NIS, MON_Z, MON_DOF, MON_T = range(4)
MON_SINCE, MON_RESET_T, MON_RESET_NIS, MON_RESET_GROUP = range(4)
MON_WIDTH = 4
# Its settings (run_events' ``diverge``): window [s] (0 = off), mean NIS per degree of
# freedom and mean signed normalised innovation above which a group shows the filter
# diverged [-], least faded degrees of freedom [-], and the flow used for the steady
# state when the flow is zero [m^3/s].
DIV_WINDOW, DIV_RATIO, DIV_BIAS, DIV_MIN_DOF, DIV_FLOW = range(5)


@numba.njit(cache=True, error_model="numpy")
def _cholesky_ok(a: FloatArray, low: FloatArray) -> bool:
    """Whether ``a`` has a Cholesky factor (computed into ``low``, (n, n))."""
    n = a.shape[0]
    for j in range(n):
        d = a[j, j]
        for k in range(j):
            d -= low[j, k] * low[j, k]
        if not d > 0.0:
            return False
        low[j, j] = math.sqrt(d)
        for i in range(j + 1, n):
            acc = a[i, j]
            for k in range(j):
                acc -= low[i, k] * low[j, k]
            low[i, j] = acc / low[j, j]
    return True


@numba.njit(cache=True, error_model="numpy")
def ensure_spd(cov: FloatArray) -> int:
    """Symmetrise ``cov`` in place and load its diagonal until it is positive definite.

    Returns the number of diagonal loads applied (0 when P was already fine).
    """
    return ensure_spd_into(cov, np.empty_like(cov))


@numba.njit(cache=True, error_model="numpy")
def symmetrize(cov: FloatArray) -> None:
    """Make ``cov`` exactly symmetric in place: the mean of each off-diagonal pair."""
    n = cov.shape[0]
    for i in range(n):
        for j in range(i + 1, n):
            m = 0.5 * (cov[i, j] + cov[j, i])
            cov[i, j] = m
            cov[j, i] = m


@numba.njit(cache=True, error_model="numpy")
def ensure_spd_into(cov: FloatArray, scratch: FloatArray) -> int:
    """:func:`ensure_spd` with an (n, n) scratch array."""
    n = cov.shape[0]
    symmetrize(cov)
    loads = 0
    scale = 0.0
    for i in range(n):
        scale = max(scale, abs(cov[i, i]))
    scale = max(scale, 1e-300)
    jitter = 1e-14 * scale
    while not _cholesky_ok(cov, scratch) and loads < 40:
        for i in range(n):
            cov[i, i] += jitter
        jitter *= 10.0
        loads += 1
    return loads


@numba.njit(cache=True, error_model="numpy")
def project_bounds(x: FloatArray, cov: FloatArray, lower: IntArray) -> int:
    """Project ``x`` in place onto ``x[j] >= 0`` for every j in ``lower``.

    Estimate projection in the P^-1 metric: for the active set D,
    ``x <- x - P D^T (D P D^T)^-1 D x``, repeated while new bounds become active.
    Returns the number of bounds active at the end. P is left unchanged.
    """
    n_low = lower.shape[0]
    violated = False
    for k in range(n_low):
        violated = violated or x[lower[k]] < 0.0
    if not violated:
        return 0
    active = np.zeros(n_low, dtype=np.bool_)
    n_active = 0
    for _ in range(n_low):
        grew = False
        for k in range(n_low):
            if not active[k] and x[lower[k]] < 0.0:
                active[k] = True
                n_active += 1
                grew = True
        if not grew:
            break
        idx = np.empty(n_active, dtype=np.int64)
        c = 0
        for k in range(n_low):
            if active[k]:
                idx[c] = lower[k]
                c += 1
        dpd = np.empty((n_active, n_active))
        dx = np.empty(n_active)
        for a in range(n_active):
            dx[a] = x[idx[a]]
            for b in range(n_active):
                dpd[a, b] = cov[idx[a], idx[b]]
        lam = np.linalg.solve(dpd, dx)
        for i in range(x.shape[0]):
            acc = 0.0
            for a in range(n_active):
                acc += cov[i, idx[a]] * lam[a]
            x[i] -= acc
        for a in range(n_active):
            x[idx[a]] = 0.0
    for k in range(n_low):
        if x[lower[k]] < 0.0:
            x[lower[k]] = 0.0
    return n_active


@numba.njit(cache=True, error_model="numpy")
def joseph_update(
    x: FloatArray, cov: FloatArray, i_state: int, i_bias: int, z: float, var: float
) -> float:
    """Scalar EKF update in place for ``z = x[i_state] (+ x[i_bias]) + v``, v ~ N(0, var).

    The covariance is updated in Joseph form, ``(I - K H) P (I - K H)^T + K R K^T``,
    computed as ``B = P (I - K H)^T = P - u K^T``, then ``B - K (H B) + R K K^T``
    with ``u = P H^T``: O(n^2) work for a scalar reading. Returns the innovation.
    """
    return joseph_update_into(x, cov, i_state, i_bias, z, var, np.empty(3 * x.shape[0]))


@numba.njit(cache=True, error_model="numpy")
def joseph_update_into(
    x: FloatArray,
    cov: FloatArray,
    i_state: int,
    i_bias: int,
    z: float,
    var: float,
    scratch: FloatArray,
) -> float:
    """:func:`joseph_update` with a scratch array of length 3n."""
    n = x.shape[0]
    u = scratch[:n]
    gain = scratch[n : 2 * n]
    hb = scratch[2 * n : 3 * n]
    for i in range(n):
        u[i] = cov[i, i_state] + (cov[i, i_bias] if i_bias >= 0 else 0.0)
    hph = u[i_state] + (u[i_bias] if i_bias >= 0 else 0.0)
    s = hph + var
    innovation = z - x[i_state] - (x[i_bias] if i_bias >= 0 else 0.0)
    for i in range(n):
        gain[i] = u[i] / s
        x[i] += gain[i] * innovation
    for i in range(n):
        for j in range(n):
            cov[i, j] -= u[i] * gain[j]
    for j in range(n):
        hb[j] = cov[i_state, j] + (cov[i_bias, j] if i_bias >= 0 else 0.0)
    for i in range(n):
        for j in range(n):
            cov[i, j] += -gain[i] * hb[j] + var * gain[i] * gain[j]
    return innovation


@numba.njit(cache=True, error_model="numpy")
def update_group(
    x: FloatArray,
    cov: FloatArray,
    i_state: IntArray,
    i_bias: IntArray,
    z: FloatArray,
    var: FloatArray,
    gate: float,
    lower: IntArray,
    innovations: FloatArray,
) -> tuple[bool, float]:
    """Gate and apply a group of simultaneous readings (an analyzer's vector).

    See :func:`update_group_into`; this form allocates its own scratch.
    """
    scratch = np.empty(3 * x.shape[0])
    return update_group_into(x, cov, i_state, i_bias, z, var, gate, lower, innovations, scratch)


@numba.njit(cache=True, error_model="numpy")
def update_group_into(
    x: FloatArray,
    cov: FloatArray,
    i_state: IntArray,
    i_bias: IntArray,
    z: FloatArray,
    var: FloatArray,
    gate: float,
    lower: IntArray,
    innovations: FloatArray,
    scratch: FloatArray,
) -> tuple[bool, float]:
    """Gate and apply a group of simultaneous readings (an analyzer's vector).

    The joint NIS ``nu^T S^-1 nu`` is compared with ``gate`` (the chi-square
    quantile for len(z) degrees of freedom); if it passes, the readings are applied
    one by one (equivalent to the joint update for independent reading noise), then
    the bounds are projected (the caller keeps P positive definite with
    :func:`ensure_spd` once the readings of a time are done). ``innovations`` gets
    each reading's innovation before the update. Returns (accepted, nis).
    """
    m = z.shape[0]
    if m == 1:
        ia = i_state[0]
        ba = i_bias[0]
        nu0 = z[0] - x[ia] - (x[ba] if ba >= 0 else 0.0)
        s0 = cov[ia, ia] + var[0]
        if ba >= 0:
            s0 += 2.0 * cov[ia, ba] + cov[ba, ba]
        innovations[0] = nu0
        nis = nu0 * nu0 / s0
        if not nis <= gate:
            return False, nis
        joseph_update_into(x, cov, ia, ba, z[0], var[0], scratch)
        project_bounds(x, cov, lower)
        return True, nis
    s = np.empty((m, m))
    nu = np.empty(m)
    for a in range(m):
        ia = i_state[a]
        ba = i_bias[a]
        nu[a] = z[a] - x[ia] - (x[ba] if ba >= 0 else 0.0)
        innovations[a] = nu[a]
        for b in range(m):
            ib = i_state[b]
            bb = i_bias[b]
            v = cov[ia, ib]
            if bb >= 0:
                v += cov[ia, bb]
            if ba >= 0:
                v += cov[ba, ib]
                if bb >= 0:
                    v += cov[ba, bb]
            s[a, b] = v
        s[a, a] += var[a]
    nis = float(nu @ np.linalg.solve(s, nu))
    if not nis <= gate:
        return False, nis
    for a in range(m):
        joseph_update_into(x, cov, i_state[a], i_bias[a], z[a], var[a], scratch)
    project_bounds(x, cov, lower)
    return True, nis


@numba.njit(cache=True, error_model="numpy")
def _widen_for(
    x: FloatArray,
    cov: FloatArray,
    i_state: IntArray,
    i_bias: IntArray,
    z: FloatArray,
    var: FloatArray,
) -> None:
    """Add to each measured state's variance what its reading's innovation exceeds.

    For reading a, ``P[i, i] += max(nu_a^2 - S_aa, 0)``: afterwards each reading of
    the group lies about one sigma from the prediction.
    """
    for a in range(z.shape[0]):
        i = i_state[a]
        b = i_bias[a]
        nu = z[a] - x[i] - (x[b] if b >= 0 else 0.0)
        s = cov[i, i] + var[a]
        if b >= 0:
            s += 2.0 * cov[i, b] + cov[b, b]
        cov[i, i] += max(nu * nu - s, 0.0)


@numba.njit(cache=True, error_model="numpy")
def conversion_into(
    x: FloatArray, cov: FloatArray, u: FloatArray, ip: IntArray, out: FloatArray
) -> None:
    """Each vessel's reactant conversion and its variance, into ``out`` (2N,).

    ``X_i = 1 - C_A,i / C_A,feed`` with the feed concentration from its state (then
    its uncertainty counts) or from the inputs; the variance is ``g^T P g`` for the
    gradient g of X_i (first-order propagation). With no reactant in the feed the
    conversion is undefined and reported as 0 with variance 0 (below
    ``_LEAST_FEED``, 1e-6 mol/m^3, the ratio would only amplify round-off).
    """
    n_vessels = ip[IP_N]
    n_species = ip[IP_S]
    ia = ip[IP_REACTANT]
    i_feed = ip[IP_FEED + ia]
    feed = x[i_feed] if i_feed >= 0 else u[1 + n_vessels + ia]
    for i in range(n_vessels):
        if feed <= _LEAST_FEED:
            out[i] = 0.0
            out[n_vessels + i] = 0.0
            continue
        j = i * n_species + ia
        out[i] = 1.0 - x[j] / feed
        d_c = -1.0 / feed
        var = d_c * d_c * cov[j, j]
        if i_feed >= 0:
            d_f = x[j] / (feed * feed)
            var += 2.0 * d_c * d_f * cov[j, i_feed] + d_f * d_f * cov[i_feed, i_feed]
        out[n_vessels + i] = max(var, 0.0)


@numba.njit(cache=True, error_model="numpy")
def reinitialise(
    x: FloatArray,
    cov: FloatArray,
    u: FloatArray,
    ip: IntArray,
    fp: FloatArray,
    init_var: FloatArray,
    m_bias: IntArray,
    nominal_flow: float,
) -> None:
    """Start the filter again from the model at the inputs held now, in place.

    As at start-up: the vessels at the design model's steady state (design activity,
    the flow held, or ``nominal_flow`` [m^3/s] when it is zero, the temperatures
    held, the feed from its state estimates, else its inputs), the activity at
    design, biases 0 and the covariance ``diag(init_var)``. Feed states keep their
    estimates (clipped at 0): the inlet analyzer reads them directly.
    """
    n_vessels = ip[IP_N]
    n_species = ip[IP_S]
    feed = np.empty(n_species)
    for s in range(n_species):
        i_feed = ip[IP_FEED + s]
        if i_feed >= 0:
            x[i_feed] = max(x[i_feed], 0.0)
            feed[s] = x[i_feed]
        else:
            feed[s] = u[1 + n_vessels + s]
    flow = u[0] if u[0] > 0.0 else nominal_flow
    conc = np.empty(n_vessels * n_species)
    steady_concentrations_into(flow, u[1 : 1 + n_vessels], feed, fp[FP_ACTIVITY], ip, fp, conc)
    x[: n_vessels * n_species] = conc
    if ip[IP_ACTIVITY] >= 0:
        x[ip[IP_ACTIVITY]] = fp[FP_ACTIVITY]
    for j in range(m_bias.shape[0]):
        if m_bias[j] >= 0:
            x[m_bias[j]] = 0.0
    cov[:, :] = 0.0
    for i in range(x.shape[0]):
        cov[i, i] = init_var[i]


@numba.njit(cache=True, error_model="numpy")
def run_events(
    x: FloatArray,
    cov: FloatArray,
    u: FloatArray,
    t: float,
    ev_t: FloatArray,
    ev_kind: IntArray,
    ev_idx: IntArray,
    ev_val: FloatArray,
    start: int,
    stop: int,
    ip: IntArray,
    fp: FloatArray,
    noise: FloatArray,
    m_state: IntArray,
    m_bias: IntArray,
    m_var: FloatArray,
    m_group: IntArray,
    gates: FloatArray,
    lower: IntArray,
    persist: int,
    streak: IntArray,
    init_var: FloatArray,
    diverge: FloatArray,
    monitor: FloatArray,
    snap_every: float,
    snap_last: float,
    ev_status: IntArray,
    ev_nis: FloatArray,
    ev_innov: FloatArray,
    out_t: FloatArray,
    out_x: FloatArray,
    out_var: FloatArray,
    out_conv: FloatArray,
    out_u: FloatArray,
    snap_pos: IntArray,
    snap_t: FloatArray,
    snap_x: FloatArray,
    snap_cov: FloatArray,
    snap_u: FloatArray,
    snap_streak: IntArray,
    snap_monitor: FloatArray,
    out_reset: FloatArray,
) -> tuple[float, int, int, float]:
    """Run the filter over events ``start..stop-1`` of a time-ordered log.

    ``x``, ``cov`` and ``u`` are updated in place. Per event it writes the status,
    NIS and innovation; per distinct event time it writes one output row (time,
    state, variances, each vessel's conversion and its variance, inputs); after a
    time whose events are done, and at least
    ``snap_every`` seconds after the last snapshot, it writes a snapshot whose
    ``snap_pos`` is the index of the next event to run.

    ``streak`` (one per measurement group) counts consecutive gated updates,
    signed by the side of the prediction they fell on. When ``persist`` of them
    fall on one side (``persist`` > 0), the next is taken as a real step: the
    measured states' variances are widened until its NIS is 1 and it is applied
    (status ``STATUS_STEP``). Spikes come alone and stay gated.

    ``monitor`` (see ``MON_*``) watches each measurement group for divergence with
    ``diverge`` (see ``DIV_*``): every update adds its NIS capped at its gate, its
    signed normalised innovation ``sign(nu_0) * sqrt(capped NIS / m)`` (``nu / sqrt(S)``
    for one reading) and its degrees of freedom m to the group's sums, which fade
    with time constant ``diverge[DIV_WINDOW]``. When, after an update, at least a
    window has passed since the start (or the last re-initialisation), the group's
    faded degrees of freedom reach ``diverge[DIV_MIN_DOF]``, its mean NIS per degree
    of freedom exceeds ``diverge[DIV_RATIO]`` and its mean signed innovation exceeds
    ``diverge[DIV_BIAS]`` in size (the readings fall far and on one side), the filter
    is re-initialised from the model (:func:`reinitialise`) once that time's events
    are done, before its output row; the row and every later one carry the time and
    the mean NIS of the last re-initialisation in ``out_reset`` (NaN before any). A
    window of 0 turns this off.

    Returns (time reached, output rows written, snapshots written, last snapshot time).
    """
    n = x.shape[0]
    n_out = 0
    n_snap = 0
    k = start
    ws = workspace(n, ip[IP_N] * ip[IP_S])
    noise_matrix = np.diag(noise)
    scratch = np.empty(3 * n)
    chol = np.empty((n, n))
    grp_state = np.empty(_MAX_GROUP, dtype=np.int64)
    grp_bias = np.empty(_MAX_GROUP, dtype=np.int64)
    grp_z = np.empty(_MAX_GROUP)
    grp_var = np.empty(_MAX_GROUP)
    grp_innov = np.empty(_MAX_GROUP)
    suspect = -1  # a measurement group that shows the filter diverged, at this time
    while k < stop:
        te = ev_t[k]
        if te > t:
            propagate_into(x, cov, u, te - t, ip, fp, noise_matrix, ws)
            ensure_spd_into(cov, chol)
            t = te
        if ev_kind[k] == KIND_INPUT:
            u[ev_idx[k]] = ev_val[k]
            ev_status[k] = STATUS_INPUT
            ev_nis[k] = 0.0
            ev_innov[k] = 0.0
            k += 1
        else:
            group = m_group[ev_idx[k]]
            k2 = k
            while (
                k2 < stop
                and k2 - k < _MAX_GROUP
                and ev_t[k2] == te
                and ev_kind[k2] == KIND_MEASUREMENT
                and m_group[ev_idx[k2]] == group
            ):
                j = ev_idx[k2]
                grp_state[k2 - k] = m_state[j]
                grp_bias[k2 - k] = m_bias[j]
                grp_z[k2 - k] = ev_val[k2]
                grp_var[k2 - k] = m_var[j]
                k2 += 1
            m = k2 - k
            gate = gates[m - 1]
            run = streak[group]
            if persist > 0 and abs(run) >= persist:
                # A step, not a spike: widen the prior so that this reading sits at
                # NIS = 1, then apply it.
                _widen_for(x, cov, grp_state[:m], grp_bias[:m], grp_z[:m], grp_var[:m])
                gate = np.inf
            accepted, nis = update_group_into(
                x,
                cov,
                grp_state[:m],
                grp_bias[:m],
                grp_z[:m],
                grp_var[:m],
                gate,
                lower,
                grp_innov[:m],
                scratch,
            )
            status = STATUS_GATED
            if accepted:
                status = STATUS_STEP if gate == np.inf else STATUS_ACCEPTED
                streak[group] = 0
            else:
                side = 1 if grp_innov[0] > 0.0 else -1
                streak[group] = run + side if run * side > 0 else side
            symmetrize(cov)
            if diverge[DIV_WINDOW] > 0.0:
                row = monitor[group]
                fade = math.exp(-(te - row[MON_T]) / diverge[DIV_WINDOW])
                capped = min(nis, gates[m - 1])
                z = math.sqrt(capped / m)
                row[MON_NIS] = row[MON_NIS] * fade + capped
                row[MON_Z] = row[MON_Z] * fade + (z if grp_innov[0] > 0.0 else -z)
                row[MON_DOF] = row[MON_DOF] * fade + m
                row[MON_T] = te
                if (
                    te - monitor[-1, MON_SINCE] >= diverge[DIV_WINDOW]
                    and row[MON_DOF] >= diverge[DIV_MIN_DOF]
                    and row[MON_NIS] > diverge[DIV_RATIO] * row[MON_DOF]
                    and abs(row[MON_Z]) > diverge[DIV_BIAS] * row[MON_DOF]
                ):
                    suspect = group
            for a in range(m):
                ev_status[k + a] = status
                ev_nis[k + a] = nis
                ev_innov[k + a] = grp_innov[a]
            k = k2
        if k >= stop or ev_t[k] != te:
            if suspect >= 0:
                train = monitor[-1]
                train[MON_SINCE] = te
                train[MON_RESET_T] = te
                train[MON_RESET_NIS] = monitor[suspect, MON_NIS] / monitor[suspect, MON_DOF]
                train[MON_RESET_GROUP] = suspect
                monitor[:-1, :MON_T] = 0.0
                reinitialise(x, cov, u, ip, fp, init_var, m_bias, diverge[DIV_FLOW])
                streak[:] = 0
                suspect = -1
            out_reset[n_out, 0] = monitor[-1, MON_RESET_T]
            out_reset[n_out, 1] = monitor[-1, MON_RESET_NIS]
            out_t[n_out] = te
            for i in range(n):
                out_x[n_out, i] = x[i]
                out_var[n_out, i] = cov[i, i]
            for i in range(u.shape[0]):
                out_u[n_out, i] = u[i]
            conversion_into(x, cov, u, ip, out_conv[n_out])
            n_out += 1
            if te >= snap_last + snap_every and n_snap < snap_pos.shape[0]:
                snap_pos[n_snap] = k
                snap_t[n_snap] = te
                snap_x[n_snap, :] = x
                snap_cov[n_snap, :, :] = cov
                snap_u[n_snap, :] = u
                snap_streak[n_snap, :] = streak
                snap_monitor[n_snap, :, :] = monitor
                n_snap += 1
                snap_last = te
    return t, n_out, n_snap, snap_last


@dataclass(frozen=True)
class MeasurementDef:
    """One measured tag as the filter sees it.

    Attributes
    ----------
    tag : str
        Historian tag.
    state : int
        Index of the measured state.
    bias : int
        Index of its bias state, or -1.
    variance : float
        Reading variance R [(mol/m^3)^2].
    dead_time : float
        Reporting delay [s]: a reading stamped t was sampled at t - dead_time.
    group : int
        Readings of one group at one time are gated and applied together.
    """

    tag: str
    state: int
    bias: int
    variance: float
    dead_time: float
    group: int


@dataclass(frozen=True)
class Refusal:
    """A reading the filter refused, with the reason in words."""

    tag: str
    time: float
    value: float
    reason: str


@dataclass
class FilterRun:
    """What one call of :meth:`CascadeFilter.add_readings` produced.

    ``times`` (k,) [s], ``states`` (k, n) and ``std`` (k, n) are the estimates after
    each distinct event time that was (re)run, oldest first: after a rewind they
    revise earlier outputs from ``rewound_to`` on. ``conversion`` and
    ``conversion_std`` (k, N) are each vessel's reactant conversion [-] and its
    1-sigma; ``inputs`` (k, 1 + N + S) the inputs held at each time.
    ``refused`` lists readings that were not taken. ``events`` holds the (re)run
    span of the event log (see :meth:`CascadeFilter.events`), so a caller can record
    gated readings. ``reset_time`` and ``reset_nis`` (k,) give, at each row, the time
    [s] and the mean NIS per degree of freedom [-] of the last re-initialisation
    after divergence (NaN before any).
    """

    times: FloatArray
    states: FloatArray
    std: FloatArray
    conversion: FloatArray
    conversion_std: FloatArray
    inputs: FloatArray
    refused: list[Refusal] = field(default_factory=list)
    rewound_to: float | None = None
    events: dict[str, np.ndarray] | None = None
    reset_time: FloatArray = field(default_factory=lambda: np.empty(0))
    reset_nis: FloatArray = field(default_factory=lambda: np.empty(0))

    @classmethod
    def empty(cls, model: TrainModel, refused: list[Refusal]) -> FilterRun:
        """Return a run that produced no estimate."""
        n, n_v = model.n_states, model.layout.n_vessels
        return cls(
            np.empty(0),
            np.empty((0, n)),
            np.empty((0, n)),
            np.empty((0, n_v)),
            np.empty((0, n_v)),
            np.empty((0, model.n_inputs)),
            refused,
        )


Backfill = Callable[[float, float], tuple[ArrayLike, ArrayLike, ArrayLike]]
"""``backfill(start, stop)``: every reading the filter has already taken whose
reading time lies in [start, stop] [s since the epoch], as (tag codes, reading
times [s], values [SI]); the service reads them back from its journal."""


class CascadeFilter:
    """EKF for one train with a bounded history for late and out-of-order readings.

    Readings are (tag, time [s], value [SI]). Tags of the flow, the vessel
    temperatures and (with feed model "input") the feed analyzers are inputs, held
    from their time until the next reading; product and feed analyzers of the
    "state" feed model are measurements, applied at their sample time
    (time - dead_time).

    The filter starts once every input tag has been read (or ``start_wait``
    seconds of readings have gathered, using nominal values for inputs still
    unread), at the earliest reading's time, from the design steady state at the
    first inputs, with covariance diag(initial_std^2).

    Memory: the filter keeps snapshots over the whole history horizon, but the
    event log only over ``memory`` seconds when it has a ``backfill`` to read older
    readings back (the service's journal). A reading sampled before that window
    (a lab result hours late) brings the older events back from the snapshot before
    it, and the filter runs forward as it would have with the whole log in memory:
    the numbers are the same. Snapshots older than the window are thinned to one
    every ``far_snapshot_interval`` seconds.

    Parameters
    ----------
    model : TrainModel
        The train's model.
    snapshot_interval : float
        Spacing of the rewind snapshots inside the in-memory window [s].
    start_wait : float
        Longest wait for every input's first reading before starting [s].
    memory : float, optional
        Span of the in-memory event log [s]; at least the largest dead time plus
        two snapshot intervals, at most (and without ``backfill``, always) the
        history horizon.
    backfill : Backfill, optional
        Reads taken readings back, for late readings sampled before the window.
    far_snapshot_interval : float
        Spacing of the snapshots kept before the in-memory window [s].
    """

    def __init__(
        self,
        model: TrainModel,
        *,
        snapshot_interval: float = 60.0,
        start_wait: float = 900.0,
        memory: float | None = None,
        backfill: Backfill | None = None,
        far_snapshot_interval: float = 600.0,
    ) -> None:
        self.model = model
        cfg = model.config
        lay = model.layout
        self.horizon = cfg.estimator.horizon
        self.snapshot_interval = snapshot_interval
        self.start_wait = start_wait
        self.far_snapshot_interval = far_snapshot_interval

        self.inputs: dict[str, int] = {cfg.feed.flow.tag: 0}
        for i, vessel in enumerate(cfg.vessels):
            if not isinstance(vessel.temperature, float):
                self.inputs[vessel.temperature.tag] = 1 + i
        defs: list[MeasurementDef] = []
        self.feed_tags: dict[str, int] = {}
        for s, name in enumerate(cfg.species):
            source = cfg.feed.composition.get(name)
            if source is None or isinstance(source, float):
                continue
            self.feed_tags[source.tag] = s
            if cfg.feed.model == "input":
                self.inputs[source.tag] = 1 + lay.n_vessels + s
            else:
                assert source.std is not None  # enforced by the config checks
                defs.append(
                    MeasurementDef(
                        source.tag,
                        lay.feed[s],
                        lay.bias.get(source.tag, -1),
                        source.std**2,
                        source.dead_time,
                        len(defs),
                    )
                )
        for meas in cfg.measurements:
            state = lay.concentration(
                cfg.vessel_index(meas.location), cfg.species_index(meas.species)
            )
            dead = meas.dead_time if meas.kind == "analyzer" else 0.0
            defs.append(MeasurementDef(meas.tag, state, -1, meas.std**2, dead, len(defs)))
        self.measurements: tuple[MeasurementDef, ...] = tuple(defs)
        self.measurement_index = {d.tag: i for i, d in enumerate(defs)}
        self._max_dead = max((d.dead_time for d in defs), default=0.0)
        self.backfill = backfill
        self.memory = self.horizon
        if memory is not None and backfill is not None:
            floor = self._max_dead + 2.0 * snapshot_interval
            self.memory = min(max(float(memory), floor), self.horizon)

        # Per tag code: event kind and index, dead time, accepted range and its reason.
        limits = self._physical_limits()
        self.tag_names: tuple[str, ...] = tuple(limits)
        self.tag_code = {tag: code for code, tag in enumerate(self.tag_names)}
        info = [self.classify(tag) for tag in self.tag_names]
        self._kind_of = np.array([i[0] for i in info if i is not None], dtype=np.int64)
        self._index_of = np.array([i[1] for i in info if i is not None], dtype=np.int64)
        self._dead_of = np.array([i[2] for i in info if i is not None])
        self._lo_of = np.array([limits[t][0] for t in self.tag_names])
        self._hi_of = np.array([limits[t][1] for t in self.tag_names])
        self._range_reason = [limits[t][2] for t in self.tag_names]
        # Tag code of each (kind, index), to name events.
        pairs = zip(self._kind_of.tolist(), self._index_of.tolist(), strict=True)
        self._code_of_event = {pair: code for code, pair in enumerate(pairs)}

        self._m_state = np.array([d.state for d in defs], dtype=np.int64)
        self._m_bias = np.array([d.bias for d in defs], dtype=np.int64)
        self._m_var = np.array([d.variance for d in defs], dtype=np.float64)
        self._m_group = np.array([d.group for d in defs], dtype=np.int64)
        prob = cfg.estimator.gate_probability
        self._gates = np.array([chi2.ppf(prob, m) for m in range(1, _MAX_GROUP + 1)])
        bounded = list(range(lay.n_concentrations))
        if lay.activity >= 0:
            bounded.append(lay.activity)
        bounded += [i for i in lay.feed if i >= 0]
        self._lower = np.array(sorted(bounded), dtype=np.int64)
        self._init_var = model.initial_std**2
        watch = cfg.estimator.divergence
        self._diverge = np.zeros(5)
        if watch.enabled:
            self._diverge[DIV_WINDOW] = watch.window
            self._diverge[DIV_RATIO] = watch.nis_ratio
            self._diverge[DIV_BIAS] = watch.bias
            self._diverge[DIV_MIN_DOF] = watch.min_dof
        self._diverge[DIV_FLOW] = cfg.feed.flow.nominal

        self.initialized = False
        # Time of the first snapshot ever (the history's start); events at it follow it.
        self._origin = -math.inf
        self._pending = np.empty((0, 4))
        # Event log, sorted by (time, kind, index, value); positions index it.
        self._ev_t = np.empty(0)
        self._ev_kind = np.empty(0, dtype=np.int64)
        self._ev_idx = np.empty(0, dtype=np.int64)
        self._ev_val = np.empty(0)
        self._ev_status = np.empty(0, dtype=np.int64)
        self._ev_nis = np.empty(0)
        self._ev_innov = np.empty(0)
        # Snapshots: position in the log (-1 before the in-memory window), time,
        # state, covariance, inputs, gating streaks.
        self._snap_pos = np.empty(0, dtype=np.int64)
        self._snap_t = np.empty(0)
        self._snap_x = np.empty((0, lay.n))
        self._snap_cov = np.empty((0, lay.n, lay.n))
        self._snap_u = np.empty((0, model.n_inputs))
        self._snap_streak = np.empty((0, len(defs)), dtype=np.int64)
        self._snap_monitor = np.empty((0, len(defs) + 1, MON_WIDTH))
        self._monitor = _fresh_monitor(len(defs), -math.inf)
        self._persist = cfg.estimator.step_persistence
        # The current state below is the state after log positions [0, _live_pos).
        self._live_pos = 0
        self._streak = np.zeros(len(defs), dtype=np.int64)
        # Current state after the whole log.
        self.t = -math.inf
        self.x = np.zeros(lay.n)
        self.cov = np.zeros((lay.n, lay.n))
        self.u = model.nominal_inputs()

    # ------------------------------------------------------------------ readings

    def classify(self, tag: str) -> tuple[int, int, float] | None:
        """(kind, index, dead time [s]) of a tag, or None if the train has no such tag."""
        if tag in self.inputs:
            return KIND_INPUT, self.inputs[tag], 0.0
        j = self.measurement_index.get(tag)
        if j is None:
            return None
        return KIND_MEASUREMENT, j, self.measurements[j].dead_time

    def event_tag(self, kind: int, index: int) -> str:
        """Return the tag of an event in the log (kind and index as in :meth:`events`)."""
        return self.tag_names[self._code_of_event[(int(kind), int(index))]]

    def add_readings(self, tags: Sequence[str], times: ArrayLike, values: ArrayLike) -> FilterRun:
        """Take a batch of readings in any order and bring the estimate up to date.

        Parameters
        ----------
        tags : sequence of str
            Tag of each reading.
        times : array_like of float
            Reading time [s since the epoch]; for an analyzer with dead time, the
            time it reported (the sample was taken dead_time earlier).
        values : array_like of float
            Value in SI units [m^3/s, K, mol/m^3].

        Returns
        -------
        FilterRun
            New and revised estimates, and the refused readings with reasons.
        """
        codes = np.array([self.tag_code.get(tag, -1) for tag in tags], dtype=np.int64)
        return self.add_columns(codes, times, values, names=tags)

    def add_columns(
        self,
        codes: ArrayLike,
        times: ArrayLike,
        values: ArrayLike,
        names: Sequence[str] | None = None,
    ) -> FilterRun:
        """:meth:`add_readings` for tags given as codes (indices into ``tag_names``).

        The vectorised entry for archives and batches: per reading work happens in
        numpy, and Python objects are made only for refused readings. A code of -1
        (or out of range) is an unknown tag; ``names``, when given, names it.
        """
        code = np.asarray(codes, dtype=np.int64)
        t = np.asarray(times, dtype=np.float64)
        v = np.asarray(values, dtype=np.float64)
        take, refused = self.screen(code, t, v, names)
        sample = t - self._dead_of[np.where(take, code, 0)]
        events = np.column_stack(
            [sample[take], self._kind_of[code[take]], self._index_of[code[take]], v[take]]
        ).astype(np.float64)
        if not self.initialized:
            self._pending = np.vstack([self._pending, events])
            if not self._try_start():
                return FilterRun.empty(self.model, refused)
            run = self._run_from(0)
            self._trim()
        else:
            if len(events) == 0:
                return FilterRun.empty(self.model, refused)
            self._extend_back(float(events[:, 0].min()))
            first = self._merge(events)
            if first >= len(self._ev_t):
                return FilterRun.empty(self.model, refused)
            run = self._run_from(first)
            self._trim()
        run.refused = refused
        return run

    def screen(
        self,
        codes: ArrayLike,
        times: ArrayLike,
        values: ArrayLike,
        names: Sequence[str] | None = None,
    ) -> tuple[np.ndarray, list[Refusal]]:
        """Which readings the filter would take now, and why it would refuse the rest.

        Reasons: an unknown tag, a value or time that is not a finite number, a
        value outside the tag's range (or physically impossible: a negative flow,
        a temperature at or below absolute zero), a sample older than the history
        horizon. Nothing changes; the service screens, journals what passes, then
        ingests it.

        Returns
        -------
        take : ndarray of bool, shape (k,)
        refused : list of Refusal
        """
        code = np.asarray(codes, dtype=np.int64)
        t = np.asarray(times, dtype=np.float64)
        v = np.asarray(values, dtype=np.float64)
        if not code.shape == t.shape == v.shape:
            raise ValueError("codes, times and values must have the same length")
        known = (code >= 0) & (code < len(self.tag_names))
        safe = np.where(known, code, 0)
        finite = np.isfinite(t) & np.isfinite(v)
        in_range = (v >= self._lo_of[safe]) & (v <= self._hi_of[safe])
        sample = t - self._dead_of[safe]
        horizon_start = self.t - self.horizon if self.initialized else -math.inf
        history_start = float(self._snap_t[0]) if self._snap_t.size else -math.inf
        fresh = (sample >= horizon_start) & (sample >= history_start)
        take = known & finite & in_range & fresh
        refused: list[Refusal] = []
        if not np.all(take):
            horizon = f"older than the history horizon ({self.horizon / 3600:g} h)"
            for i in np.flatnonzero(~take).tolist():
                name = names[i] if names is not None else (
                    self.tag_names[code[i]] if known[i] else f"code {code[i]}"
                )  # fmt: skip
                if not known[i]:
                    reason = "unknown tag for this train"
                elif not finite[i]:
                    reason = "not a finite number"
                elif not in_range[i]:
                    reason = self._range_reason[code[i]]
                elif sample[i] < horizon_start:
                    reason = horizon
                else:
                    reason = "sampled before the start of this train's history"
                refused.append(Refusal(name, float(t[i]), float(v[i]), reason))
        return take, refused

    # ------------------------------------------------------------------ internals

    def _physical_limits(self) -> dict[str, tuple[float, float, str]]:
        """Per tag, the accepted value range [SI] and the reason given outside it."""
        cfg = self.model.config
        limits: dict[str, tuple[float, float, str]] = {}

        def put(tag: str, lo: float, hi: float, what: str, rng: tuple[float, float] | None) -> None:
            if rng is not None:
                lo, hi = max(lo, rng[0]), min(hi, rng[1])
                what = f"outside the tag's range [{rng[0]:g}, {rng[1]:g}] (SI units)"
            limits[tag] = (lo, hi, what)

        put(cfg.feed.flow.tag, 0.0, math.inf, "a flow cannot be negative", cfg.feed.flow.range)
        for vessel in cfg.vessels:
            if not isinstance(vessel.temperature, float):
                what = "a temperature must be above absolute zero"
                put(vessel.temperature.tag, 1e-6, math.inf, what, vessel.temperature.range)
        # Concentrations: analyzer noise can read a little below zero, not more than
        # ten of its own sigma; and no liquid holds more than 1e5 mol/m^3 (pure
        # water is about 55,000 mol/m^3: 997 kg/m^3 / 0.018 kg/mol).
        top = _MOST_CONCENTRATED

        def concentration(tag: str, std: float | None, rng: tuple[float, float] | None) -> None:
            low = -10.0 * std if std else 0.0
            what = (
                f"not a possible concentration: outside [{low:g}, {top:g}] mol/m^3 (more than "
                "10 sigma of the analyzer's noise below zero, or denser than any liquid)"
            )
            put(tag, low, top, what, rng)

        for source in cfg.feed.composition.values():
            if not isinstance(source, float):
                concentration(source.tag, source.std, source.range)
        for meas in cfg.measurements:
            concentration(meas.tag, meas.std, meas.range)
        return limits

    def _try_start(self) -> bool:
        pending = _sorted_unique(self._pending)
        needed = sorted(self.inputs.values())
        is_input = pending[:, 1] == KIND_INPUT
        seen = set(pending[is_input, 2].astype(int).tolist())
        span = pending[-1, 0] - pending[0, 0] if len(pending) else 0.0
        if len(pending) == 0 or not (set(needed) <= seen or span >= self.start_wait):
            self._pending = pending
            return False
        lay = self.model.layout
        u0 = self.model.nominal_inputs()
        # The first reading of each input (pending is in time order) starts it.
        for idx in needed:
            rows = np.flatnonzero(is_input & (pending[:, 2] == idx))
            if rows.size:
                u0[idx] = pending[rows[0], 3]
        for tag, s in self.feed_tags.items():
            j = self.measurement_index.get(tag)
            if j is None:
                continue
            rows = np.flatnonzero((pending[:, 1] == KIND_MEASUREMENT) & (pending[:, 2] == j))
            if rows.size:  # a first reading a little below zero starts the feed at zero
                u0[1 + lay.n_vessels + s] = max(pending[rows[0], 3], 0.0)
        # History starts one dead time before the first reading, so that analyzer
        # samples taken before it but reported after it are not refused as too old.
        lag = max((d.dead_time for d in self.measurements), default=0.0)
        t0 = float(pending[0, 0]) - lag
        self.x = self.model.steady_state(u0)
        self.cov = np.diag(self._init_var)
        self.u = u0
        self.t = t0
        self._origin = t0
        self._pending = np.empty((0, 4))
        self._set_log(pending)
        self._snap_pos = np.array([0], dtype=np.int64)
        self._snap_t = np.array([t0])
        self._snap_x = self.x[None, :].copy()
        self._snap_cov = self.cov[None, :, :].copy()
        self._snap_u = self.u[None, :].copy()
        self._snap_streak = np.zeros((1, len(self.measurements)), dtype=np.int64)
        self._monitor = _fresh_monitor(len(self.measurements), t0)
        self._snap_monitor = self._monitor[None, :].copy()
        self._live_pos = 0
        self._streak = np.zeros(len(self.measurements), dtype=np.int64)
        self.initialized = True
        return True

    def _set_log(self, events: FloatArray) -> None:
        self._ev_t = events[:, 0].copy()
        self._ev_kind = events[:, 1].astype(np.int64)
        self._ev_idx = events[:, 2].astype(np.int64)
        self._ev_val = events[:, 3].copy()
        self._ev_status = np.full(len(events), STATUS_PENDING, dtype=np.int64)
        self._ev_nis = np.zeros(len(events))
        self._ev_innov = np.zeros(len(events))

    def _merge(self, events: FloatArray) -> int:
        """Insert events into the log in canonical order; return the first changed position."""
        new = _sorted_unique(events)
        n_old = len(self._ev_t)
        if n_old == 0 or tuple(new[0]) > (
            self._ev_t[-1],
            self._ev_kind[-1],
            self._ev_idx[-1],
            self._ev_val[-1],
        ):
            # In-order arrival, the common case: append without re-sorting.
            self._ev_t = np.concatenate([self._ev_t, new[:, 0]])
            self._ev_kind = np.concatenate([self._ev_kind, new[:, 1].astype(np.int64)])
            self._ev_idx = np.concatenate([self._ev_idx, new[:, 2].astype(np.int64)])
            self._ev_val = np.concatenate([self._ev_val, new[:, 3]])
            self._ev_status = np.concatenate(
                [self._ev_status, np.full(len(new), STATUS_PENDING, dtype=np.int64)]
            )
            self._ev_nis = np.concatenate([self._ev_nis, np.zeros(len(new))])
            self._ev_innov = np.concatenate([self._ev_innov, np.zeros(len(new))])
            return n_old
        # Only the log from the earliest new time on is sorted again; before it
        # nothing moves (every new event sorts after it).
        p = int(np.searchsorted(self._ev_t, new[0, 0], side="left"))
        t = np.concatenate([self._ev_t[p:], new[:, 0]])
        kind = np.concatenate([self._ev_kind[p:], new[:, 1].astype(np.int64)])
        idx = np.concatenate([self._ev_idx[p:], new[:, 2].astype(np.int64)])
        val = np.concatenate([self._ev_val[p:], new[:, 3]])
        order = np.lexsort((val, idx, kind, t))
        t, kind, idx, val = t[order], kind[order], idx[order], val[order]
        # Exact repeats (same tag, time and value) are one reading; the stable sort
        # puts the one already in the log first, so it is the one kept.
        keep = np.ones(len(t), dtype=bool)
        same = (t[1:] == t[:-1]) & (kind[1:] == kind[:-1])
        keep[1:] = ~(same & (idx[1:] == idx[:-1]) & (val[1:] == val[:-1]))
        is_new = order >= n_old - p
        first_new = int(np.argmax(is_new & keep)) if np.any(is_new & keep) else len(t)
        status = np.concatenate(
            [self._ev_status[p:], np.full(len(new), STATUS_PENDING, dtype=np.int64)]
        )[order]
        nis = np.concatenate([self._ev_nis[p:], np.zeros(len(new))])[order]
        innov = np.concatenate([self._ev_innov[p:], np.zeros(len(new))])[order]
        self._ev_t = np.concatenate([self._ev_t[:p], t[keep]])
        self._ev_kind = np.concatenate([self._ev_kind[:p], kind[keep]])
        self._ev_idx = np.concatenate([self._ev_idx[:p], idx[keep]])
        self._ev_val = np.concatenate([self._ev_val[:p], val[keep]])
        self._ev_status = np.concatenate([self._ev_status[:p], status[keep]])
        self._ev_nis = np.concatenate([self._ev_nis[:p], nis[keep]])
        self._ev_innov = np.concatenate([self._ev_innov[:p], innov[keep]])
        # Positions before first_new are unchanged (every new event sorts at or after it).
        return p + int(np.count_nonzero(keep[:first_new]))

    def _run_from(self, position: int) -> FilterRun:
        """Run the log from ``position`` to its end.

        When nothing before ``position`` changed since the last run (readings that
        arrive in order), the filter goes on from its current state; otherwise it
        restores the last snapshot at or before ``position`` and runs forward again.
        Both give the same numbers.
        """
        rewound = None
        if position >= self._live_pos:
            start = self._live_pos
            x, cov, u = self.x.copy(), self.cov.copy(), self.u.copy()
            streak = self._streak.copy()
            monitor = self._monitor.copy()
            t = self.t
            keep = len(self._snap_t)
            # A snapshot closes its time (it follows every event at that time): new
            # readings at the time of the last one retire it; the run writes it again.
            while (
                keep > 1
                and start < len(self._ev_t)
                and self._snap_t[keep - 1] >= self._ev_t[start]
                and self._snap_pos[keep - 2] >= 0
            ):
                keep -= 1
            snap_last = float(self._snap_t[keep - 1])
        else:
            s = max(int(np.searchsorted(self._snap_pos, position, side="right")) - 1, 0)
            # Likewise a reading at a snapshot's very time reruns from the one before.
            while (
                s > 0
                and position < len(self._ev_t)
                and self._snap_t[s] >= self._ev_t[position]
                and self._snap_pos[s - 1] >= 0
            ):
                s -= 1
            start = int(self._snap_pos[s])
            if start < len(self._ev_t) and self._snap_t[s] < self.t:
                rewound = float(self._snap_t[s])
            x = self._snap_x[s].copy()
            cov = self._snap_cov[s].copy()
            u = self._snap_u[s].copy()
            streak = self._snap_streak[s].copy()
            monitor = self._snap_monitor[s].copy()
            t = float(self._snap_t[s])
            keep = s + 1
            snap_last = float(self._snap_t[s])
        stop = len(self._ev_t)
        count = stop - start
        n = self.model.n_states
        n_v = self.model.layout.n_vessels
        out_t = np.empty(count)
        out_x = np.empty((count, n))
        out_var = np.empty((count, n))
        out_conv = np.empty((count, 2 * n_v))
        out_u = np.empty((count, self.model.n_inputs))
        span = (self._ev_t[stop - 1] - t) if count else 0.0
        cap = int(span / self.snapshot_interval) + 2 if count else 0
        snap_pos = np.empty(cap, dtype=np.int64)
        snap_t = np.empty(cap)
        snap_x = np.empty((cap, n))
        snap_cov = np.empty((cap, n, n))
        snap_u = np.empty((cap, self.model.n_inputs))
        snap_streak = np.empty((cap, len(self.measurements)), dtype=np.int64)
        snap_monitor = np.empty((cap, *self._monitor.shape))
        out_reset = np.empty((count, 2))
        t, n_out, n_snap, _ = run_events(
            x, cov, u, t,
            self._ev_t, self._ev_kind, self._ev_idx, self._ev_val, start, stop,
            self.model.ip, self.model.fp, self.model.process_noise,
            self._m_state, self._m_bias, self._m_var, self._m_group, self._gates, self._lower,
            self._persist, streak, self._init_var, self._diverge, monitor,
            self.snapshot_interval, snap_last,
            self._ev_status, self._ev_nis, self._ev_innov,
            out_t, out_x, out_var, out_conv, out_u,
            snap_pos, snap_t, snap_x, snap_cov, snap_u, snap_streak, snap_monitor, out_reset,
        )  # fmt: skip
        self._snap_pos = np.concatenate([self._snap_pos[:keep], snap_pos[:n_snap]])
        self._snap_t = np.concatenate([self._snap_t[:keep], snap_t[:n_snap]])
        self._snap_x = np.concatenate([self._snap_x[:keep], snap_x[:n_snap]])
        self._snap_cov = np.concatenate([self._snap_cov[:keep], snap_cov[:n_snap]])
        self._snap_u = np.concatenate([self._snap_u[:keep], snap_u[:n_snap]])
        self._snap_streak = np.concatenate([self._snap_streak[:keep], snap_streak[:n_snap]])
        self._snap_monitor = np.concatenate([self._snap_monitor[:keep], snap_monitor[:n_snap]])
        self.x, self.cov, self.u, self.t = x, cov, u, t
        self._streak = streak
        self._monitor = monitor
        self._live_pos = stop
        return FilterRun(
            out_t[:n_out],
            out_x[:n_out],
            np.sqrt(np.maximum(out_var[:n_out], 0.0)),
            out_conv[:n_out, :n_v],
            np.sqrt(out_conv[:n_out, n_v:]),
            out_u[:n_out],
            [],
            rewound,
            self.events(start, stop),
            out_reset[:n_out, 0],
            out_reset[:n_out, 1],
        )

    def _extend_back(self, earliest: float) -> None:
        """Read back the events a sample at ``earliest`` [s] needs, from before the window.

        The log then starts at the last snapshot before ``earliest``, as it would
        have had it been kept in memory; :meth:`_trim` shortens it again.
        """
        w = self._far_count()
        if w == 0 or earliest > self._snap_t[w]:
            return
        assert self.backfill is not None  # far snapshots exist only with a backfill
        s = max(int(np.searchsorted(self._snap_t, earliest, side="left")) - 1, 0)
        lo, hi = float(self._snap_t[s]), float(self._snap_t[w])
        codes, times, values = self.backfill(lo, hi + self._max_dead)
        code = np.asarray(codes, dtype=np.int64)
        t = np.asarray(times, dtype=np.float64)
        v = np.asarray(values, dtype=np.float64)
        known = (code >= 0) & (code < len(self.tag_names))
        code, t, v = code[known], t[known], v[known]
        sample = t - self._dead_of[code]
        # A snapshot follows every event at its time; the history's first precedes them.
        after = sample >= lo if lo == self._origin else sample > lo
        sel = after & (sample <= hi)
        old = _sorted_unique(
            np.column_stack(
                [sample[sel], self._kind_of[code[sel]], self._index_of[code[sel]], v[sel]]
            ).astype(np.float64)
        )
        k = len(old)
        for j in range(s, w):
            tj = self._snap_t[j]
            side: Literal["left", "right"] = "left" if tj == self._origin else "right"
            self._snap_pos[j] = int(np.searchsorted(old[:, 0], tj, side=side))
        self._snap_pos[w:] += k
        self._live_pos += k
        self._ev_t = np.concatenate([old[:, 0], self._ev_t])
        self._ev_kind = np.concatenate([old[:, 1].astype(np.int64), self._ev_kind])
        self._ev_idx = np.concatenate([old[:, 2].astype(np.int64), self._ev_idx])
        self._ev_val = np.concatenate([old[:, 3], self._ev_val])
        self._ev_status = np.concatenate(
            [np.full(k, STATUS_PENDING, dtype=np.int64), self._ev_status]
        )
        self._ev_nis = np.concatenate([np.zeros(k), self._ev_nis])
        self._ev_innov = np.concatenate([np.zeros(k), self._ev_innov])

    def _far_count(self) -> int:
        """How many snapshots lie before the in-memory event log (position -1)."""
        return int(np.searchsorted(self._snap_pos, 0, side="left"))

    def _trim(self) -> None:
        """Forget what no late reading can need any more.

        Snapshots and events older than the horizon go (one base snapshot stays).
        Events older than the in-memory window go too when the backfill can read
        them back; the snapshots before the window are kept, thinned to one per
        ``far_snapshot_interval``. Amortised: it trims once a quarter of the log or
        half the snapshots can go.
        """
        snap_t = self._snap_t
        base = max(int(np.searchsorted(snap_t, self.t - self.horizon, side="right")) - 1, 0)
        window = int(np.searchsorted(snap_t, self.t - self.memory, side="right")) - 1
        window = max(window, base)
        cut = max(int(self._snap_pos[window]), 0)
        if not (
            (cut > 0 and cut >= len(self._ev_t) // 4) or (base > 0 and base >= len(snap_t) // 2)
        ):
            return
        keep = []
        last = -math.inf
        for j in range(base, len(snap_t)):
            if j < window and j > base and snap_t[j] < last + self.far_snapshot_interval:
                continue  # thinned: a far snapshot close after the one kept
            keep.append(j)
            if j < window:
                last = float(snap_t[j])
        sel = np.array(keep, dtype=np.int64)
        pos = self._snap_pos[sel] - cut
        pos[sel < window] = -1
        self._snap_pos = pos
        self._snap_t = self._snap_t[sel]
        self._snap_x = self._snap_x[sel]
        self._snap_cov = self._snap_cov[sel]
        self._snap_u = self._snap_u[sel]
        self._snap_streak = self._snap_streak[sel]
        self._snap_monitor = self._snap_monitor[sel]
        self._live_pos -= cut
        for name in _LOG:
            setattr(self, name, getattr(self, name)[cut:].copy())

    # ------------------------------------------------------------------ views

    def events(self, start: int = 0, stop: int | None = None) -> dict[str, np.ndarray]:
        """Return the retained event log (or positions start..stop-1) as named arrays.

        Keys: time (sample time [s]), kind (0 input, 1 measurement), index (input
        or measurement index), value [SI], status (see ``STATUS_*``), nis, innovation.
        """
        span = slice(start, stop)
        return {
            "time": self._ev_t[span].copy(),
            "kind": self._ev_kind[span].copy(),
            "index": self._ev_idx[span].copy(),
            "value": self._ev_val[span].copy(),
            "status": self._ev_status[span].copy(),
            "nis": self._ev_nis[span].copy(),
            "innovation": self._ev_innov[span].copy(),
        }

    def std(self) -> FloatArray:
        """1-sigma of every state now, sqrt(diag P) [state units]."""
        return np.sqrt(np.maximum(np.diag(self.cov), 0.0))

    def state_arrays(self) -> dict[str, np.ndarray]:
        """Everything needed to resume exactly: the event log, snapshots and state.

        With :meth:`load_state` on a filter of the same train, the next readings
        give the same estimates as if the filter had never stopped.
        """
        out = {name: np.array(getattr(self, name), copy=True) for name in _STATE}
        out["initialized"] = np.array(self.initialized)
        return out

    def load_state(self, arrays: dict[str, np.ndarray]) -> None:
        """Resume from :meth:`state_arrays` (of a filter of the same train)."""
        missing = [name for name in (*_STATE, "initialized") if name not in arrays]
        if missing:
            raise ValueError(f"filter state lacks {', '.join(missing)}")
        if arrays["x"].shape != (self.model.n_states,):
            raise ValueError("filter state belongs to a train with another state layout")
        for name in _STATE:
            value = np.array(arrays[name], copy=True)
            if name in ("t", "_origin"):
                setattr(self, name, float(value))
            elif name == "_live_pos":
                setattr(self, name, int(value))
            else:
                setattr(self, name, value)
        self.initialized = bool(arrays["initialized"])


_LOG = ("_ev_t", "_ev_kind", "_ev_idx", "_ev_val", "_ev_status", "_ev_nis", "_ev_innov")

_STATE = (
    "t", "x", "cov", "u", "_pending", "_origin",
    "_ev_t", "_ev_kind", "_ev_idx", "_ev_val", "_ev_status", "_ev_nis", "_ev_innov",
    "_snap_pos", "_snap_t", "_snap_x", "_snap_cov", "_snap_u", "_snap_streak",
    "_snap_monitor", "_live_pos", "_streak", "_monitor",
)  # fmt: skip


def _fresh_monitor(groups: int, since: float) -> FloatArray:
    """Return a divergence monitor of ``groups`` groups, empty, watching from ``since`` [s]."""
    monitor = np.zeros((groups + 1, MON_WIDTH))
    monitor[:-1, MON_T] = since
    monitor[-1] = (since, math.nan, math.nan, math.nan)
    return monitor


def _sorted_unique(events: FloatArray) -> FloatArray:
    """Rows (time, kind, index, value) in canonical order, exact repeats dropped."""
    if len(events) == 0:
        return events.reshape(0, 4)
    order = np.lexsort((events[:, 3], events[:, 2], events[:, 1], events[:, 0]))
    ordered = events[order]
    keep = np.ones(len(ordered), dtype=bool)
    keep[1:] = np.any(ordered[1:] != ordered[:-1], axis=1)
    return ordered[keep]


__all__ = [
    "CascadeFilter",
    "FilterRun",
    "MeasurementDef",
    "Refusal",
    "ensure_spd",
    "joseph_update",
    "project_bounds",
    "run_events",
    "update_group",
]
