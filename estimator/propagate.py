"""Propagation of state and covariance over an interval with inputs held constant.

Over an interval of length dt the flow, temperatures and input feed concentrations
are held, and so are the random-walk states (activity, feed, biases). The
concentration balances are then linear, ``dC/dt = L(a) C + B f + c``, and the
interval has an exact solution through the matrix exponential. One series gives,
for the Jacobian J at the start of the interval,

- ``Phi = exp(J dt)``: the transition matrix of the linearised filter, whose
  concentration block is the exact ``exp(L dt)``;
- ``g = int_0^dt exp(J s) ds c``: the response to the constant feed forcing;
- ``Qd = int_0^dt exp(J s) W exp(J s)^T ds``: the process noise accumulated from
  the continuous intensity W (Van Loan's integral), so the tuning does not depend
  on the sample interval.

Method: scaling and squaring. The interval is halved until ``||J h||_1 <= 1/4``;
``exp(J_aug h)`` and the noise integral are summed as Taylor series until the next
term is below round-off; then ``s`` doublings ``Q <- Phi Q Phi^T + Q``,
``Phi <- Phi Phi`` recover the whole interval. Every step is a product of
non-negative-definite quantities, so nothing overflows for stiff trains or day-long
gaps (the block form of Van Loan's method would need ``exp(-J dt)``, which does).

References
----------
C. F. Van Loan, "Computing integrals involving the matrix exponential", IEEE Trans.
Automatic Control 23(3):395-404, 1978.
N. J. Higham, "The scaling and squaring method for the matrix exponential
revisited", SIAM J. Matrix Anal. Appl. 26(4):1179-1193, 2005.
"""

from __future__ import annotations

import numba
import numpy as np

from estimator.model import (
    IP_ACTIVITY,
    IP_N,
    IP_S,
    FloatArray,
    IntArray,
    affine_input_into,
    jacobian_into,
)

# Largest ||A||_1 at which the Pade approximants r_3 and r_5 are exact to double
# precision (Higham 2005, Table 2.3).
_THETA_3 = 1.495585217958292e-2
_THETA_5 = 2.539398330063230e-1
# The process noise is a tuning quantity: 1e-8 relative is far below its own accuracy.
_TINY_NOISE = 2.0**-27
_MAX_TERMS = 40

Workspace = tuple[
    FloatArray, FloatArray, FloatArray, FloatArray, FloatArray, FloatArray, FloatArray,
    FloatArray, IntArray, IntArray, IntArray,
    FloatArray, FloatArray, FloatArray, FloatArray, FloatArray, FloatArray, FloatArray,
]  # fmt: skip


@numba.njit(cache=True, error_model="numpy")
def workspace(n: int, n_dyn: int) -> Workspace:
    """Scratch arrays for :func:`discretize_into` and :func:`propagate_into`.

    The filter loop allocates them once and reuses them at every step (2-D views
    cut from one buffer cost more than the arithmetic of a small step).
    Order: A, E, A^2, A^4, V, Q, Y, the non-zeros' values, rows, columns and
    dynamic-column positions; then J, Phi, Qd, a product, the forcing, g and x.
    """
    m = n + 1
    return (
        np.zeros((n_dyn, m)),
        np.zeros((m, m)),
        np.zeros((n_dyn, m)),
        np.zeros((n_dyn, m)),
        np.zeros((n, n)),
        np.zeros((n, n)),
        np.zeros((n_dyn, n)),
        np.zeros(n_dyn * n),
        np.zeros(n_dyn * n, dtype=np.int64),
        np.zeros(n_dyn * n, dtype=np.int64),
        np.zeros(n_dyn * n, dtype=np.int64),
        np.zeros((n, n)),
        np.zeros((n, n)),
        np.zeros((n, n)),
        np.zeros((n, n)),
        np.zeros(n),
        np.zeros(n),
        np.zeros(n),
    )


