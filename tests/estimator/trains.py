"""Build train descriptions for tests from a compact dict, through the real config parser.

A test says only what it cares about::

    train_model({"volumes": ["2 m^3", "3 m^3"], "k_ref": "0.5 1/s"})

and everything else takes the defaults in :data:`DEFAULTS`. Quantities are written
with their units, as in a configuration file, and go through
:func:`estimator.config.parse_train_config`, so the tests exercise the unit handling
too. Keys of the compact form:

``species``            declared species, state order within a vessel
``volumes``            one volume per vessel, flow order (this sets N)
``temperatures``       one temperature for every vessel, or one per vessel; each
                       becomes a temperature tag with that nominal
``flow``               nominal feed flow
``feed``               analyzed feed species -> nominal concentration (tagged)
``fixed_feed``         feed species -> fixed concentration (no tag)
``feed_model``         ``"input"`` or ``"state"``
``feed_std``           analyzer 1-sigma, used with ``feed_model = "state"``
``bias``               analyzed feed species whose analyzer carries a bias state
``kind``               ``"irreversible"`` or ``"reversible"``
``reactant``, ``product``
``k_ref``, ``T_ref``, ``activation_energy``
``equilibrium_constant_ref``, ``reaction_enthalpy``   reversible only
``estimate_activity``
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from estimator.config import TrainConfig, parse_train_config
from estimator.model import TrainModel

DEFAULTS: dict[str, Any] = {
    "species": ("A", "B"),
    "volumes": ("1 m^3",),
    "temperatures": "350 K",
    "flow": "1 m^3/s",
    "feed": {"A": "1000 mol/m^3"},
    "fixed_feed": {},
    "feed_model": "input",
    "feed_std": "10 mol/m^3",
    "bias": (),
    "kind": "irreversible",
    "reactant": "A",
    "product": "B",
    "k_ref": "0.5 1/s",
    "T_ref": "350 K",
    "activation_energy": "0 kJ/mol",
    "equilibrium_constant_ref": None,
    "reaction_enthalpy": None,
    "estimate_activity": False,
}


def train_document(spec: Mapping[str, Any] | None = None, **overrides: Any) -> dict[str, Any]:
    """Expand a compact spec (plus keyword overrides) into a full config document."""
    unknown = set(spec or {}) | set(overrides)
    unknown -= DEFAULTS.keys()
    if unknown:
        raise KeyError(f"unknown train spec keys: {sorted(unknown)}")
    s = {**DEFAULTS, **(spec or {}), **overrides}
    volumes = list(s["volumes"])
    temperatures = s["temperatures"]
    if isinstance(temperatures, str):
        temperatures = [temperatures] * len(volumes)
    if len(temperatures) != len(volumes):
        raise ValueError("give one temperature, or one per vessel")

    vessels = [
        {
            "name": f"R-{i + 1}",
            "volume": volume,
            "temperature": {"tag": f"TI-{i + 1}", "unit": "K", "nominal": temperature},
        }
        for i, (volume, temperature) in enumerate(zip(volumes, temperatures, strict=True))
    ]
    composition: dict[str, Any] = dict(s["fixed_feed"])
    for j, (name, nominal) in enumerate(s["feed"].items()):
        tag: dict[str, Any] = {"tag": f"AI-{j}", "unit": "mol/m^3", "nominal": nominal}
        if s["feed_model"] == "state":
            tag["std"] = s["feed_std"]
            if name in s["bias"]:
                tag["bias"] = True
        composition[name] = tag

    reaction: dict[str, Any] = {
        "kind": s["kind"],
        "reactant": s["reactant"],
        "product": s["product"],
        "k_ref": s["k_ref"],
        "T_ref": s["T_ref"],
        "activation_energy": s["activation_energy"],
    }
    if s["kind"] == "reversible":
        reaction["equilibrium_constant_ref"] = s["equilibrium_constant_ref"]
        if s["reaction_enthalpy"] is not None:
            reaction["reaction_enthalpy"] = s["reaction_enthalpy"]

    return {
        "train": {"name": "test-train", "species": list(s["species"])},
        "vessels": vessels,
        "feed": {
            "flow": {"tag": "FI-1", "unit": "m^3/s", "nominal": s["flow"]},
            "model": s["feed_model"],
            "composition": composition,
        },
        "reaction": reaction,
        "measurements": [],
        "estimator": {"estimate_activity": s["estimate_activity"]},
    }


def train_config(spec: Mapping[str, Any] | None = None, **overrides: Any) -> TrainConfig:
    """Validated :class:`TrainConfig` for a compact spec."""
    return parse_train_config(train_document(spec, **overrides))


def train_model(spec: Mapping[str, Any] | None = None, **overrides: Any) -> TrainModel:
    """:class:`TrainModel` for a compact spec."""
    return TrainModel.from_config(train_config(spec, **overrides))


def quantity(value: float, unit: str) -> str:
    """Write a number with its unit, exactly (``repr`` of a float keeps every digit)."""
    return f"{float(value)!r} {unit}"
