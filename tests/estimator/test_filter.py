"""The EKF against reference filters, consistency statistics and the rewind mechanism."""

from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import scipy.linalg
from filterpy.kalman import KalmanFilter
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import chi2

from estimator.config import parse_train_config
from estimator.filter import (
    STATUS_ACCEPTED,
    STATUS_GATED,
    CascadeFilter,
    joseph_update,
    update_group,
)
from estimator.model import TrainModel, affine_input, jacobian

DT = 30.0

BASE = {
    "train": {"name": "kelmarsh-c4", "species": ["A", "B"]},
    "vessels": [
        {
            "name": "C-401",
            "volume": "5 m^3",
            "temperature": {"tag": "TI-401", "unit": "degC", "nominal": "70 degC"},
        },
        {"name": "C-402", "volume": "3 m^3", "temperature": "72 degC"},
        {"name": "C-403", "volume": "4 m^3", "temperature": "71 degC"},
    ],
    "feed": {
        "flow": {"tag": "FI-400", "unit": "m^3/h", "nominal": "9 m^3/h"},
        "model": "state",
        "composition": {
            "A": {
                "tag": "AI-400",
                "unit": "mol/m^3",
                "nominal": "1800 mol/m^3",
                "std": "20 mol/m^3",
            },
            "B": "0 mol/m^3",
        },
    },
    "reaction": {
        "kind": "reversible",
        "reactant": "A",
        "product": "B",
        "k_ref": "1.5 1/h",
        "T_ref": "70 degC",
        "activation_energy": "55 kJ/mol",
        "equilibrium_constant_ref": 3.0,
    },
    "measurements": [
        {"tag": "AI-403A", "species": "A", "location": "C-403", "std": "15 mol/m^3"},
        {"tag": "AI-403B", "species": "B", "location": "C-403", "std": "15 mol/m^3"},
    ],
    "estimator": {"estimate_activity": False},
}


def make_model(**changes: object) -> TrainModel:
    data = copy.deepcopy(BASE)
    for key, value in changes.items():
        section, _, field = key.partition("__")
        if field:
            data[section][field] = value
        else:
            data[section] = value
    return TrainModel.from_config(parse_train_config(data))


def reference_discretize(model: TrainModel, x: np.ndarray, u: np.ndarray, dt: float):
    """Phi, forcing response g and Qd by scipy's expm (Van Loan 1978, block method)."""
    n = model.n_states
    jac = jacobian(0.0, x, u, model.ip, model.fp)
    c = affine_input(u, model.ip, model.fp, n)
    aug = np.zeros((n + 1, n + 1))
    aug[:n, :n] = jac
    aug[:n, n] = c
    e = scipy.linalg.expm(aug * dt)
    block = np.zeros((2 * n, 2 * n))
    block[:n, :n] = -jac
    block[:n, n:] = np.diag(model.process_noise)
    block[n:, n:] = jac.T
    big = scipy.linalg.expm(block * dt)
    phi = big[n:, n:].T
    qd = phi @ big[:n, n:]
    return e[:n, :n], e[:n, n], 0.5 * (qd + qd.T)


def started_filter(model: TrainModel, u: np.ndarray, feed: float) -> CascadeFilter:
    filt = CascadeFilter(model)
    tags = [model.config.feed.flow.tag, "TI-401", "AI-400"]
    filt.add_readings(tags, [0.0, 0.0, 0.0], [u[0], u[1], feed])
    return filt


def linear_truth(model: TrainModel, u: np.ndarray, steps: int, seed: int):
    """Truth and readings of the linear-Gaussian discrete model, drawn independently."""
    rng = np.random.default_rng(seed)
    x = model.steady_state(u)
    phi, g, qd = reference_discretize(model, x, u, DT)
    chol = np.linalg.cholesky(qd + 1e-12 * np.eye(len(x)))
    filt = CascadeFilter(model)
    h = np.zeros((len(filt.measurements), model.n_states))
    for row, d in enumerate(filt.measurements):
        h[row, d.state] = 1.0
    r = np.array([d.variance for d in filt.measurements])
    xs, zs = [], []
    for _ in range(steps):
        x = phi @ x + g + chol @ rng.standard_normal(len(x))
        xs.append(x.copy())
        zs.append(h @ x + np.sqrt(r) * rng.standard_normal(len(r)))
    return np.array(xs), np.array(zs), [d.tag for d in filt.measurements], h, np.diag(r), phi, g, qd