@numba.njit(cache=True, error_model="numpy")
def _norm1(a: FloatArray, rows: int, cols: int) -> float:
    best = 0.0
    for j in range(cols):
        col = 0.0
        for i in range(rows):
            col += abs(a[i, j])
        best = max(best, col)
    return best


@numba.njit(cache=True, error_model="numpy")
def _noise_term(
    nz_i: IntArray,
    nz_r: IntArray,
    nz_v: FloatArray,
    count: int,
    v: FloatArray,
    y: FloatArray,
    q: FloatArray,
    k: int,
    h: float,
    n_dyn: int,
) -> float:
    """Add the k-th term of the noise integral to ``q``; return its largest entry.

    ``V_k = (J h V_{k-1} + V_{k-1} (J h)^T) / k`` (``v`` updated in place) and
    ``Q += V_k h / (k + 1)``. ``J h`` is given by its first ``count`` non-zeros
    (row, column, value), all in the first ``n_dyn`` rows.
    """
    n = v.shape[0]
    for i in range(n_dyn):
        for j in range(n):
            y[i, j] = 0.0
    for t in range(count):
        i = nz_i[t]
        r = nz_r[t]
        val = nz_v[t]
        for j in range(n):
            y[i, j] += val * v[r, j]
    # V_k = (Y + Y^T) / k with Y's rows beyond n_dyn zero, so V_k's random-walk
    # block stays zero; Q is accumulated on its lower triangle only.
    inv_k = 1.0 / k
    scale = h / (k + 1)
    size = 0.0
    for i in range(n_dyn):
        for j in range(i + 1):
            s = (y[i, j] + y[j, i]) * inv_k
            v[i, j] = s
            v[j, i] = s
            q[i, j] += s * scale
            size = max(size, abs(s))
    for i in range(n_dyn, n):
        for j in range(n_dyn):
            s = y[j, i] * inv_k
            v[i, j] = s
            v[j, i] = s
            q[i, j] += s * scale
            size = max(size, abs(s))
        for j in range(n_dyn, i + 1):
            v[i, j] = 0.0
            v[j, i] = 0.0
    return size * scale


@numba.njit(cache=True, error_model="numpy")
def _sparse_product(
    nz_i: IntArray, nz_r: IntArray, nz_v: FloatArray, dyn: IntArray, count_dyn: int,
    x: FloatArray, out: FloatArray,
) -> None:  # fmt: skip
    """``out = A x`` for the augmented A given by its dynamic-column non-zeros.

    ``x`` and ``out`` hold the first ``n_dyn`` rows (A's other rows are zero, so
    only x's first n_dyn rows meet a non-zero).
    """
    for i in range(out.shape[0]):
        for j in range(out.shape[1]):
            out[i, j] = 0.0
    for td in range(count_dyn):
        t = dyn[td]
        i = nz_i[t]
        r = nz_r[t]
        val = nz_v[t]
        for j in range(out.shape[1]):
            out[i, j] += val * x[r, j]


