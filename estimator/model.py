"""Mole balances of a cascade of constant-volume stirred tanks, with analytic Jacobians.

The train is N well-mixed overflow vessels in series sharing one volumetric flow
q [m^3/s]. For species s in vessel i (volume V_i [m^3], residence time
tau_i = V_i / q [s])::

    dC_{s,i}/dt = (C_{s,i-1} - C_{s,i}) / tau_i + nu_s * r(C_i, T_i)

with C_{s,0} the feed. One reaction, reactant A and product B (nu_A = -1,
nu_B = +1, other species inert)::

    irreversible  r = a * k(T) * C_A
    reversible    r = a * k(T) * (C_A - C_B / K_eq(T))

with the Arrhenius law ``k(T) = k_ref * exp(-Ea/R * (1/T - 1/T_ref))``, the van 't
Hoff law ``K_eq(T) = K_ref * exp(-dH/R * (1/T - 1/T_ref))`` and ``a`` the catalyst
activity (1 = design).

The model is written for the compiled filter core: parameters are packed into one
integer array ``ip`` and one float array ``fp`` (layout below), inputs into
``u = [q, T_1..T_N, C_feed_1..C_feed_S]`` (SI), and every model function has the
shape ``f(t, x, u, ip, fp)``.

State layout (length ``n``)::

    x = [C_{1,1} .. C_{S,1}, C_{1,2} .. C_{S,N},   concentrations, vessel-major
         a,                                        activity (if estimated)
         C_feed states,                            measured feed species (feed model "state")
         inlet-analyzer biases]

References
----------
O. Levenspiel, *Chemical Reaction Engineering*, 3rd ed., Wiley 1999, ch. 5-6.
H. S. Fogler, *Elements of Chemical Reaction Engineering*, 5th ed., 2016, ch. 3 and 5.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numba
import numpy as np
from numpy.typing import NDArray

from estimator.config import TrainConfig

GAS_CONSTANT = 8.314462618  # J/(mol K), CODATA 2018 exact value

# Integer parameter layout.
IP_N = 0  # number of vessels
IP_S = 1  # number of species
IP_REACTANT = 2  # species index of A
IP_PRODUCT = 3  # species index of B
IP_REVERSIBLE = 4  # 1 for A <=> B
IP_ACTIVITY = 5  # state index of the activity, -1 when held at design
IP_FEED = 6  # S entries: state index of each feed species, -1 when it is an input

# Float parameter layout.
FP_K_REF = 0  # rate constant at T_ref [1/s]
FP_T_REF = 1  # reference temperature [K]
FP_EA = 2  # activation energy [J/mol]
FP_K_EQ_REF = 3  # equilibrium constant at T_ref [-]
FP_DH = 4  # reaction enthalpy for van 't Hoff [J/mol]
FP_ACTIVITY = 5  # activity used when it is not a state [-]
FP_VOLUME = 6  # N entries: vessel volumes [m^3]

FloatArray = NDArray[np.float64]
IntArray = NDArray[np.int64]


def arrhenius(k_ref: float, t_ref: float, activation_energy: float, temperature: float) -> float:
    """Rate constant at a temperature from its value at a reference temperature.

    Parameters
    ----------
    k_ref : float
        Rate constant at ``t_ref`` [1/s].
    t_ref : float
        Reference temperature [K].
    activation_energy : float
        Ea [J/mol].
    temperature : float
        Temperature [K].

    Returns
    -------
    float
        k(T) [1/s].

    Notes
    -----
    The reference-temperature form ``k = k_ref exp[(Ea/R)(1/T_ref - 1/T)]``
    (Fogler, 5th ed., Eq. 3-21) decorrelates the two parameters in a fit.

    Examples
    --------
    A rate that doubles from 300 K to 310 K has Ea = R ln 2 / (1/300 - 1/310):

    >>> ea = GAS_CONSTANT * np.log(2.0) / (1 / 300 - 1 / 310)
    >>> round(arrhenius(1.0, 300.0, ea, 310.0), 12)
    2.0
    """
    return float(_arrhenius(k_ref, t_ref, activation_energy, temperature))


def equilibrium_constant(
    k_eq_ref: float, t_ref: float, enthalpy: float, temperature: float
) -> float:
    """Equilibrium constant at a temperature by the integrated van 't Hoff equation.

    Parameters
    ----------
    k_eq_ref : float
        K_eq at ``t_ref`` [-].
    t_ref : float
        Reference temperature [K].
    enthalpy : float
        Standard reaction enthalpy dH, taken constant [J/mol].
    temperature : float
        Temperature [K].

    Returns
    -------
    float
        K_eq(T) [-]; rises with T for an endothermic reaction (dH > 0).
    """
    return float(_arrhenius(k_eq_ref, t_ref, enthalpy, temperature))


@numba.njit(cache=True, error_model="numpy")
def _arrhenius(k_ref: float, t_ref: float, energy: float, temperature: float) -> float:
    return k_ref * np.exp(-energy / GAS_CONSTANT * (1.0 / temperature - 1.0 / t_ref))


@numba.njit(cache=True, error_model="numpy")
def _activity(x: FloatArray, ip: IntArray, fp: FloatArray) -> float:
    i_act = ip[IP_ACTIVITY]
    return x[i_act] if i_act >= 0 else fp[FP_ACTIVITY]


@numba.njit(cache=True, error_model="numpy")
def _inlet(x: FloatArray, u: FloatArray, ip: IntArray, vessel: int, species: int) -> float:
    """Inlet concentration of a species to a vessel [mol/m^3]."""
    n_species = ip[IP_S]
    if vessel > 0:
        return x[(vessel - 1) * n_species + species]
    i_feed = ip[IP_FEED + species]
    if i_feed >= 0:
        return x[i_feed]
    return u[1 + ip[IP_N] + species]


@numba.njit(cache=True, error_model="numpy")
def derivative(t: float, x: FloatArray, u: FloatArray, ip: IntArray, fp: FloatArray) -> FloatArray:
    """Time derivative of the state, dx/dt [state unit/s], shape (n,).

    Activity, feed and bias states are random walks: their derivative is zero.
    """
    n_vessels = ip[IP_N]
    n_species = ip[IP_S]
    ia = ip[IP_REACTANT]
    ib = ip[IP_PRODUCT]
    flow = u[0]
    activity = _activity(x, ip, fp)
    dx = np.zeros(x.shape[0])
    for i in range(n_vessels):
        dilution = flow / fp[FP_VOLUME + i]
        base = i * n_species
        for s in range(n_species):
            dx[base + s] = dilution * (_inlet(x, u, ip, i, s) - x[base + s])
        temperature = u[1 + i]
        k = activity * _arrhenius(fp[FP_K_REF], fp[FP_T_REF], fp[FP_EA], temperature)
        if ip[IP_REVERSIBLE] == 1:
            k_eq = _arrhenius(fp[FP_K_EQ_REF], fp[FP_T_REF], fp[FP_DH], temperature)
            rate = k * (x[base + ia] - x[base + ib] / k_eq)
        else:
            rate = k * x[base + ia]
        dx[base + ia] -= rate
        dx[base + ib] += rate
    return dx


@numba.njit(cache=True, error_model="numpy")
def jacobian(t: float, x: FloatArray, u: FloatArray, ip: IntArray, fp: FloatArray) -> FloatArray:
    """Analytic Jacobian d(dx/dt)/dx [1/s and mixed], shape (n, n).

    Only the concentration rows are non-zero. The activity column holds
    ``nu_s * k(T) * (C_A - C_B/K_eq)``; the feed-state columns hold ``q / V_1``.
    """
    jac = np.empty((x.shape[0], x.shape[0]))
    jacobian_into(t, x, u, ip, fp, jac)
    return jac


@numba.njit(cache=True, error_model="numpy")
def jacobian_into(
    t: float, x: FloatArray, u: FloatArray, ip: IntArray, fp: FloatArray, jac: FloatArray
) -> None:
    """:func:`jacobian` written into ``jac`` (n, n), for the allocation-free filter loop."""
    n_vessels = ip[IP_N]
    n_species = ip[IP_S]
    ia = ip[IP_REACTANT]
    ib = ip[IP_PRODUCT]
    i_act = ip[IP_ACTIVITY]
    flow = u[0]
    activity = _activity(x, ip, fp)
    for i in range(jac.shape[0]):
        for j in range(jac.shape[1]):
            jac[i, j] = 0.0
    for i in range(n_vessels):
        dilution = flow / fp[FP_VOLUME + i]
        base = i * n_species
        for s in range(n_species):
            jac[base + s, base + s] -= dilution
            if i > 0:
                jac[base + s, base - n_species + s] += dilution
            elif ip[IP_FEED + s] >= 0:
                jac[base + s, ip[IP_FEED + s]] += dilution
        temperature = u[1 + i]
        k0 = _arrhenius(fp[FP_K_REF], fp[FP_T_REF], fp[FP_EA], temperature)
        k = activity * k0
        jac[base + ia, base + ia] -= k
        jac[base + ib, base + ia] += k
        driving = x[base + ia]
        if ip[IP_REVERSIBLE] == 1:
            k_eq = _arrhenius(fp[FP_K_EQ_REF], fp[FP_T_REF], fp[FP_DH], temperature)
            jac[base + ia, base + ib] += k / k_eq
            jac[base + ib, base + ib] -= k / k_eq
            driving = x[base + ia] - x[base + ib] / k_eq
        if i_act >= 0:
            jac[base + ia, i_act] -= k0 * driving
            jac[base + ib, i_act] += k0 * driving


@numba.njit(cache=True, error_model="numpy")
def affine_input(u: FloatArray, ip: IntArray, fp: FloatArray, n: int) -> FloatArray:
    """Constant forcing from feed species that are inputs, not states [mol/(m^3 s)], shape (n,).

    With the activity frozen over an interval the balances are linear:
    ``dx/dt = F x + c`` on the concentration rows, where F is the Jacobian without its
    activity column and c is this vector.
    """
    c = np.empty(n)
    affine_input_into(u, ip, fp, c)
    return c


@numba.njit(cache=True, error_model="numpy")
def affine_input_into(u: FloatArray, ip: IntArray, fp: FloatArray, c: FloatArray) -> None:
    """:func:`affine_input` written into ``c`` (n,)."""
    c[:] = 0.0
    n_species = ip[IP_S]
    dilution = u[0] / fp[FP_VOLUME]
    for s in range(n_species):
        if ip[IP_FEED + s] < 0:
            c[s] = dilution * u[1 + ip[IP_N] + s]


@dataclass(frozen=True)
class StateLayout:
    """Where each quantity sits in the state vector.

    Attributes
    ----------
    n_vessels, n_species : int
        N and S.
    activity : int
        Index of the activity state, -1 when it is not estimated.
    feed : tuple of int
        Per species, the index of its feed-concentration state, -1 when the feed
        concentration is an input (fixed or used as measured).
    bias : dict of str to int
        Inlet-analyzer tag -> index of its bias state [mol/m^3].
    n : int
        Length of the state vector.
    """

    n_vessels: int
    n_species: int
    activity: int
    feed: tuple[int, ...]
    bias: dict[str, int] = field(default_factory=dict)
    n: int = 0

    def concentration(self, vessel: int, species: int) -> int:
        """Index of species ``species`` in vessel ``vessel`` (both 0-based)."""
        return vessel * self.n_species + species

    @property
    def n_concentrations(self) -> int:
        """N * S, the number of concentration states."""
        return self.n_vessels * self.n_species


@dataclass(frozen=True)
class TrainModel:
    """The compiled-core view of a train: packed parameters, state layout, noise.

    Build it with :meth:`from_config`. ``ip``/``fp`` feed the model functions;
    ``process_noise`` is the diagonal of the continuous-time intensity W
    [state unit^2 / s]; ``initial_std`` the 1-sigma of the start-up covariance.
    """

    config: TrainConfig
    layout: StateLayout
    ip: IntArray
    fp: FloatArray
    process_noise: FloatArray
    initial_std: FloatArray
    state_names: tuple[str, ...]

    @classmethod
    def from_config(cls, config: TrainConfig) -> TrainModel:
        """Pack a validated train description for the filter core."""
        n_vessels = len(config.vessels)
        species = list(config.species)
        n_species = len(species)
        n_conc = n_vessels * n_species
        est = config.estimator
        names = [f"{v.name}.{s}" for v in config.vessels for s in species]
        noise = [est.concentration_noise.intensity] * n_conc
        std0 = [est.initial_std.concentration] * n_conc

        index = n_conc
        activity = -1
        if est.estimate_activity:
            activity = index
            index += 1
            names.append("activity")
            noise.append(est.activity_noise.intensity)
            std0.append(est.initial_std.activity)

        feed = [-1] * n_species
        bias: dict[str, int] = {}
        if config.feed.model == "state":
            for name, source in config.feed.composition.items():
                if isinstance(source, float):
                    continue
                feed[species.index(name)] = index
                index += 1
                names.append(f"feed.{name}")
                noise.append(est.feed_noise.intensity)
                std0.append(est.initial_std.feed)
            for source in config.feed.composition.values():
                if isinstance(source, float) or not source.bias:
                    continue
                bias[source.tag] = index
                index += 1
                names.append(f"bias.{source.tag}")
                noise.append(est.bias_noise.intensity)
                std0.append(est.initial_std.bias)

        layout = StateLayout(n_vessels, n_species, activity, tuple(feed), bias, index)
        reaction = config.reaction
        ip = np.array(
            [
                n_vessels,
                n_species,
                species.index(reaction.reactant),
                species.index(reaction.product),
                1 if reaction.kind == "reversible" else 0,
                activity,
                *feed,
            ],
            dtype=np.int64,
        )
        k_eq_ref = reaction.equilibrium_constant_ref or 1.0
        fp = np.array(
            [
                reaction.k_ref,
                reaction.T_ref,
                reaction.activation_energy,
                k_eq_ref,
                reaction.reaction_enthalpy,
                est.design_activity,
                *(v.volume for v in config.vessels),
            ],
            dtype=np.float64,
        )
        return cls(
            config=config,
            layout=layout,
            ip=ip,
            fp=fp,
            process_noise=np.array(noise, dtype=np.float64),
            initial_std=np.array(std0, dtype=np.float64),
            state_names=tuple(names),
        )

    @property
    def n_states(self) -> int:
        """Length of the state vector."""
        return self.layout.n

    @property
    def n_inputs(self) -> int:
        """Length of the input vector u = [q, T_1..T_N, C_feed_1..C_feed_S]."""
        return 1 + self.layout.n_vessels + self.layout.n_species

    def nominal_inputs(self) -> FloatArray:
        """Input vector at the configured nominal flow, temperatures and feed (SI)."""
        cfg = self.config
        u = np.empty(self.n_inputs)
        u[0] = cfg.feed.flow.nominal
        for i, vessel in enumerate(cfg.vessels):
            u[1 + i] = vessel.nominal_temperature
        for s, name in enumerate(cfg.species):
            source = cfg.feed.composition.get(name, 0.0)
            u[1 + len(cfg.vessels) + s] = source if isinstance(source, float) else source.nominal
        return u

    def with_fixed_activity(self, activity: float) -> FloatArray:
        """Return a copy of ``fp`` whose fixed activity is ``activity`` [-]."""
        fp = self.fp.copy()
        fp[FP_ACTIVITY] = activity
        return fp

    def steady_state(
        self,
        u: FloatArray,
        activity: float | None = None,
        bias: float = 0.0,
    ) -> FloatArray:
        """Full state vector at steady state for inputs ``u``.

        Concentrations solve the balances with dx/dt = 0, vessel by vessel (each a
        2x2 linear system for A and B); the activity is ``activity`` (design when
        None); feed states take the feed concentrations in ``u``; biases ``bias``.
        At zero flow the steady state is undefined, so the nominal flow is used.

        Parameters
        ----------
        u : ndarray, shape (1 + N + S,)
            Inputs [m^3/s, K, mol/m^3].
        activity : float, optional
            Activity [-]; the design activity when omitted.
        bias : float
            Value for every bias state [mol/m^3].

        Returns
        -------
        ndarray, shape (n,)
        """
        lay = self.layout
        a = self.config.estimator.design_activity if activity is None else activity
        x = np.zeros(lay.n)
        if lay.activity >= 0:
            x[lay.activity] = a
        for s, idx in enumerate(lay.feed):
            if idx >= 0:
                x[idx] = u[1 + lay.n_vessels + s]
        for idx in lay.bias.values():
            x[idx] = bias
        flow = u[0] if u[0] > 0.0 else self.config.feed.flow.nominal
        x[: lay.n_concentrations] = steady_concentrations(
            flow,
            u[1 : 1 + lay.n_vessels],
            u[1 + lay.n_vessels :],
            a,
            self.ip,
            self.fp,
        )
        return x


def steady_concentrations(
    flow: float,
    temperatures: FloatArray,
    feed: FloatArray,
    activity: float,
    ip: IntArray,
    fp: FloatArray,
) -> FloatArray:
    """Steady-state concentrations of every vessel, vessel-major [mol/m^3].

    Each vessel is solved from its inlet: for A and B
    ``(C_in - C)/tau + nu * r(C) = 0`` is linear in C; inert species pass through.
    With no flow (tau infinite) the vessel is at reaction equilibrium.

    Notes
    -----
    For first order A -> B this gives ``C_A,n = C_A0 prod_j 1/(1 + k_j tau_j)``
    (Levenspiel, 3rd ed., Eq. 6.6 for equal vessels; the product form for unequal ones).
    """
    feed = np.asarray(feed, dtype=np.float64)
    out = np.empty(int(ip[IP_N]) * len(feed))
    steady_concentrations_into(
        float(flow), np.asarray(temperatures, dtype=np.float64), feed, float(activity), ip, fp, out
    )
    return out


@numba.njit(cache=True, error_model="numpy")
def steady_concentrations_into(
    flow: float,
    temperatures: FloatArray,
    feed: FloatArray,
    activity: float,
    ip: IntArray,
    fp: FloatArray,
    out: FloatArray,
) -> None:
    """Compiled body of :func:`steady_concentrations`, written into ``out`` (N*S,)."""
    n_vessels = ip[IP_N]
    n_species = feed.shape[0]
    ia = ip[IP_REACTANT]
    ib = ip[IP_PRODUCT]
    reversible = ip[IP_REVERSIBLE] == 1
    inlet = feed.copy()
    for i in range(n_vessels):
        temperature = temperatures[i]
        k = activity * _arrhenius(fp[FP_K_REF], fp[FP_T_REF], fp[FP_EA], temperature)
        k_eq = _arrhenius(fp[FP_K_EQ_REF], fp[FP_T_REF], fp[FP_DH], temperature)
        k_rev = k / k_eq if reversible else 0.0
        dilution = flow / fp[FP_VOLUME + i]
        # (d + k) C_A - k_rev C_B = d A_in and -k C_A + (d + k_rev) C_B = d B_in, by
        # Cramer's rule with the common factor d cancelled, so that d -> 0 (no flow)
        # tends to the equilibrium of the vessel's contents without a singular solve.
        total = dilution + k + k_rev
        a_in, b_in = inlet[ia], inlet[ib]
        if total > 0.0:
            inlet[ia] = ((dilution + k_rev) * a_in + k_rev * b_in) / total
            inlet[ib] = (k * a_in + (dilution + k) * b_in) / total
        for s in range(n_species):
            out[i * n_species + s] = inlet[s]
