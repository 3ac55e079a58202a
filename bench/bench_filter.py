"""Benchmark: the compiled EKF core against filterpy's ExtendedKalmanFilter.

Both filters run the same model on the same data: the demo train with its feed
concentration used as an input (3 vessels x 2 species + activity = 7 states), one
step every 10 s, each step a predict over the interval and an update with the
product analyzer's two readings (glucose and fructose in the last vessel).

The reference is filterpy 2.0's ``ExtendedKalmanFilter`` (Joseph-form update),
with the transition matrix, the forcing response and the process noise computed by
scipy's ``expm`` (the noise by Van Loan's block-matrix method) and the prior state
from the same exact solution. The core is ``estimator.filter.run_events`` over the
event array, 250 steps a compiled call.

Printed: median time per predict+update step of each (the reference's over its
steps, each timed; the core's over calls of 250 steps each, time / 250, so that
both medians leave out the moments the process was not running), their ratio,
and the largest relative difference between the two state estimates over all
steps. Both are measured in this run on this machine, so the ratio is what to
compare across machines. The two are timed interleaved, a whole core run before
each block of 1,000 reference steps, and the ratio of each block to its core run
is printed as well (median and range), so a change of the machine's load during
the run moves both sides.
"""

from __future__ import annotations

import statistics
import sys
import time
from pathlib import Path

import numpy as np
import scipy.linalg
from filterpy.kalman import ExtendedKalmanFilter

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from estimator.config import load_train_config  # noqa: E402
from estimator.filter import KIND_MEASUREMENT, STATUS_ACCEPTED, CascadeFilter, run_events  # noqa: E402
from estimator.model import TrainModel, affine_input, jacobian  # noqa: E402
from estimator.simulate import Profile, Scenario, simulate  # noqa: E402

STEPS = 10_000
BLOCK = 1_000  # reference steps timed between two core runs
CHUNK = 250  # core steps per compiled call, each call timed
DT = 10.0
TRAIN = Path(__file__).resolve().parent.parent / "replay_data" / "wrenfield" / "train.toml"


def bench_model() -> TrainModel:
    cfg = load_train_config(TRAIN)
    cfg = cfg.model_copy(
        update={
            "feed": cfg.feed.model_copy(update={"model": "input"}),
            "measurements": tuple(
                m.model_copy(update={"location": "R-203", "dead_time": 0.0, "kind": "analyzer"})
                for m in cfg.measurements
            ),
            "estimator": cfg.estimator.model_copy(update={"gate_probability": 1 - 1e-12}),
        }
    )
    return TrainModel.from_config(cfg)


def reference_discretize(jac: np.ndarray, c: np.ndarray, w: np.ndarray, dt: float):
    n = jac.shape[0]
    aug = np.zeros((n + 1, n + 1))
    aug[:n, :n] = jac
    aug[:n, n] = c
    e = scipy.linalg.expm(aug * dt)
    vl = np.zeros((2 * n, 2 * n))
    vl[:n, :n] = -jac
    vl[:n, n:] = w
    vl[n:, n:] = jac.T
    big = scipy.linalg.expm(vl * dt)
    phi = big[n:, n:].T
    qd = phi @ big[:n, n:]
    return e[:n, :n], e[:n, n], 0.5 * (qd + qd.T)


class ReferenceEKF(ExtendedKalmanFilter):
    """filterpy's EKF with the exact prior from scipy's expm."""

    def __init__(self, model: TrainModel, x0, p0, u) -> None:
        super().__init__(dim_x=model.n_states, dim_z=2)
        self.model = model
        self.u_in = u
        self.x = x0.copy()
        self.P = p0.copy()
        self.w = np.diag(model.process_noise)

    def step(self, z: np.ndarray, h: np.ndarray, r: np.ndarray) -> None:
        """One predict over DT and one update with the readings z."""
        m = self.model
        jac = jacobian(0.0, self.x, self.u_in, m.ip, m.fp)
        c = affine_input(self.u_in, m.ip, m.fp, m.n_states)
        phi, g, qd = reference_discretize(jac, c, self.w, DT)
        x_prior = self.x.copy()
        keep = np.ones(m.n_states, dtype=bool)
        keep[m.layout.activity] = False
        n_c = m.layout.n_concentrations
        x_prior[:n_c] = phi[:n_c][:, keep] @ self.x[keep] + g[:n_c]
        self.F = phi
        self.Q = qd
        self.predict()
        self.x = x_prior
        self.update(z, HJacobian=lambda _x: h, Hx=lambda x: h @ x, R=r)


