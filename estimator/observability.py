"""Which states the configured measurements can estimate, at the nominal operating point.

The test is the rank of the observability matrix of the linearised system (F, H)
at the nominal steady state, computed stably: the observable subspace is grown as a
block Krylov space ``span{H^T, F^T H^T, (F^T)^2 H^T, ...}`` with every new block
orthogonalised against the basis (the staircase idea), instead of forming powers of
F, whose columns become numerically dependent for long trains. States are scaled by
their nominal magnitudes first, so a concentration of 2000 mol/m^3 and an activity
of 1 weigh alike.

A state is *observable* when its unit vector lies in the observable subspace: the
measurements then determine it uniquely (with enough time). For every state that is
not, the report names the single extra measurement (species and vessel) that would
make the most of them observable.

References
----------
T. Kailath, *Linear Systems*, Prentice-Hall 1980, sec. 2.3 (observability) and
6.2 (the PBH and staircase forms).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from estimator.model import FloatArray, TrainModel, jacobian


@dataclass(frozen=True)
class ObservabilityReport:
    """Outcome of the rank test.

    Attributes
    ----------
    rank : int
        Dimension of the observable subspace.
    n_states : int
        Length of the state vector.
    unobservable : tuple of str
        Names of states the measurements cannot determine.
    suggestions : tuple of str
        Extra measurements ("glucose in R-202") that would make the most of them
        observable, best first; empty when every state is observable.
    """

    rank: int
    n_states: int
    unobservable: tuple[str, ...]
    suggestions: tuple[str, ...]

    @property
    def observable(self) -> bool:
        """True when every state can be estimated."""
        return self.rank == self.n_states

    def message(self) -> str:
        """Summarise the result in plain words for engineers."""
        if self.observable:
            return f"all {self.n_states} states are observable from the configured measurements"
        text = (
            f"{self.n_states - self.rank} of {self.n_states} directions are unobservable; "
            f"cannot estimate: {', '.join(self.unobservable)}"
        )
        if self.suggestions:
            text += f". Consider measuring: {'; '.join(self.suggestions)}"
        return text


def observable_subspace(f: FloatArray, h: FloatArray, rtol: float = 1e-9) -> FloatArray:
    """Orthonormal basis of the observable subspace of (F, H), shape (n, r).

    Parameters
    ----------
    f : ndarray, shape (n, n)
        State matrix (continuous or discrete; the subspace is the same).
    h : ndarray, shape (m, n)
        Measurement matrix.
    rtol : float
        Relative tolerance below which a new direction counts as dependent.
    """
    n = f.shape[0]
    scale = max(float(np.linalg.norm(f, 2)), 1e-300)
    basis = np.zeros((n, 0))
    block = h.T.astype(float)
    hnorm = max(float(np.linalg.norm(h, 2)), 1e-300)
    for _ in range(n):
        if basis.shape[1]:
            block = block - basis @ (basis.T @ block)
            block = block - basis @ (basis.T @ block)
        if block.size == 0:
            break
        u, s, _ = np.linalg.svd(block, full_matrices=False)
        ref = hnorm if basis.shape[1] == 0 else 1.0
        new = u[:, s > rtol * ref]
        if new.shape[1] == 0:
            break
        basis = np.hstack([basis, new])
        block = (f.T @ new) / scale
    return basis


def measurement_matrix(model: TrainModel) -> FloatArray:
    """H for every configured measurement (product analyzers, lab, feed analyzers)."""
    from estimator.filter import CascadeFilter

    defs = CascadeFilter(model).measurements
    h = np.zeros((len(defs), model.n_states))
    for row, d in enumerate(defs):
        h[row, d.state] = 1.0
        if d.bias >= 0:
            h[row, d.bias] = 1.0
    return h


def observability_report(model: TrainModel) -> ObservabilityReport:
    """Rank test at the nominal steady state, with the states that fail it named."""
    u = model.nominal_inputs()
    x = model.steady_state(u)
    # Typical magnitude of each state: its nominal value, or its start-up 1-sigma for
    # states whose nominal is zero (a bias, a species absent from the feed).
    d = np.maximum(np.abs(x), model.initial_std)
    d = np.maximum(d, 1e-9 * max(float(np.max(d)), 1.0))
    jac = jacobian(0.0, x, u, model.ip, model.fp)
    f = jac * d[None, :] / d[:, None]  # D^-1 F D
    h = measurement_matrix(model)
    h_scaled = h * d[None, :]
    unobs = _unobservable_states(f, h_scaled)
    names = tuple(model.state_names[i] for i in unobs)
    rank = observable_subspace(f, h_scaled).shape[1] if h.shape[0] else 0
    suggestions: list[str] = []
    if unobs:
        lay = model.layout
        cfg = model.config
        scored = []
        for vessel in range(lay.n_vessels):
            for species in range(lay.n_species):
                row = np.zeros((1, model.n_states))
                row[0, lay.concentration(vessel, species)] = d[lay.concentration(vessel, species)]
                left = len(_unobservable_states(f, np.vstack([h_scaled, row])))
                if left < len(unobs):
                    label = f"{cfg.species[species]} in {cfg.vessels[vessel].name}"
                    scored.append((left, vessel, species, label))
        # Fewest left unobservable first; among equals the vessel furthest downstream,
        # where a product analyzer usually is.
        scored.sort(key=lambda item: (item[0], -item[1], item[2]))
        suggestions = [label for *_, label in scored[:3]]
    return ObservabilityReport(rank, model.n_states, names, tuple(suggestions))


def _unobservable_states(f: FloatArray, h: FloatArray, tol: float = 1e-9) -> list[int]:
    n = f.shape[0]
    if h.shape[0] == 0:
        return list(range(n))
    basis = observable_subspace(f, h)
    residual = 1.0 - np.sum(basis**2, axis=1)  # squared distance of e_i from the subspace
    return [i for i in range(n) if residual[i] > tol]