@numba.njit(cache=True, error_model="numpy")
def discretize_into(
    jac: FloatArray,
    forcing: FloatArray,
    noise: FloatArray,
    dt: float,
    n_dyn: int,
    phi: FloatArray,
    g: FloatArray,
    qd: FloatArray,
    ws: Workspace,
) -> None:
    """:func:`discretize` into ``phi`` (n, n), ``g`` (n,) and ``qd`` (n, n).

    ``ws`` comes from :func:`workspace`; its first eleven arrays are used here.
    """
    n = jac.shape[0]
    m = n + 1
    # Only the dynamic block sets how fast the series converge and how good the Pade
    # approximant is: the other columns (activity, feed, forcing) have zero rows
    # below them, so they are carried along by the block's powers.
    norm = _norm1(jac, n_dyn, n_dyn) * dt
    squarings = 0
    if norm > _THETA_5:
        squarings = int(np.ceil(np.log2(norm / _THETA_5)))
    h = dt / 2.0**squarings
    norm_h = norm / 2.0**squarings

    a, e, p2, p4, v, q, y, nz_v, nz_i, nz_r, dyn = ws[:11]

    # Augmented A = [J c; 0 0] h; rows at and beyond n_dyn are zero. Its non-zeros
    # are listed once; products with A need only those in the dynamic columns.
    count = 0
    count_dyn = 0
    for i in range(n_dyn):
        for j in range(m):
            val = (jac[i, j] if j < n else forcing[i]) * h
            a[i, j] = val
            if val != 0.0 and j < n:
                nz_i[count] = i
                nz_r[count] = j
                nz_v[count] = val
                if j < n_dyn:
                    dyn[count_dyn] = count
                    count_dyn += 1
                count += 1

    # exp(A) by the diagonal Pade approximant r_3 or r_5, whichever is exact to
    # double precision at this norm (Higham 2005, Table 2.3): r = (V - U)^-1 (V + U)
    # with U the odd and V the even part of the numerator polynomial.
    _sparse_product(nz_i, nz_r, nz_v, dyn, count_dyn, a, p2)  # A^2
    if norm_h <= _THETA_3:
        b0, b1, b2, b3 = 120.0, 60.0, 12.0, 1.0
        _sparse_product(nz_i, nz_r, nz_v, dyn, count_dyn, p2, p4)  # A^3
        for i in range(n_dyn):
            for j in range(m):
                u_ij = b3 * p4[i, j] + b1 * a[i, j]
                v_ij = b2 * p2[i, j]
                e[i, j] = v_ij - u_ij  # D = V - U, first rows (b0 I added below)
                p4[i, j] = v_ij + u_ij  # N = V + U, first rows
    else:
        b0, b1, b2, b3, b4, b5 = 30240.0, 15120.0, 3360.0, 420.0, 30.0, 1.0
        for i in range(n_dyn):
            for j in range(m):
                acc = 0.0
                for r in range(n_dyn):
                    acc += p2[i, r] * p2[r, j]
                p4[i, j] = acc  # A^4
        # U = A (b5 A^4 + b3 A^2 + b1 I), V = b4 A^4 + b2 A^2 + b0 I
        for i in range(n_dyn):
            for j in range(m):
                y_ij = b5 * p4[i, j] + b3 * p2[i, j]
                p2[i, j] = b4 * p4[i, j] + b2 * p2[i, j]  # V without b0 I
                p4[i, j] = y_ij
        _sparse_product(nz_i, nz_r, nz_v, dyn, count_dyn, p4, e)  # rows >= n_dyn zeroed
        for i in range(n_dyn):
            for j in range(m):
                u_ij = e[i, j] + b1 * a[i, j]
                v_ij = p2[i, j]
                e[i, j] = v_ij - u_ij
                p4[i, j] = v_ij + u_ij
    for i in range(n_dyn):
        e[i, i] += b0
        p4[i, i] += b0
    # D X = N. D's and N's rows beyond n_dyn are b0 times the identity's, so X's
    # are the identity's, and the first rows solve D11 X1 = N1 - D12 I by LU on
    # D11 = b0 I - b1 A11 + ..., diagonally dominant for ||A|| <= 0.26: no pivoting.
    for i in range(n_dyn):
        for j in range(n_dyn, m):
            p4[i, j] -= e[i, j]
    for col in range(n_dyn):
        piv = e[col, col]
        for i in range(col + 1, n_dyn):
            f = e[i, col] / piv
            if f != 0.0:
                for j in range(col, n_dyn):
                    e[i, j] -= f * e[col, j]
                for j in range(m):
                    p4[i, j] -= f * p4[col, j]
    for i in range(n_dyn - 1, -1, -1):
        for j in range(m):
            acc = p4[i, j]
            for r in range(i + 1, n_dyn):
                acc -= e[i, r] * p4[r, j]
            p4[i, j] = acc / e[i, i]
    for i in range(m):
        for j in range(m):
            e[i, j] = p4[i, j] if i < n_dyn else (1.0 if i == j else 0.0)

    # The noise integral as a series: its terms shrink by 2 ||A|| / k.
    q_scale = 0.0
    for i in range(n):
        for j in range(n):
            v[i, j] = noise[i, j]
            q[i, j] = noise[i, j] * h
            q_scale = max(q_scale, abs(q[i, j]))
    if q_scale > 0.0:
        for k in range(1, _MAX_TERMS):
            size = _noise_term(nz_i, nz_r, nz_v, count, v, y, q, k, h, n_dyn)
            if size <= _TINY_NOISE * q_scale:
                break

    for i in range(n):
        for j in range(i):
            q[j, i] = q[i, j]
    if squarings > 0:
        # Long or stiff intervals: allocating products are fine on this path.
        ee = e.copy()
        qq = q.copy()
        for _ in range(squarings):
            p = np.ascontiguousarray(ee[:n, :n])
            qq = p @ qq @ p.T + qq
            ee = ee @ ee
        e[:, :] = ee
        q[:, :] = qq
    for i in range(n):
        g[i] = e[i, n]
        for j in range(n):
            phi[i, j] = e[i, j]
        for j in range(i + 1):
            qd[i, j] = q[i, j]
            qd[j, i] = q[i, j]