def test_linear_ekf_matches_filterpy_kalman_filter():
    # With the activity held fixed the balances are linear, so the EKF must equal the
    # linear Kalman filter: filterpy 2.0 KalmanFilter with F = expm(J dt), B u = g,
    # Q from Van Loan's method (all by scipy), Joseph-form update.
    model = make_model()
    u = model.nominal_inputs()
    _, zs, tags, h, r, phi, g, qd = linear_truth(model, u, steps=400, seed=11)
    filt = started_filter(model, u, feed=u[-2])
    kf = KalmanFilter(dim_x=model.n_states, dim_z=len(tags), dim_u=model.n_states)
    kf.x, kf.P = filt.x.copy(), filt.cov.copy()
    kf.F, kf.B, kf.Q, kf.H, kf.R = phi, np.eye(model.n_states), qd, h, r
    worst_x = worst_p = 0.0
    for k, z in enumerate(zs):
        t = (k + 1) * DT
        filt.add_readings(tags, [t] * len(tags), z)
        kf.predict(u=g)
        kf.update(z)
        worst_x = max(worst_x, np.max(np.abs(filt.x - kf.x) / np.abs(kf.x)))
        worst_p = max(worst_p, np.max(np.abs(filt.cov - kf.P)) / np.max(np.abs(kf.P)))
    assert worst_x < 1e-9
    assert worst_p < 1e-9


def test_covariance_converges_to_discrete_riccati_solution():
    # Steady-state prior covariance of the linear filter solves the DARE
    # (scipy.linalg.solve_discrete_are); the filter reports the posterior,
    # P+ = P- - P- H^T (H P- H^T + R)^-1 H P-.
    model = make_model()
    u = model.nominal_inputs()
    _, zs, tags, h, r, phi, _, qd = linear_truth(model, u, steps=1500, seed=5)
    filt = started_filter(model, u, feed=u[-2])
    for k, z in enumerate(zs):
        filt.add_readings(tags, [(k + 1) * DT] * len(tags), z)
    prior = scipy.linalg.solve_discrete_are(phi.T, h.T, qd, r)
    s = h @ prior @ h.T + r
    posterior = prior - prior @ h.T @ np.linalg.solve(s, h @ prior)
    assert np.max(np.abs(filt.cov - posterior)) / np.max(np.abs(posterior)) < 1e-6


def time_averaged_nis(model: TrainModel, r_scale: float, seed: int, steps: int = 1500):
    u = model.nominal_inputs()
    _, zs, tags, *_ = linear_truth(model, u, steps=steps, seed=seed)
    if r_scale != 1.0:
        data = copy.deepcopy(BASE)
        for m in data["measurements"]:
            m["std"] = f"{15 * math.sqrt(r_scale)} mol/m^3"
        data["feed"]["composition"]["A"]["std"] = f"{20 * math.sqrt(r_scale)} mol/m^3"
        model = TrainModel.from_config(parse_train_config(data))
    filt = started_filter(model, u, feed=u[-2])
    for k, z in enumerate(zs):
        filt.add_readings(tags, [(k + 1) * DT] * len(tags), z)
    ev = filt.events()
    accepted = ev["status"] == STATUS_ACCEPTED
    nis = ev["nis"][accepted][200:]  # after the start-up transient
    return float(np.mean(nis)), len(nis)


def test_nis_is_chi_square_consistent_when_tuned_right():
    # Bar-Shalom, Li & Kirubarajan (2001), sec. 5.4: for K scalar innovations of a
    # consistent filter, K * mean(NIS) ~ chi2(K); 95 % two-sided interval.
    mean, count = time_averaged_nis(make_model(), 1.0, seed=21)
    lo, hi = chi2.ppf([0.025, 0.975], count) / count
    assert lo <= mean <= hi


@pytest.mark.parametrize("r_scale", [0.25, 4.0])
def test_nis_test_detects_mistuned_reading_noise(r_scale):
    # The same interval must reject a filter whose R is 4x too small or too large
    # (a consistency test that cannot fail would prove nothing).
    mean, count = time_averaged_nis(make_model(), r_scale, seed=21)
    lo, hi = chi2.ppf([0.025, 0.975], count) / count
    assert not lo <= mean <= hi


