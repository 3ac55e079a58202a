"""The train model against published steady-state conversions, kinetics and its own Jacobian.

Source tags beside the checks: "computed from the closed form" is a value evaluated
from the textbook formula; "from memory" a printed value recalled, not re-read;
"derived" a consequence of the balances or of thermodynamics with no printed value.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize import brentq

from estimator.model import (
    GAS_CONSTANT,
    arrhenius,
    derivative,
    equilibrium_constant,
    jacobian,
)
from estimator.units import parse_quantity
from tests.estimator.trains import quantity, train_model

FEED = 1000.0  # mol/m^3 of A in the default test feed


def conversions(model, u=None, activity=None):
    """Conversion of A after each vessel, X_n = 1 - C_A,n / C_A0."""
    u = model.nominal_inputs() if u is None else u
    x = model.steady_state(u, activity=activity)
    lay = model.layout
    c_a0 = u[1 + lay.n_vessels]
    return np.array([1.0 - x[lay.concentration(i, 0)] / c_a0 for i in range(lay.n_vessels)])


@pytest.mark.parametrize(
    ("damkohler", "n_tanks", "printed", "tol"),
    [
        # Levenspiel, CRE 3rd ed., ch. 6, X = 1 - (1 + k tau)^-N; table values computed
        # from the closed form, printed to 4 decimals (exact ones to 5).
        (0.5, 1, 0.3333, 5e-5),
        (0.5, 2, 0.5556, 5e-5),
        (0.5, 3, 0.7037, 5e-5),
        (0.5, 5, 0.8683, 5e-5),
        (1.0, 1, 0.5, 5e-6),
        (1.0, 2, 0.75, 5e-6),
        (1.0, 3, 0.875, 5e-6),
        (1.0, 5, 0.96875, 5e-6),
        (2.0, 1, 0.6667, 5e-5),
        (2.0, 2, 0.8889, 5e-5),
        (2.0, 3, 0.9630, 5e-5),
        (2.0, 5, 0.9959, 5e-5),
    ],
)
def test_steady_state_conversion_equal_tanks_in_series(damkohler, n_tanks, printed, tol):
    # tau = 2 m^3 / (1 m^3/s) = 2 s per tank, k = Da / tau.
    model = train_model(volumes=["2 m^3"] * n_tanks, k_ref=quantity(damkohler / 2.0, "1/s"))
    x_n = conversions(model)
    # Levenspiel 3rd ed. ch. 6 (computed from the closed form): X_N = printed value.
    assert x_n[-1] == pytest.approx(printed, abs=tol)
    # Every intermediate tank follows the same law, X_n = 1 - (1 + Da)^-n.
    n = np.arange(1, n_tanks + 1)
    np.testing.assert_allclose(x_n, 1.0 - (1.0 + damkohler) ** -n, rtol=1e-12)


@pytest.mark.parametrize(
    ("n_tanks", "printed"),
    # Total k tau = 2 split over N tanks, computed from the closed form (4 decimals;
    # 0.784 and 0.75 are exact).
    [(1, 0.6667), (2, 0.75), (3, 0.784), (5, 0.8141), (10, 0.8385)],
)
def test_conversion_of_fixed_total_volume_split_into_more_tanks(n_tanks, printed):
    model = train_model(volumes=[quantity(2.0 / n_tanks, "m^3")] * n_tanks, k_ref="1 1/s")
    x_total = conversions(model)[-1]
    # Levenspiel 3rd ed. ch. 6, X = 1 - (1 + 2/N)^-N (computed from the closed form).
    assert x_total == pytest.approx(printed, abs=5e-5)
    # Below the plug-flow limit 1 - exp(-k tau) = 0.8647 (Levenspiel 3rd ed. ch. 6).
    assert x_total < 1.0 - math.exp(-2.0)


def test_conversion_grows_towards_plug_flow_as_tanks_are_added():
    totals = [
        conversions(train_model(volumes=[quantity(2.0 / n, "m^3")] * n, k_ref="1 1/s"))[-1]
        for n in (1, 2, 3, 5, 10, 20)
    ]
    assert np.all(np.diff(totals) > 0.0)
    # 20 tanks: 1 - 1.1^-20 = 0.8514, still short of 0.8647 (computed from the closed form).
    assert totals[-1] == pytest.approx(0.8514, abs=5e-5)


def test_conversion_of_unequal_tanks():
    model = train_model(volumes=["1 m^3", "2 m^3", "3 m^3"], k_ref="0.5 1/s")
    # C_N/C_0 = prod 1/(1 + k tau_i), k = 0.5, tau = (1, 2, 3): X = 0.8667
    # (computed from the closed form, 4 decimals).
    assert conversions(model)[-1] == pytest.approx(0.8667, abs=5e-5)


def test_steady_state_concentrations_balance_and_are_stationary():
    model = train_model(
        volumes=["1 m^3", "2 m^3", "3 m^3"],
        temperatures=["340 K", "350 K", "360 K"],
        activation_energy="60 kJ/mol",
    )
    u = model.nominal_inputs()
    for activity in (0.3, 1.0, 1.7):
        x = model.steady_state(u, activity=activity)
        dx = derivative(0.0, x, u, model.ip, model.with_fixed_activity(activity))
        # dx/dt = 0 at a steady state (the balances themselves, no published value).
        np.testing.assert_allclose(dx, 0.0, atol=1e-9 * FEED)
        # A + B is conserved by A -> B.
        np.testing.assert_allclose(x[0::2] + x[1::2], FEED, rtol=1e-12)


US_GALLON = 231 * 0.0254**3  # m^3: 231 in^3, inch = 0.0254 m, both exact by definition


def fogler_model(volumes, flow="7.2 dm^3/s"):
    return train_model(
        species=("ethylene_oxide", "ethylene_glycol"),
        reactant="ethylene_oxide",
        product="ethylene_glycol",
        volumes=volumes,
        flow=flow,
        feed={"ethylene_oxide": "8.05 mol/L"},
        k_ref="0.311 1/min",
    )


def test_fogler_units_reach_the_model_in_si():
    model = fogler_model(["800 gal", "800 gal"])
    u = model.nominal_inputs()
    assert u[0] == pytest.approx(7.2e-3, rel=1e-12)  # 7.2 dm^3/s in m^3/s
    assert u[3] == pytest.approx(8050.0, rel=1e-12)  # 8.05 mol/L in mol/m^3
    assert model.fp[0] == pytest.approx(0.311 / 60.0, rel=1e-12)  # 0.311 1/min in 1/s
    np.testing.assert_allclose(model.fp[6:], 800 * US_GALLON, rtol=1e-12)  # 800 gal


def test_fogler_two_reactors_in_parallel():
    model = fogler_model(["800 gal"])
    u = model.nominal_inputs()
    u[0] /= 2.0  # each of the two reactors takes half of v0 = 7.2 dm^3/s
    x_parallel = conversions(model, u)[-1]
    # Fogler, Elements of CRE, 5th ed., Example 5-2(b): tau = 14.0 min, Da = 4.36,
    # X = 0.81 (printed value from memory; 0.813 computed from the closed form).
    assert x_parallel == pytest.approx(0.81, abs=0.005)


def test_fogler_two_reactors_in_series():
    x_1, x_2 = conversions(fogler_model(["800 gal", "800 gal"]))
    # Fogler, Elements of CRE, 5th ed., Example 5-2(c): tau_1 = 7.0 min, Da = 2.18,
    # X1 = 0.685 and X2 = 0.90, computed from the closed form (printed 0.68 and 0.90,
    # from memory).
    assert x_1 == pytest.approx(0.685, abs=0.005)
    assert x_2 == pytest.approx(0.90, abs=0.005)


def test_fogler_volume_for_80_percent_conversion():
    def shortfall(volume_m3):
        return conversions(fogler_model([quantity(volume_m3, "m^3")]))[-1] - 0.8

    volume = brentq(shortfall, 1.0, 20.0, xtol=1e-9)
    # Fogler, Elements of CRE, 5th ed., Example 5-2(a): V = v0 X / (k (1 - X)) = 5.55 m^3
    # (computed from the closed form; printed 197.3 ft^3 = 1,480 gal, from memory).
    assert volume == pytest.approx(5.55, rel=0.01)
    assert volume / US_GALLON == pytest.approx(1480.0, rel=0.01)


def reversible_model(volumes, temperature="350 K", enthalpy=None):
    # k_f = 1 1/s, K = 4 so k_r = 0.25 1/s; tau = V / (1 m^3/s); C_A0 = 1 mol/m^3.
    return train_model(
        kind="reversible",
        volumes=volumes,
        temperatures=temperature,
        k_ref="1 1/s",
        equilibrium_constant_ref=4.0,
        reaction_enthalpy=enthalpy,
        feed={"A": "1 mol/m^3"},
    )


def test_reversible_single_tank_conversion():
    model = reversible_model(["2 m^3"])
    x = model.steady_state(model.nominal_inputs())
    # X = k_f tau / (1 + (k_f + k_r) tau) with k_f = 1, k_r = 0.25, tau = 2: X = 0.5714
    # (Fogler convention for A <=> B, from memory; value computed from the closed form).
    assert 1.0 - x[0] == pytest.approx(0.5714, abs=5e-5)
    assert x[0] + x[1] == pytest.approx(1.0, rel=1e-12)


def test_reversible_conversion_tends_to_equilibrium_conversion():
    model = reversible_model(["1e9 m^3"])
    x = model.steady_state(model.nominal_inputs())
    # X_e = K / (1 + K) = 0.8 for K = 4 (computed from the closed form).
    assert 1.0 - x[0] == pytest.approx(0.8, abs=5e-5)
    assert x[1] / x[0] == pytest.approx(4.0, rel=1e-6)


def test_reversible_two_tanks():
    model = reversible_model(["2 m^3", "2 m^3"])
    x = model.steady_state(model.nominal_inputs())
    # Each tank: C_A = (C_A,in + k_r tau S) / (1 + (k_f + k_r) tau), S = 1:
    # C_A = 0.42857, then 0.26531 (computed from the closed form, 5 decimals).
    assert x[0] == pytest.approx(0.42857, abs=5e-6)
    assert x[2] == pytest.approx(0.26531, abs=5e-6)
    # (C_A,N - C_Ae) = (C_A0 - C_Ae) / (1 + (k_f + k_r) tau)^N with C_Ae = 0.2.
    assert x[2] - 0.2 == pytest.approx(0.8 / 3.5**2, rel=1e-12)


def test_reversible_equilibrium_follows_van_t_hoff():
    enthalpy = 40e3  # J/mol, endothermic
    model = reversible_model(["1e9 m^3"], temperature="380 K", enthalpy="40 kJ/mol")
    x = model.steady_state(model.nominal_inputs())
    k_eq = 4.0 * math.exp(-enthalpy / GAS_CONSTANT * (1.0 / 380.0 - 1.0 / 350.0))
    # Integrated van 't Hoff equation, constant dH (derived): C_B / C_A -> K(380 K) > 4.
    assert x[1] / x[0] == pytest.approx(k_eq, rel=1e-6)
    assert k_eq > 4.0


# Fogler, Elements of CRE, 4th ed., Example 3-1, p. 95 (data read on the book's companion site).
FOGLER_T = np.array([313.0, 319.0, 323.0, 328.0, 333.0])  # K
FOGLER_K = np.array([0.00043, 0.00103, 0.00180, 0.00355, 0.00717])  # 1/s


def fogler_fit():
    slope, intercept = np.polyfit(1.0 / FOGLER_T, np.log(FOGLER_K), 1)
    return -slope, intercept


def test_arrhenius_fit_of_fogler_example_3_1():
    e_over_r, ln_a = fogler_fit()
    # Least squares of ln k on 1/T over Fogler's Example 3-1 data: E/R = 14,612 K and
    # ln A = 38.92 (computed; the book's decade method prints E = 116 kJ/mol).
    assert e_over_r == pytest.approx(14_612.0, abs=50.0)
    assert ln_a == pytest.approx(38.92, abs=0.005)
    # Fogler 4th ed. Example 3-1 prints E = 116 kJ/mol ("or 28.7 kcal/mol"), read by the
    # decade method off a plot: the least-squares value agrees within 5%.
    assert e_over_r * GAS_CONSTANT == pytest.approx(116e3, rel=0.05)


def test_arrhenius_reference_form_reproduces_fogler_table():
    e_over_r, ln_a = fogler_fit()
    k_323 = math.exp(ln_a - e_over_r / 323.0)
    predicted = np.array([arrhenius(k_323, 323.0, e_over_r * GAS_CONSTANT, t) for t in FOGLER_T])
    # Fogler 4th ed. Example 3-1 table: the fitted line passes every point within 1.8%
    # (largest scatter, at 328 K); the reference-temperature form must reproduce it.
    np.testing.assert_allclose(predicted, FOGLER_K, rtol=0.02)
    np.testing.assert_allclose(predicted, np.exp(ln_a - e_over_r / FOGLER_T), rtol=1e-12)


def test_arrhenius_pasteurisation_equivalence():
    t_63 = parse_quantity("63 degC", "temperature")
    t_74 = parse_quantity("74 degC", "temperature")
    time_ratio = parse_quantity("30 min", "time") / parse_quantity("15 s", "time")

    def mismatch(energy):
        return arrhenius(1.0, t_63, energy, t_74) - time_ratio

    energy = brentq(mismatch, 1e3, 1e6, xtol=1e-6)
    # Levenspiel, CRE 3rd ed., ch. 2, pasteurisation: 30 min at 63 degC = 15 s at 74 degC,
    # E = 422 kJ/mol (from memory; 422.3 computed from the two-point form).
    assert energy == pytest.approx(422e3, abs=0.5e3)


def test_arrhenius_rate_doubling_rule():
    energy = brentq(lambda e: arrhenius(1.0, 300.0, e, 310.0) - 2.0, 1e3, 1e6, xtol=1e-6)
    # Doubling from 300 K to 310 K: E = R ln 2 / (1/300 - 1/310) = 53.6 kJ/mol
    # (computed from the closed form, 3 significant digits).
    assert energy == pytest.approx(53.6e3, abs=0.05e3)
    # With E = 50 kJ/mol, k(310)/k(300) = 1.909 (computed from the closed form).
    assert arrhenius(1.0, 300.0, 50e3, 310.0) == pytest.approx(1.909, abs=5e-4)
    # At the reference temperature the reference value comes back, whatever E.
    assert arrhenius(0.37, 330.0, 80e3, 330.0) == 0.37


@pytest.mark.parametrize("enthalpy", [-60e3, -5e3, 5e3, 60e3])
def test_equilibrium_constant_van_t_hoff(enthalpy):
    temperatures = np.linspace(300.0, 420.0, 7)
    k_eq = np.array([equilibrium_constant(4.0, 350.0, enthalpy, t) for t in temperatures])
    # Le Chatelier / van 't Hoff: K rises with T when dH > 0, falls when dH < 0.
    assert np.all(np.sign(np.diff(k_eq)) == np.sign(enthalpy))
    # Integrated van 't Hoff, constant dH: ln(K2/K1) = -dH/R (1/T2 - 1/T1) (derived).
    t1, t2 = temperatures[1], temperatures[-2]
    k1, k2 = k_eq[1], k_eq[-2]
    assert math.log(k2 / k1) == pytest.approx(
        -enthalpy / GAS_CONSTANT * (1.0 / t2 - 1.0 / t1), rel=1e-12
    )
    assert equilibrium_constant(4.0, 350.0, enthalpy, 350.0) == pytest.approx(4.0, rel=1e-15)


def estimated_train(kind):
    # Reactant and product not in the first two places, and an inert third species,
    # so that a mixed-up index shows.
    extra = {"equilibrium_constant_ref": 2.5, "reaction_enthalpy": "-30 kJ/mol"}
    return train_model(
        species=("B", "inert", "A"),
        reactant="A",
        product="B",
        volumes=["1.5 m^3", "4 m^3", "0.7 m^3", "12 m^3"],
        temperatures=["330 K", "345 K", "360 K", "375 K"],
        flow="90 m^3/h",
        feed={"A": "900 mol/m^3", "inert": "150 mol/m^3"},
        fixed_feed={"B": "20 mol/m^3"},
        feed_model="state",
        bias=("A",),
        kind=kind,
        k_ref="0.02 1/s",
        activation_energy="70 kJ/mol",
        estimate_activity=True,
        **(extra if kind == "reversible" else {}),
    )


def central_difference(model, x, u):
    n = x.size
    fd = np.empty((n, n))
    for j in range(n):
        step = 1e-6 * max(abs(x[j]), 1.0)
        up, down = x.copy(), x.copy()
        up[j] += step
        down[j] -= step
        f_up = derivative(0.0, up, u, model.ip, model.fp)
        f_down = derivative(0.0, down, u, model.ip, model.fp)
        fd[:, j] = (f_up - f_down) / (2.0 * step)
    return fd


@pytest.mark.parametrize("kind", ["irreversible", "reversible"])
def test_analytic_jacobian_matches_finite_differences(kind):
    model = estimated_train(kind)
    lay = model.layout
    assert lay.activity >= 0 and lay.bias and min(lay.feed[1:]) >= 0  # every state kind
    rng = np.random.default_rng(1234)
    for _ in range(5):
        x = rng.uniform(0.0, 1000.0, model.n_states)
        x[lay.activity] = rng.uniform(0.2, 1.5)
        u = model.nominal_inputs()
        u[0] *= rng.uniform(0.1, 3.0)
        u[1 : 1 + lay.n_vessels] = rng.uniform(320.0, 390.0, lay.n_vessels)
        jac = jacobian(0.0, x, u, model.ip, model.fp)
        fd = central_difference(model, x, u)
        # The balances are bilinear in (activity, concentrations), so a central
        # difference is exact up to round-off: agreement to 1e-6 relative.
        np.testing.assert_allclose(jac, fd, rtol=1e-6, atol=1e-9 * np.abs(jac).max())
        # Random-walk states (activity, feed, bias) have no dynamics.
        assert not jac[lay.n_concentrations :].any()