@numba.njit(cache=True, error_model="numpy")
def discretize(
    jac: FloatArray, forcing: FloatArray, noise: FloatArray, dt: float, n_dyn: int
) -> tuple[FloatArray, FloatArray, FloatArray]:
    """Discrete transition, forcing response and process noise over ``dt``.

    Parameters
    ----------
    jac : ndarray, shape (n, n)
        Jacobian J [1/s]; only its first ``n_dyn`` rows may be non-zero.
    forcing : ndarray, shape (n,)
        Constant forcing c [state unit/s]; zero beyond ``n_dyn``.
    noise : ndarray, shape (n, n)
        Continuous process-noise intensity W [state unit^2/s], symmetric.
    dt : float
        Interval [s], > 0.
    n_dyn : int
        Number of leading rows with dynamics (the concentration states).

    Returns
    -------
    phi : ndarray, shape (n, n)
        exp(J dt), to round-off.
    g : ndarray, shape (n,)
        int_0^dt exp(J s) ds c [state unit].
    qd : ndarray, shape (n, n)
        int_0^dt exp(J s) W exp(J s)^T ds [state unit^2], to 1e-8 relative.
    """
    n = jac.shape[0]
    phi = np.empty((n, n))
    g = np.empty(n)
    qd = np.empty((n, n))
    discretize_into(jac, forcing, noise, dt, n_dyn, phi, g, qd, workspace(n, n_dyn))
    return phi, g, qd


@numba.njit(cache=True, error_model="numpy")
def _covariance_into(
    phi: FloatArray, cov: FloatArray, qd: FloatArray, n_dyn: int, tmp: FloatArray
) -> None:
    """``cov <- Phi P Phi^T + Qd`` for a Phi whose rows beyond ``n_dyn`` are the identity's.

    Random-walk states have identity rows in Phi, so only the first ``n_dyn`` rows of
    ``Phi P`` need a product; the result is symmetric by construction.
    """
    n = cov.shape[0]
    for i in range(n):
        for j in range(n):
            tmp[i, j] = cov[i, j]  # rows >= n_dyn of Phi P are rows of P
    for i in range(n_dyn):
        for j in range(n):
            tmp[i, j] = 0.0
        for r in range(n):
            pir = phi[i, r]
            if pir != 0.0:
                for j in range(n):
                    tmp[i, j] += pir * cov[r, j]
    for i in range(n):
        for j in range(i + 1):
            if j >= n_dyn:
                acc = tmp[i, j]
            else:
                acc = 0.0
                for r in range(n):
                    acc += tmp[i, r] * phi[j, r]
            cov[i, j] = acc + qd[i, j]
            cov[j, i] = cov[i, j]


