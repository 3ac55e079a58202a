"""State propagation over an interval against closed-form transients and a stiff ODE solver.

Source tags beside the checks: "computed from the closed form" is a value evaluated
from the formula; "from memory" a printed value recalled, not re-read; "derived" a
consequence of the balances with no printed value.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from scipy.integrate import solve_ivp

from estimator.model import FP_VOLUME, derivative, jacobian
from estimator.propagate import discretize, propagate, propagate_state
from tests.estimator.trains import quantity, train_model

FLOOR = 1e-3  # mol/m^3: differences are relative to max(|x|, FLOOR); states reach 1000


def tanks_with_reaction(n_tanks, volume, k_ref):
    # First order A -> B, flow 1 m^3/s, feed 1 mol/m^3 of A.
    return train_model(volumes=[volume] * n_tanks, k_ref=k_ref, feed={"A": "1 mol/m^3"})


def start_up(n, t, tau, k, c0=1.0):
    """C_n(t) of n equal tanks, initially empty, after a feed step 0 -> c0 at t = 0.

    C_n = c0 (1 + k tau)^-n [1 - exp(-a t) sum_{j<n} (a t)^j / j!], a = (1 + k tau) / tau.
    """
    a = (1.0 + k * tau) / tau
    partial = sum((a * t) ** j / math.factorial(j) for j in range(n))
    return c0 * (1.0 + k * tau) ** -n * (1.0 - math.exp(-a * t) * partial)


@pytest.mark.parametrize(
    ("t", "c1", "c2"),
    # tau = 2 s, k = 0.5 1/s, C0 = 1, a = 1 (computed from the closed form, 5 decimals).
    [(1.0, 0.31606, 0.06606), (2.0, 0.43233, 0.14850), (5.0, 0.49663, 0.23989)],
)
def test_start_up_of_two_tanks_with_reaction(t, c1, c2):
    model = tanks_with_reaction(2, "2 m^3", "0.5 1/s")
    x = propagate_state(np.zeros(model.n_states), model.nominal_inputs(), t, model.ip, model.fp)
    # N equal tanks after a feed step, C_n(t) = C0 (1+k tau)^-n [1 - e^{-at} sum (at)^j/j!]
    # (derived from the balances; table computed from the closed form, 5 decimals).
    assert x[0] == pytest.approx(c1, abs=5e-6)
    assert x[2] == pytest.approx(c2, abs=5e-6)
    # What A loses, B gains: A + B in each tank is the no-reaction step response.
    assert x[0] + x[1] == pytest.approx(1.0 - math.exp(-t / 2.0), rel=1e-12)


def test_start_up_of_two_tanks_reaches_the_steady_state():
    model = tanks_with_reaction(2, "2 m^3", "0.5 1/s")
    x = propagate_state(np.zeros(4), model.nominal_inputs(), 200.0, model.ip, model.fp)
    # t -> infinity: C1 = 0.5, C2 = 0.25 (computed from the closed form).
    np.testing.assert_allclose(x[[0, 2]], [0.5, 0.25], rtol=1e-12)
    np.testing.assert_allclose(x, model.steady_state(model.nominal_inputs()), rtol=1e-12)


def test_start_up_of_three_tanks_with_reaction():
    model = tanks_with_reaction(3, "1.5 m^3", "0.4 1/s")
    x = propagate_state(np.zeros(6), model.nominal_inputs(), 2.0, model.ip, model.fp)
    # tau = 1.5 s, k = 0.4 1/s, t = 2 s: C1 = 0.550974, C2 = 0.245657, C3 = 0.087735
    # (computed from the closed form, 6 decimals).
    assert x[0] == pytest.approx(0.550974, abs=5e-7)
    assert x[2] == pytest.approx(0.245657, abs=5e-7)
    assert x[4] == pytest.approx(0.087735, abs=5e-7)


@pytest.mark.parametrize("n_tanks", [1, 2, 5])
def test_start_up_follows_the_closed_form_at_every_time(n_tanks):
    model = tanks_with_reaction(n_tanks, "1.5 m^3", "0.4 1/s")
    u = model.nominal_inputs()
    for t in (0.01, 0.3, 1.0, 4.0, 15.0, 60.0):
        x = propagate_state(np.zeros(model.n_states), u, t, model.ip, model.fp)
        expected = [start_up(n, t, 1.5, 0.4) for n in range(1, n_tanks + 1)]
        # The closed form above (derived from the balances; no printed value).
        np.testing.assert_allclose(x[0::2], expected, rtol=1e-9, atol=1e-14)


def test_single_tank_start_up_time_to_99_percent():
    tau, k = 2.0, 0.5
    model = tanks_with_reaction(1, "2 m^3", "0.5 1/s")
    t_s = 4.6 * tau / (1.0 + tau * k)
    x = propagate_state(np.zeros(2), model.nominal_inputs(), t_s, model.ip, model.fp)
    # Fogler, Elements of CRE, 3rd ed., sec. 4.7.1 (Eqs. 4-43 to 4-50): after an empty
    # start, 99% of the steady state C_A0 / (1 + tau k) is reached at t_s = 4.6 tau / (1 + tau k).
    assert x[0] / (1.0 / (1.0 + tau * k)) == pytest.approx(0.99, abs=5e-4)


def test_feed_step_from_a_steady_state_adds_the_start_up_response():
    model = tanks_with_reaction(3, "1.5 m^3", "0.4 1/s")
    u = model.nominal_inputs()
    x0 = model.steady_state(u)
    u_step = u.copy()
    u_step[-2] = 3.0  # C_A0: 1 -> 3 mol/m^3
    x = propagate_state(x0, u_step, 2.0, model.ip, model.fp)
    # The balances are linear: the response to a step of dC0 = 2 from a steady state is
    # the steady state plus 2 times the start-up response (derived).
    expected = x0[0::2] + 2.0 * np.array([0.550974, 0.245657, 0.087735])
    np.testing.assert_allclose(x[0::2], expected, atol=2 * 5e-7)


def tanks_without_reaction(n_tanks):
    # tau_i = 500 L / (30 m^3/h) = 60 s per tank; a fast reaction (k = 5 1/s at design)
    # switched off by an activity of zero.
    model = train_model(
        volumes=["500 L"] * n_tanks,
        flow="30 m^3/h",
        k_ref="5 1/s",
        feed={"A": "1 mol/m^3"},
        estimate_activity=True,
    )
    x0 = np.zeros(model.n_states)
    x0[model.layout.activity] = 0.0
    return model, x0


@pytest.mark.parametrize(
    ("n_tanks", "t_over_tau_i", "printed"),
    [
        # Levenspiel, CRE 3rd ed., ch. 14, tanks-in-series model, step response
        # F_N(t) = 1 - exp(-t/tau_i) sum_{j<N} (t/tau_i)^j / j! (computed from the closed
        # form, 4 decimals).
        (1, 1.0, 0.6321),
        (2, 2.0, 0.5940),
        (3, 3.0, 0.5768),
        (5, 5.0, 0.5595),
        (2, 1.0, 0.2642),
        (3, 1.0, 0.0803),
    ],
)
def test_step_response_of_tanks_in_series_without_reaction(n_tanks, t_over_tau_i, printed):
    model, x0 = tanks_without_reaction(n_tanks)
    tau_i = 60.0
    x = propagate_state(x0, model.nominal_inputs(), t_over_tau_i * tau_i, model.ip, model.fp)
    last = model.layout.concentration(n_tanks - 1, 0)
    # Levenspiel 3rd ed. ch. 14 (computed from the closed form): F_N = printed value.
    assert x[last] == pytest.approx(printed, abs=5e-5)
    # The Erlang distribution function, shape N and scale tau_i.
    erlang = stats.erlang.cdf(t_over_tau_i * tau_i, n_tanks, scale=tau_i)
    assert x[last] == pytest.approx(erlang, rel=1e-10)
    # Nothing reacts: no B anywhere.
    assert not x[1 : model.layout.n_concentrations : 2].any()


def test_step_response_every_tank_is_an_erlang_distribution():
    model, x0 = tanks_without_reaction(5)
    u = model.nominal_inputs()
    n = np.arange(1, 6)
    for t in (1.0, 30.0, 60.0, 200.0, 900.0, 3600.0):
        x = propagate_state(x0, u, t, model.ip, model.fp)
        # Levenspiel 3rd ed. ch. 14: tank n's step response is the Erlang(n, tau_i) CDF.
        expected = stats.gamma.cdf(t, n, scale=60.0)
        np.testing.assert_allclose(x[0:10:2], expected, rtol=1e-10, atol=1e-15)


def random_train(rng):
    """A random train, inputs, state and interval, all drawn from ``rng``.

    1 to 6 vessels of 0.5 to 50 m^3 at 300 to 400 K; flow zero one time in five, else
    log-uniform from 1e-4 to 2 m^3/s; k tau at T_ref log-uniform from 1e-3 to 1e3 (stiff
    at the top); reversible or not; feed as inputs or as states; activity estimated or
    not; the interval 0.1 s or 24 h one time in ten each, else log-uniform between them.
    """
    n = int(rng.integers(1, 7))
    volumes = rng.uniform(0.5, 50.0, n)
    flow = 0.0 if rng.random() < 0.2 else 10.0 ** rng.uniform(-4.0, math.log10(2.0))
    tau_mean = volumes.mean() / flow if flow > 0.0 else 100.0
    spec = {
        "volumes": [quantity(v, "m^3") for v in volumes],
        "temperatures": [quantity(t, "K") for t in rng.uniform(300.0, 400.0, n)],
        "flow": quantity(flow, "m^3/s"),
        "feed": {"A": quantity(rng.uniform(0.0, 1000.0), "mol/m^3")},
        "fixed_feed": {"B": quantity(rng.uniform(0.0, 200.0), "mol/m^3")},
        "feed_model": str(rng.choice(["input", "state"])),
        "k_ref": quantity(10.0 ** rng.uniform(-3.0, 3.0) / tau_mean, "1/s"),
        "activation_energy": quantity(rng.uniform(0.0, 60.0), "kJ/mol"),
        "estimate_activity": bool(rng.random() < 0.5),
    }
    if rng.random() < 0.5:
        spec["kind"] = "reversible"
        spec["equilibrium_constant_ref"] = 10.0 ** rng.uniform(-1.0, 2.0)
        spec["reaction_enthalpy"] = quantity(rng.uniform(-50.0, 50.0), "kJ/mol")
    model = train_model(spec)
    lay = model.layout
    x = rng.uniform(0.0, 1000.0, lay.n)
    if lay.activity >= 0:
        x[lay.activity] = rng.uniform(0.0, 2.0)
    dt = rng.choice(
        [0.1, 86_400.0, 10.0 ** rng.uniform(-1.0, math.log10(86_400.0))], p=[0.1, 0.1, 0.8]
    )
    return model, model.nominal_inputs(), x, float(dt)


# Hypothesis draws the seed; numpy spreads the draws evenly over the ranges above (drawn
# field by field, hypothesis favours the ends of each range and repeats them).
trains = st.integers(0, 2**32 - 1).map(lambda seed: random_train(np.random.default_rng(seed)))


def reference_solution(model, u, x, dt):
    sol = solve_ivp(
        derivative,
        (0.0, dt),
        x,
        method="Radau",
        rtol=1e-11,
        atol=1e-9,
        jac=jacobian,
        args=(u, model.ip, model.fp),
    )
    assert sol.success, sol.message
    return sol.y[:, -1]


def relative_difference(a, b):
    return np.max(np.abs(a - b) / np.maximum(np.abs(b), FLOOR))


@settings(max_examples=50, deadline=None, derandomize=True, database=None)
@given(trains)
def test_propagation_matches_a_stiff_ode_solver(case):
    model, u, x, dt = case
    expected = reference_solution(model, u, x, dt)
    # Radau IIA (order 5) at rtol 1e-11 as the reference; the interval is solved exactly
    # with inputs held, so agreement to 1e-6 relative is required.
    assert relative_difference(propagate_state(x, u, dt, model.ip, model.fp), expected) < 1e-6


@settings(max_examples=60, deadline=None, derandomize=True, database=None)
@given(trains)
def test_propagation_over_two_halves_equals_one_interval(case):
    model, u, x, dt = case
    whole = propagate_state(x, u, dt, model.ip, model.fp)
    half = propagate_state(x, u, dt / 2.0, model.ip, model.fp)
    halves = propagate_state(half, u, dt / 2.0, model.ip, model.fp)
    # Semigroup property of the exact flow: x(t + s) = flow_s(flow_t(x)).
    assert relative_difference(halves, whole) < 1e-10


@settings(max_examples=60, deadline=None, derandomize=True, database=None)
@given(trains)
def test_propagation_over_uneven_pieces_equals_one_interval(case):
    model, u, x, dt = case
    whole = propagate_state(x, u, dt, model.ip, model.fp)
    first = propagate_state(x, u, 0.3 * dt, model.ip, model.fp)
    pieces = propagate_state(first, u, 0.7 * dt, model.ip, model.fp)
    # Pieces of different lengths use different series steps, so round-off differs: the
    # squaring phase lets it grow like eps ||J||_1 dt (Higham, SIAM J. Matrix Anal. Appl.
    # 26(4), 2005), which matters only for long, fast, closed (zero-flow) intervals.
    n_conc = model.layout.n_concentrations
    jac = jacobian(0.0, x, u, model.ip, model.fp)[:n_conc, :n_conc]
    growth = np.finfo(float).eps * np.abs(jac).sum(axis=0).max() * dt
    assert relative_difference(pieces, whole) < 1e-10 + 64.0 * growth


def test_zero_flow_reversible_batch_reaches_equilibrium_over_a_day():
    # A closed vessel (no flow) with A <=> B, k_f = 10 1/s, K = 1, held for a day.
    model = train_model(
        volumes=["1 m^3"],
        flow="0 m^3/s",
        kind="reversible",
        k_ref="10 1/s",
        equilibrium_constant_ref=1.0,
        feed={"A": "0 mol/m^3"},
    )
    x = propagate_state(np.array([0.0, 2.0]), model.nominal_inputs(), 86_400.0, model.ip, model.fp)
    # Batch equilibrium C_B / C_A = K with A + B conserved (derived): C_A = C_B = 1. The
    # scaling-and-squaring round-off grows like eps k dt (k dt = 1.7e6 here), about 2e-10.
    np.testing.assert_allclose(x, [1.0, 1.0], rtol=1e-8)


def random_state_near_zero(seed):
    """A random train whose state mixes zero, tiny (<= 1e-6) and large concentrations."""
    rng = np.random.default_rng(seed)
    model, u, x, dt = random_train(rng)
    n_conc = model.layout.n_concentrations
    kind = rng.integers(0, 3, n_conc)
    x[:n_conc] = np.choose(
        kind, [np.zeros(n_conc), rng.uniform(0.0, 1e-6, n_conc), rng.uniform(0.0, 1000.0, n_conc)]
    )
    if rng.random() < 0.3:
        u[1 + model.layout.n_vessels :] = 0.0  # no feed at all: everything washes out
    return model, u, x, dt


@settings(max_examples=60, deadline=None, derandomize=True, database=None)
@given(st.integers(0, 2**32 - 1).map(random_state_near_zero))
def test_propagation_keeps_concentrations_non_negative_and_finite(case):
    model, u, x, dt = case
    lay = model.layout
    x_next = propagate_state(x, u, dt, model.ip, model.fp)
    assert np.all(np.isfinite(x_next))
    assert np.all(x_next >= 0.0)
    # The flow of a train is cooperative (off-diagonal Jacobian entries >= 0) and its
    # forcing non-negative, so the exact solution stays non-negative: before any
    # clipping the computed one may dip below zero only by round-off.
    jac = jacobian(0.0, x, u, model.ip, model.fp)
    n = lay.n
    forcing = np.zeros(n)
    forcing[: lay.n_species] = (
        u[0] / model.fp[FP_VOLUME] * np.where(np.array(lay.feed) < 0, u[1 + lay.n_vessels :], 0.0)
    )
    phi, g, _ = discretize(jac, forcing, np.zeros((n, n)), dt, lay.n_concentrations)
    kept = np.ones(n, dtype=bool)
    if lay.activity >= 0:
        kept[lay.activity] = False
    raw = phi[: lay.n_concentrations, kept] @ x[kept] + g[: lay.n_concentrations]
    scale = max(np.abs(x).max(), np.abs(u[1 + lay.n_vessels :]).max(), 1.0)
    assert raw.min() >= -1e-12 * scale
    # The covariance propagation carries the same state.
    x_cov, cov = propagate(x, np.eye(n), u, dt, model.ip, model.fp, model.process_noise)
    np.testing.assert_allclose(x_cov, x_next, rtol=1e-13, atol=1e-300)
    assert np.all(np.isfinite(cov))
