"""Design conversion expectation against textbook closed forms."""

from __future__ import annotations

import numpy as np
import pytest

from estimator.conversion import design_conversion
from estimator.model import equilibrium_constant
from tests.estimator.trains import train_model


def test_equal_vessels_match_levenspiel_closed_form():
    # X_N = 1 - (1 + k tau)^-N for N equal first-order CSTRs (Levenspiel, CRE 3rd ed.,
    # ch. 6); REFERENCES.md sec. 1.3, computed from the closed form: Da = 1 gives
    # 0.5, 0.75, 0.875 after vessels 1 to 3.
    model = train_model(volumes=("1 m^3",) * 3, k_ref="1 1/s", flow="1 m^3/s")
    x = design_conversion(model, model.nominal_inputs()[None, :])
    np.testing.assert_allclose(x[0], [0.5, 0.75, 0.875], rtol=1e-12)


def test_unequal_vessels_match_product_form():
    # Unequal tanks, k = 0.5, tau = (1, 2, 3): X = 1 - prod 1/(1 + k tau_j) = 0.8667
    # (REFERENCES.md sec. 1.3, computed from the closed form).
    model = train_model(volumes=("1 m^3", "2 m^3", "3 m^3"), k_ref="0.5 1/s", flow="1 m^3/s")
    x = design_conversion(model, model.nominal_inputs()[None, :])
    expected = 1 - np.cumprod([1 / 1.5, 1 / 2.0, 1 / 2.5])
    np.testing.assert_allclose(x[0], expected, rtol=1e-12)
    assert x[0, -1] == pytest.approx(0.8667, abs=5e-5)


def test_reversible_two_vessels():
    # A <=> B, k_f = 1, K = 4, tau = 2, C_A0 = 1: C_A = 0.42857 then 0.26531
    # (REFERENCES.md sec. 1.4, derived from the mole balance, computed).
    model = train_model(
        volumes=("2 m^3", "2 m^3"),
        kind="reversible",
        k_ref="1 1/s",
        equilibrium_constant_ref=4.0,
        flow="1 m^3/s",
        feed={"A": "1 mol/m^3"},
    )
    x = design_conversion(model, model.nominal_inputs()[None, :])
    np.testing.assert_allclose(x[0], [1 - 0.42857, 1 - 0.26531], atol=5e-6)


def test_rows_are_independent_and_match_the_model_steady_state():
    model = train_model(
        volumes=("2 m^3", "5 m^3", "1 m^3"),
        kind="reversible",
        k_ref="0.2 1/s",
        equilibrium_constant_ref=2.5,
        reaction_enthalpy="-8 kJ/mol",
        activation_energy="50 kJ/mol",
        temperatures=("340 K", "350 K", "360 K"),
        fixed_feed={"B": "100 mol/m^3"},
    )
    rng = np.random.default_rng(2)
    rows = np.tile(model.nominal_inputs(), (20, 1))
    rows[:, 0] *= rng.uniform(0.0, 3.0, 20)
    rows[:, 1:4] += rng.uniform(-15, 15, (20, 3))
    rows[3, 0] = 0.0  # no flow: each vessel at equilibrium
    x = design_conversion(model, rows, activity=0.8)
    for k, u in enumerate(rows):
        if k == 3:
            continue
        state = model.steady_state(u, activity=0.8)
        c_a = state[[0, 2, 4]]
        np.testing.assert_allclose(x[k], 1 - c_a / u[4], rtol=1e-10)
    # With no flow each vessel holds its equilibrium, C_B / C_A = K_eq(T_i), on the
    # conserved total of the feed (A + B).
    total = rows[3, 4] + rows[3, 5]
    k_eq = np.array([equilibrium_constant(2.5, 350.0, -8000.0, t) for t in rows[3, 1:4]])
    np.testing.assert_allclose(x[3], 1 - total / (1 + k_eq) / rows[3, 4], rtol=1e-12)


def test_no_reactant_in_feed_gives_zero_not_nan():
    model = train_model(volumes=("1 m^3",))
    u = model.nominal_inputs()[None, :].copy()
    u[0, 2] = 0.0
    x = design_conversion(model, u)
    assert x.tolist() == [[0.0]]


# The dynamic expectation (DesignTwin) against an independent integration