def main() -> None:
    model = bench_model()
    scenario = Scenario(
        duration=STEPS * DT,
        step=DT,
        activity=Profile(((0.0, 1.0), (STEPS * DT / 2, 0.9))),
    )
    sim = simulate(model, scenario, seed=3, start=0.0)
    filt = CascadeFilter(model)
    # Initialise on the first sample's inputs only.
    tags, times, values = sim.columns()
    first = (times == 0.0) & np.array([t in filt.inputs for t in tags])
    filt.add_readings(
        [t for t, f in zip(tags, first, strict=True) if f], times[first], values[first]
    )
    x0, p0, u0 = filt.x.copy(), filt.cov.copy(), filt.u.copy()

    meas = [filt.measurement_index[m.tag] for m in model.config.measurements]
    z_all = np.empty((STEPS, len(meas)))
    by_tag = {tag: {} for tag in ("AI-203G", "LAB-202F")}
    for tag, t, v in sim.readings:
        if tag in by_tag:
            by_tag[tag][t] = v
    for k in range(STEPS):
        t = (k + 1) * DT
        z_all[k] = [by_tag["AI-203G"][t], by_tag["LAB-202F"][t]]
    ev_t = np.repeat(DT * np.arange(1, STEPS + 1), 2)
    ev_kind = np.full(2 * STEPS, KIND_MEASUREMENT, dtype=np.int64)
    ev_idx = np.tile(np.array(meas, dtype=np.int64), STEPS)
    ev_val = z_all.reshape(-1)

    def core_run() -> tuple[list[float], np.ndarray, np.ndarray]:
        """Run the core over every step, CHUNK steps a call; time per step of each call."""
        x, cov, u = x0.copy(), p0.copy(), u0.copy()
        n = model.n_states
        status = np.empty(2 * STEPS, dtype=np.int64)
        nis = np.empty(2 * STEPS)
        innov = np.empty(2 * STEPS)
        out_t = np.empty(STEPS)
        out_x = np.empty((STEPS, n))
        out_v = np.empty((STEPS, n))
        out_c = np.empty((STEPS, 2 * model.layout.n_vessels))
        out_u = np.empty((STEPS, model.n_inputs))
        out_r = np.empty((STEPS, 2))
        streak = np.zeros(len(filt.measurements), dtype=np.int64)
        monitor = filt._monitor.copy()
        cap = 1
        snaps = (
            np.empty(cap, dtype=np.int64), np.empty(cap), np.empty((cap, n)),
            np.empty((cap, n, n)), np.empty((cap, model.n_inputs)),
            np.empty((cap, len(filt.measurements)), dtype=np.int64),
            np.empty((cap, *monitor.shape)),
        )  # fmt: skip
        t = 0.0
        per_step = []
        for row in range(0, STEPS, CHUNK):
            t0 = time.perf_counter()
            t, _, _, _ = run_events(
                x, cov, u, t, ev_t, ev_kind, ev_idx, ev_val, 2 * row, 2 * (row + CHUNK),
                model.ip, model.fp, model.process_noise,
                filt._m_state, filt._m_bias, filt._m_var, filt._m_group, filt._gates,
                filt._lower, 0, streak, filt._init_var, filt._diverge, monitor, 1e30, 0.0,
                status, nis, innov, out_t[row:], out_x[row:], out_v[row:], out_c[row:],
                out_u[row:], *snaps, out_r[row:],
            )  # fmt: skip
            per_step.append((time.perf_counter() - t0) / CHUNK)
        return per_step, out_x, status

    core_run()  # compile / load from cache
    _, out_x, status = core_run()
    assert np.all(status == STATUS_ACCEPTED), "bench data must not be gated"

    h = np.zeros((2, model.n_states))
    for row, j in enumerate(meas):
        h[row, filt._m_state[j]] = 1.0
    r = np.diag(filt._m_var)
    ref = ReferenceEKF(model, x0, p0, u0)
    # Interleaved: a whole core run before each block of reference steps, so that
    # each block's ratio compares times taken within a fraction of a second of each
    # other (a shared machine's load changes over seconds, and would otherwise
    # favour whichever was timed in a quiet moment).
    core_times: list[float] = []
    ref_times: list[float] = []
    block_ratios: list[float] = []
    worst = 0.0
    for k in range(STEPS):
        if k % BLOCK == 0:
            chunks, _, _ = core_run()
            core_times += chunks
            core_now = statistics.median(chunks)
            block: list[float] = []
        t0 = time.perf_counter()
        ref.step(z_all[k], h, r)
        block.append(time.perf_counter() - t0)
        if len(block) == BLOCK:
            ref_times += block
            block_ratios.append(statistics.median(block) / core_now)
        rel = np.abs(out_x[k] - ref.x) / np.maximum(np.abs(ref.x), 1e-6)
        worst = max(worst, float(np.max(rel)))

    core = statistics.median(core_times)
    refm = statistics.median(ref_times)
    runs = len(core_times) // (STEPS // CHUNK)
    print(f"EKF step, {model.n_states} states ({model.layout.n_vessels} vessels x "
          f"{model.layout.n_species} species + activity), {STEPS} steps of {DT:g} s")  # fmt: skip
    print(f"  reference (filterpy EKF + scipy expm): {refm * 1e6:9.1f} us/step (median)")
    print(
        f"  core (compiled, estimator.filter):     {core * 1e6:9.2f} us/step "
        f"(median over {runs} runs of {CHUNK}-step calls)"
    )
    print(f"  ratio of the medians reference/core:   {refm / core:9.1f} x")
    print(
        f"  ratio reference/core, median of the {len(block_ratios)} interleaved blocks: "
        f"{statistics.median(block_ratios):.1f} x (range {min(block_ratios):.1f}-"
        f"{max(block_ratios):.1f}; target >= 30)"
    )
    print(f"  max relative state difference:         {worst:9.2e}     (target <= 1e-9)")

if __name__ == "__main__":
    main()