def test_vector_update_equals_joint_kalman_update():
    # Sequential scalar Joseph updates equal the joint update with a diagonal R
    # (filterpy 2.0 KalmanFilter.update, Joseph form).
    rng = np.random.default_rng(3)
    n = 6
    a = rng.standard_normal((n, n))
    cov = a @ a.T + n * np.eye(n)
    x = rng.uniform(50, 100, n)
    idx = np.array([1, 4])
    bias = np.array([-1, 5])
    var = np.array([2.0, 3.0])
    z = x[idx] + np.array([0.5, -1.0])
    z[1] += x[5]
    kf = KalmanFilter(dim_x=n, dim_z=2)
    kf.x, kf.P, kf.R = x.copy(), cov.copy(), np.diag(var)
    kf.H = np.zeros((2, n))
    kf.H[0, 1] = kf.H[1, 4] = kf.H[1, 5] = 1.0
    x_prior, p_prior = x.copy(), cov.copy()
    kf.update(z)
    innov = np.empty(2)
    ok, nis = update_group(x, cov, idx, bias, z, var, 1e9, np.arange(0, dtype=np.int64), innov)
    assert ok
    np.testing.assert_allclose(x, kf.x, rtol=1e-12)
    np.testing.assert_allclose(cov, kf.P, rtol=1e-10, atol=1e-12)
    y = z - kf.H @ x_prior
    s = kf.H @ p_prior @ kf.H.T + kf.R
    assert nis == pytest.approx(float(y @ np.linalg.solve(s, y)), rel=1e-12)


def test_joseph_update_matches_textbook_form():
    # Joseph form (I - K H) P (I - K H)^T + K R K^T, computed densely.
    rng = np.random.default_rng(8)
    n = 5
    a = rng.standard_normal((n, n))
    cov = a @ a.T + np.eye(n)
    x = rng.standard_normal(n)
    h = np.zeros((1, n))
    h[0, 2] = 1.0
    k = cov @ h.T / (h @ cov @ h.T + 0.7)
    i_kh = np.eye(n) - k @ h
    expected = i_kh @ cov @ i_kh.T + 0.7 * k @ k.T
    joseph_update(x, cov, 2, -1, 1.5, 0.7)
    np.testing.assert_allclose(cov, expected, rtol=1e-12, atol=1e-14)


def demo_like_model() -> TrainModel:
    return make_model(
        estimator={"estimate_activity": True, "horizon": "8 h"},
        measurements=[
            {
                "tag": "AI-403A",
                "species": "A",
                "location": "C-403",
                "std": "15 mol/m^3",
                "dead_time": "5 min",
            },
            {
                "tag": "LAB-402B",
                "species": "B",
                "location": "C-402",
                "std": "10 mol/m^3",
                "kind": "lab",
            },
        ],
    )


def simulated_readings(model: TrainModel, hours: float = 6.0, seed: int = 4):
    from estimator.simulate import Profile, Scenario, simulate

    d = hours * 3600
    scenario = Scenario(
        duration=d,
        step=DT,
        flow=Profile(((0.0, 9 / 3600), (d / 3, 9 / 3600), (d / 3, 11 / 3600))),
        activity=Profile(((0.0, 1.0), (d / 2, 1.0), (d / 2, 0.8))),
        analyzer_period={"AI-403A": 120.0, "LAB-402B": 3600.0},
    )
    return simulate(model, scenario, seed=seed)


def test_late_and_out_of_order_readings_give_the_in_order_estimate():
    # DESIGN.md "Time and late data": rewinding to the last snapshot before a late
    # reading and running forward again gives exactly the in-order result.
    model = demo_like_model()
    sim = simulated_readings(model)
    tags, times, values = sim.columns()
    in_order = CascadeFilter(model)
    in_order.add_readings(tags, times, values)

    rng = np.random.default_rng(9)
    late = CascadeFilter(model)
    is_lab = np.array([t == "LAB-402B" for t in tags])
    # Lab results arrive 3 h after their sample time; everything else in shuffled batches.
    order = np.argsort(np.where(is_lab, times + 3 * 3600, times) + rng.uniform(0, 300, len(times)))
    rewinds = 0
    for chunk in np.array_split(order, 150):
        run = late.add_readings([tags[i] for i in chunk], times[chunk], values[chunk])
        rewinds += run.rewound_to is not None
    assert rewinds > 10
    np.testing.assert_allclose(late.x, in_order.x, rtol=1e-12)
    np.testing.assert_allclose(late.cov, in_order.cov, rtol=1e-10, atol=1e-15)


def test_dead_time_reading_applies_at_its_sample_time():
    # An analyzer with 5 min dead time: a reading stamped t is the sample at t - 300 s.
    model = demo_like_model()
    filt = CascadeFilter(model)
    u = model.nominal_inputs()
    filt.add_readings(["FI-400", "TI-401", "AI-400"], [0.0, 0.0, 0.0], [u[0], u[1], 1800.0])
    filt.add_readings(["FI-400"], [1200.0], [u[0]])
    filt.add_readings(["AI-403A"], [900.0], [1000.0])
    ev = filt.events()
    j = np.flatnonzero(ev["value"] == 1000.0)[0]
    assert ev["time"][j] == pytest.approx(600.0)