@numba.njit(cache=True, error_model="numpy")
def _advance_into(
    x: FloatArray, phi: FloatArray, g: FloatArray, ip: IntArray, out: FloatArray
) -> None:
    """Exact state at the end of the interval from the discretisation, into ``out``.

    The concentrations are ``exp(L dt) C + (feed-state columns of Phi) f + g``; the
    activity column of Phi (a linearisation) is not used, because the activity enters
    the exact solution through L. Random-walk states keep their value.
    """
    n_dyn = ip[IP_N] * ip[IP_S]
    i_act = ip[IP_ACTIVITY]
    for i in range(x.shape[0]):
        out[i] = x[i]
    for i in range(n_dyn):
        acc = g[i]
        for j in range(x.shape[0]):
            if j != i_act:
                acc += phi[i, j] * x[j]
        out[i] = max(acc, 0.0)


@numba.njit(cache=True, error_model="numpy")
def propagate_into(
    x: FloatArray,
    cov: FloatArray,
    u: FloatArray,
    dt: float,
    ip: IntArray,
    fp: FloatArray,
    noise: FloatArray,
    ws: Workspace,
) -> None:
    """:func:`propagate` in place on ``x`` and ``cov``, without allocating.

    ``noise`` is the full intensity matrix W (n, n); ``ws`` comes from
    :func:`workspace`.
    """
    if dt <= 0.0:
        return
    n = x.shape[0]
    n_dyn = ip[IP_N] * ip[IP_S]
    jac, phi, qd, tmp, forcing, g, x_new = ws[11:]
    jacobian_into(0.0, x, u, ip, fp, jac)
    affine_input_into(u, ip, fp, forcing)
    discretize_into(jac, forcing, noise, dt, n_dyn, phi, g, qd, ws)
    _advance_into(x, phi, g, ip, x_new)
    for i in range(n):
        x[i] = x_new[i]
    _covariance_into(phi, cov, qd, n_dyn, tmp)


@numba.njit(cache=True, error_model="numpy")
def propagate(
    x: FloatArray,
    cov: FloatArray,
    u: FloatArray,
    dt: float,
    ip: IntArray,
    fp: FloatArray,
    noise: FloatArray,
) -> tuple[FloatArray, FloatArray]:
    """State and covariance after ``dt`` seconds with inputs ``u`` held.

    Parameters
    ----------
    x : ndarray, shape (n,)
        State at the start (layout in :mod:`estimator.model`).
    cov : ndarray, shape (n, n)
        Covariance P at the start.
    u : ndarray, shape (1 + N + S,)
        Inputs [m^3/s, K, mol/m^3], held over the interval.
    dt : float
        Interval [s]; 0 returns copies.
    ip, fp : ndarray
        Packed model parameters (:class:`estimator.model.TrainModel`).
    noise : ndarray, shape (n,)
        Diagonal of the continuous process-noise intensity W [unit^2/s].

    Returns
    -------
    x_next, cov_next : ndarray
        ``x(t + dt)`` exact for the held inputs (to round-off) and
        ``Phi P Phi^T + Qd``.
    """
    ws = workspace(x.shape[0], ip[IP_N] * ip[IP_S])
    x_next = x.copy()
    cov_next = cov.copy()
    propagate_into(x_next, cov_next, u, dt, ip, fp, np.diag(noise), ws)
    return x_next, cov_next


@numba.njit(cache=True, error_model="numpy")
def propagate_state(
    x: FloatArray, u: FloatArray, dt: float, ip: IntArray, fp: FloatArray
) -> FloatArray:
    """State only after ``dt`` seconds with inputs held (see :func:`propagate`)."""
    n = x.shape[0]
    x_next, _ = propagate(x, np.zeros((n, n)), u, dt, ip, fp, np.zeros(n))
    return x_next
