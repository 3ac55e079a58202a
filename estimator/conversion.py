"""What conversion the design model expects of each vessel.

The design expectation is the steady state of the balances at the current flow,
temperatures and feed with the design activity: for first order A -> B the product
form ``X_n = 1 - prod_{j<=n} 1 / (1 + k_j tau_j)`` (Levenspiel, *Chemical Reaction
Engineering*, 3rd ed., ch. 6; Fogler, *Elements of CRE*, 5th ed., sec. 5.3), and
for A <=> B the vessel-by-vessel solution of the same balances. Computed for many
rows at once, so a replay can set every estimate beside its expectation.
"""

from __future__ import annotations

import numpy as np

from estimator.model import (
    FP_DH,
    FP_EA,
    FP_K_EQ_REF,
    FP_K_REF,
    FP_T_REF,
    FP_VOLUME,
    GAS_CONSTANT,
    IP_N,
    IP_PRODUCT,
    IP_REACTANT,
    IP_REVERSIBLE,
    FloatArray,
    TrainModel,
)


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
    Each vessel solves ``(d + k) C_A - k_r C_B = d A_in`` and
    ``-k C_A + (d + k_r) C_B = d B_in`` with ``d = q / V`` and ``k_r = k / K_eq``
    (zero when irreversible), by Cramer's rule with d cancelled.
    """
    ip, fp = model.ip, model.fp
    a = model.config.estimator.design_activity if activity is None else activity
    u = np.atleast_2d(np.asarray(inputs, dtype=np.float64))
    n_vessels = int(ip[IP_N])
    ia, ib = int(ip[IP_REACTANT]), int(ip[IP_PRODUCT])
    feed_a = u[:, 1 + n_vessels + ia]
    c_a = feed_a.copy()
    c_b = u[:, 1 + n_vessels + ib].copy()
    out = np.zeros((len(u), n_vessels))
    for i in range(n_vessels):
        temperature = u[:, 1 + i]
        inv = 1.0 / temperature - 1.0 / fp[FP_T_REF]
        k = a * fp[FP_K_REF] * np.exp(-fp[FP_EA] / GAS_CONSTANT * inv)
        if ip[IP_REVERSIBLE] == 1:
            k_eq = fp[FP_K_EQ_REF] * np.exp(-fp[FP_DH] / GAS_CONSTANT * inv)
            k_r = k / k_eq
        else:
            k_r = np.zeros_like(k)
        d = u[:, 0] / fp[FP_VOLUME + i]
        total = d + k + k_r
        safe = np.where(total > 0.0, total, 1.0)
        new_a = np.where(total > 0.0, ((d + k_r) * c_a + k_r * c_b) / safe, c_a)
        new_b = np.where(total > 0.0, (k * c_a + (d + k) * c_b) / safe, c_b)
        c_a, c_b = new_a, new_b
        with np.errstate(divide="ignore", invalid="ignore"):
            out[:, i] = np.where(feed_a > 0.0, 1.0 - c_a / feed_a, 0.0)
    return out


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