def test_activity_tracks_sudden_loss():
    model = demo_like_model()
    sim = simulated_readings(model, hours=10.0)
    filt = CascadeFilter(model)
    tags, times, values = sim.columns()
    run = filt.add_readings(tags, times, values)
    i_act = model.layout.activity
    end = run.states[-1, i_act]
    sd = run.std[-1, i_act]
    # Truth ends at 0.8 after a 20 % loss at 5 h; the estimate must find it within 3 sigma
    # and a sigma that is informative.
    assert abs(end - 0.8) < 3 * sd
    assert sd < 0.05


def test_spike_is_gated_and_kept_with_its_reason():
    model = demo_like_model()
    sim = simulated_readings(model, hours=2.0)
    tags, times, values = sim.columns()
    k = next(i for i, t in enumerate(tags) if t == "AI-403A" and times[i] > 3600)
    values = values.copy()
    values[k] += 800.0  # about 50 sigma
    filt = CascadeFilter(model)
    filt.add_readings(tags, times, values)
    ev = filt.events()
    spike = np.flatnonzero(ev["value"] == values[k])
    assert ev["status"][spike[0]] == STATUS_GATED
    assert ev["nis"][spike[0]] > chi2.ppf(0.999, 1)
    assert ev["innovation"][spike[0]] > 600


def test_bad_readings_are_refused_with_reasons_and_nothing_else_lost():
    model = demo_like_model()
    filt = CascadeFilter(model)
    u = model.nominal_inputs()
    run = filt.add_readings(
        ["FI-400", "TI-401", "AI-400", "AI-403A", "XX-999", "AI-403A"],
        [0.0, 0.0, 0.0, 400.0, 10.0, 500.0],
        [u[0], u[1], 1800.0, math.nan, 1.0, math.inf],
    )
    reasons = sorted(r.reason for r in run.refused)
    assert reasons == ["not a finite number", "not a finite number", "unknown tag for this train"]
    assert filt.initialized
    filt.add_readings(["FI-400"], [10 * 3600.0], [u[0]])
    old = filt.add_readings(["AI-403A"], [300.0], [900.0])
    assert [r.reason for r in old.refused] == ["older than the history horizon (8 h)"]
    assert np.all(np.isfinite(filt.x))


def test_zero_flow_for_hours_stays_finite_and_physical():
    model = demo_like_model()
    filt = CascadeFilter(model)
    u = model.nominal_inputs()
    filt.add_readings(["FI-400", "TI-401", "AI-400"], [0.0, 0.0, 0.0], [u[0], u[1], 1800.0])
    filt.add_readings(["FI-400"], [600.0], [0.0])
    for k in range(1, 30):
        run = filt.add_readings(["AI-403A", "AI-400"], [600.0 + 3600 * k] * 2, [700.0, 1800.0])
        assert np.all(np.isfinite(run.states)) and np.all(run.states[:, :7] >= 0)
    assert np.all(np.linalg.eigvalsh(filt.cov) > 0)


@settings(max_examples=40, deadline=None)
@given(
    st.lists(
        st.tuples(
            st.sampled_from(["FI-400", "TI-401", "AI-400", "AI-403A", "LAB-402B"]),
            st.floats(0.0, 20_000.0),
            st.floats(-1e4, 1e5),
        ),
        min_size=4,
        max_size=60,
    )
)
def test_random_readings_never_break_the_invariants(readings):
    # Any values (negative, huge, spikes), any order, any gaps: no NaN, no negative
    # concentration or activity, a symmetric positive-definite covariance.
    model = demo_like_model()
    filt = CascadeFilter(model, start_wait=0.0)
    tags = [r[0] for r in readings]
    times = [r[1] for r in readings]
    def physical(tag: str, value: float) -> float:
        if tag == "FI-400":
            return abs(value) / 1e6  # m^3/s
        if tag == "TI-401":
            return 250 + abs(value) % 200  # K
        return value

    values = [physical(tag, value) for tag, _, value in readings]
    for chunk in range(0, len(readings), 7):
        filt.add_readings(
            tags[chunk : chunk + 7], times[chunk : chunk + 7], values[chunk : chunk + 7]
        )
    if not filt.initialized:
        return
    n_bounded = 3 * 2 + 2
    assert np.all(np.isfinite(filt.x))
    assert np.all(filt.x[:n_bounded] >= 0.0)
    assert np.allclose(filt.cov, filt.cov.T)
    assert np.all(np.linalg.eigvalsh(filt.cov) > 0.0)
