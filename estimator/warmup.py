"""Bring the compiled filter kernels into memory before the first real reading.

numba compiles (or loads from its on-disk cache) each kernel the first time it is
called in a process: a second or so on the first call, then microseconds. A
service that met that on its first posted batch would stall every request queued
behind it; :func:`warm_up` runs one small invented train through the code paths
a plant's readings take (inputs, an analyzer update, a dead-time rewind, a late
reading, the alert rules, the design twin and the steady expectation), so the cost
is paid at start-up.
The kernels' types do not depend on the train, so one small train serves all.
"""

from __future__ import annotations

import time

from estimator.config import parse_train_config
from estimator.conversion import design_conversion
from estimator.session import TrainSession

#: A one-vessel, two-species train: the smallest that takes every code path.
_WARM_TRAIN = {
    "train": {"name": "warm-up", "species": ["A", "B"]},
    "vessels": [
        {
            "name": "V-1",
            "volume": "2 m^3",
            "temperature": {"tag": "T-1", "unit": "K", "nominal": "330 K"},
        }
    ],
    "feed": {
        "flow": {"tag": "F-1", "unit": "m^3/h", "nominal": "4 m^3/h"},
        "model": "state",
        "composition": {
            "A": {"tag": "A-0", "unit": "mol/m^3", "nominal": "1000 mol/m^3", "std": "10 mol/m^3"}
        },
    },
    "reaction": {
        "kind": "reversible",
        "reactant": "A",
        "product": "B",
        "k_ref": "1 1/h",
        "T_ref": "330 K",
        "activation_energy": "50 kJ/mol",
        "equilibrium_constant_ref": 2.0,
    },
    "measurements": [
        {
            "tag": "A-1",
            "species": "A",
            "location": "V-1",
            "std": "10 mol/m^3",
            "dead_time": "2 min",
        }
    ],
}


def warm_up() -> float:
    """Run the small invented train through every compiled path; return seconds taken."""
    began = time.perf_counter()
    session = TrainSession(parse_train_config(_WARM_TRAIN))
    t0 = 1.0e9
    for k in range(12):  # a minute apart: inputs, the feed analyzer, the product analyzer
        t = t0 + 60.0 * k
        session.ingest(["F-1", "T-1", "A-0"], [t, t, t], [4.0, 330.0, 1000.0])
        if k >= 2:
            session.ingest(["A-1"], [t], [700.0])  # its sample 2 min back: a rewind
    session.ingest(["A-0"], [t0 + 30.0], [1000.0])  # late: a rewind into the log
    session.flush_alerts()
    session.checkpoint()
    design_conversion(session.model, session.model.nominal_inputs()[None, :])  # "steady"
    return time.perf_counter() - began