def _demo_balances(config):
    """Mole balances of the demo train written out here, independently of estimator.model.

    Unsteady CSTRs in series with reversible first-order A <=> B (the mole balance of
    Fogler, *Elements of CRE*, 5th ed., ch. 1 and 5, with the accumulation term kept;
    chapter numbers from memory):
    dC_A,i/dt = (C_A,i-1 - C_A,i) q / V_i - r_i, dC_B,i/dt = (C_B,i-1 - C_B,i) q / V_i + r_i,
    r_i = k(T_i) (C_A,i - C_B,i / K(T_i)), Arrhenius k and van 't Hoff K.
    """
    r_gas = 8.314462618
    reaction = config.reaction
    volumes = np.array([v.volume for v in config.vessels])

    def rhs(_t, c, q, temperatures, feed_a, feed_b):
        out = np.empty_like(c)
        up_a, up_b = feed_a, feed_b
        for i, volume in enumerate(volumes):
            inv = 1.0 / temperatures[i] - 1.0 / reaction.T_ref
            k = reaction.k_ref * np.exp(-reaction.activation_energy / r_gas * inv)
            k_eq = reaction.equilibrium_constant_ref * np.exp(
                -reaction.reaction_enthalpy / r_gas * inv
            )
            a, b = c[2 * i], c[2 * i + 1]
            rate = k * (a - b / k_eq)
            out[2 * i] = (up_a - a) * q / volume - rate
            out[2 * i + 1] = (up_b - b) * q / volume + rate
            up_a, up_b = a, b
        return out

    return rhs


def test_design_twin_follows_steps_like_an_independent_radau_integration():
    from scipy.integrate import solve_ivp

    from estimator.config import load_train_config
    from estimator.conversion import DesignTwin
    from estimator.model import TrainModel

    config = load_train_config("replay_data/wrenfield/train.toml")
    model = TrainModel.from_config(config)
    hour = 3600.0
    times = np.arange(0.0, 8 * hour + 1.0, 300.0)
    inputs = np.tile(model.nominal_inputs(), (len(times), 1))
    inputs[times >= 2 * hour, 0] *= 1.3  # throughput up 30 %
    inputs[times >= 3 * hour, 1] += 3.0  # R-201 3 K warmer
    inputs[times >= 4 * hour, 4] = 2200.0  # feed glucose down (column 1 + N + 0)
    inputs[times >= 6 * hour, 0] /= 1.3
    got = DesignTwin(model).run(times, inputs)

    rhs = _demo_balances(config)
    c = model.steady_state(inputs[0])[: model.layout.n_concentrations]
    expected = [1.0 - c[0::2] / inputs[0, 4]]
    for k in range(1, len(times)):
        u = inputs[k - 1]  # held from the earlier row, as the filter holds inputs
        sol = solve_ivp(
            rhs, (times[k - 1], times[k]), c, method="Radau", rtol=1e-11, atol=1e-9,
            args=(u[0], u[1:4], u[4], u[5]),
        )  # fmt: skip
        c = sol.y[:, -1]
        expected.append(1.0 - c[0::2] / inputs[k, 4])
    np.testing.assert_allclose(got, np.array(expected), atol=1e-7)
    # And it differs from the steady-state expectation while the vessels settle.
    steady = design_conversion(model, inputs)
    after_step = (times > 2 * hour) & (times < 2.5 * hour)
    assert np.max(np.abs(got[after_step] - steady[after_step])) > 0.01


def test_session_rows_carry_the_twins_expectation_through_rewinds_and_restarts():
    # The session fills each row's design_conversion with the dynamic expectation
    # (the train's default). Late lab results rewind the filter (some past its
    # in-memory window, read back from the journal) and a restart resumes from a
    # checkpoint half way; the last word on every row must still be exactly what a
    # fresh twin gives when run once over those final rows in order (the twin itself
    # is checked against Radau above).
    from estimator.config import load_train_config
    from estimator.conversion import DesignTwin
    from estimator.model import TrainModel
    from tests.estimator.test_divergence import final_rows
    from tests.estimator.test_event_memory import DEMO, plant_batches, run_restarted

    config = load_train_config(DEMO)
    assert config.alerts.conversion_shortfall.expectation == "dynamic"
    outs = run_restarted(config, plant_batches(hours=5.0))
    assert sum(o.revised_from is not None for o in outs) >= 3
    rows = final_rows(outs)
    expected = DesignTwin(TrainModel.from_config(config)).run(rows.time, rows.inputs)
    np.testing.assert_array_equal(rows.design_conversion, expected)
    # And it is the dynamic expectation, not the steady one: after the feed step at
    # 3 h the two part for a while.
    steady = design_conversion(TrainModel.from_config(config), rows.inputs)
    assert np.max(np.abs(steady - expected)) > 0.005
