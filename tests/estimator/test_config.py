import copy
import json
import tomllib
from pathlib import Path
from typing import Any

import pytest
from pydantic import ValidationError

from estimator.config import (
    ConcentrationTag,
    EstimatorConfig,
    FlowTag,
    TagInput,
    TemperatureTag,
    TrainConfig,
    VesselConfig,
    load_train_config,
    parse_train_config,
)
from estimator.errors import ConfigError, ConfigProblem, ReadingRefused

DEMO = Path(__file__).resolve().parents[2] / "replay_data" / "wrenfield" / "train.toml"


@pytest.fixture(scope="module")
def demo() -> TrainConfig:
    return load_train_config(DEMO)


@pytest.fixture()
def raw() -> dict[str, Any]:
    with DEMO.open("rb") as handle:
        return tomllib.load(handle)


def problems_of(data: dict[str, Any]) -> dict[str, str]:
    with pytest.raises(ConfigError) as caught:
        parse_train_config(data)
    return {p.key: p.reason for p in caught.value.problems}


def test_demo_train_loads_in_si(demo: TrainConfig) -> None:
    assert demo.name == "wrenfield-line2"
    assert demo.species == ("glucose", "fructose")
    assert [v.name for v in demo.vessels] == ["R-201", "R-202", "R-203"]
    assert demo.vessels[0].volume == 14.0
    assert demo.feed.flow.nominal == pytest.approx(1.0 / 300.0, rel=1e-14)  # 12 m^3/h
    assert demo.feed.flow.range == pytest.approx((0.0, 40.0 / 3600.0))
    assert isinstance(demo.vessels[0].temperature, TemperatureTag)
    assert demo.vessels[0].temperature.nominal == pytest.approx(331.15)
    assert demo.vessels[0].temperature.range == pytest.approx((273.15, 368.15))
    assert demo.vessels[2].temperature == pytest.approx(330.15)  # fixed 57 degC
    assert demo.vessels[2].nominal_temperature == pytest.approx(330.15)
    assert demo.reaction.activation_energy == pytest.approx(62_000.0)
    assert demo.reaction.k_ref == pytest.approx(0.8 / 3600.0, rel=1e-14)
    assert demo.reaction.T_ref == pytest.approx(331.15)
    assert demo.reaction.equilibrium_constant_ref == 1.05
    assert demo.reaction.reaction_enthalpy == pytest.approx(5000.0)
    assert demo.reaction.valid_temperature == pytest.approx((318.15, 343.15))
    glucose = demo.feed.composition["glucose"]
    assert isinstance(glucose, ConcentrationTag)
    assert glucose.nominal == pytest.approx(2400.0)
    assert glucose.std == pytest.approx(25.0)
    assert demo.feed.composition["fructose"] == 0.0
    assert demo.measurements[0].dead_time == pytest.approx(240.0)
    assert demo.measurements[0].std == pytest.approx(20.0)
    assert demo.measurements[1].kind == "lab"
    assert demo.estimator.horizon == pytest.approx(6 * 3600.0)
    # 0.3 mol/m^3 and 0.006 over 1 h: intensity sigma^2 / per
    assert demo.estimator.concentration_noise.intensity == pytest.approx(0.09 / 3600.0)
    assert demo.estimator.activity_noise.intensity == pytest.approx(3.6e-5 / 3600.0)
    assert demo.estimator.initial_std.feed == pytest.approx(50.0)


def test_tag_units_give_the_reading_map(demo: TrainConfig) -> None:
    temperature = demo.vessels[0].temperature
    assert isinstance(temperature, TemperatureTag)
    assert (temperature.scale, temperature.offset) == (1.0, 273.15)
    assert demo.feed.flow.scale * 12.0 + demo.feed.flow.offset == pytest.approx(1.0 / 300.0)
    assert (demo.measurements[0].scale, demo.measurements[0].offset) == (1.0, 0.0)


def test_tags_map_every_tag_to_its_role(demo: TrainConfig) -> None:
    assert demo.tags() == {
        "FI-200": "flow",
        "TI-201": "temperature:R-201",
        "TI-202": "temperature:R-202",
        "AI-200G": "feed:glucose",
        "AI-203G": "measurement:AI-203G",
        "LAB-202F": "measurement:LAB-202F",
    }


def test_indices(demo: TrainConfig) -> None:
    assert demo.species_index("fructose") == 1
    assert demo.vessel_index("R-203") == 2
    with pytest.raises(ValueError, match="unknown species 'xylose'"):
        demo.species_index("xylose")
    with pytest.raises(ValueError, match="unknown vessel 'R-9'"):
        demo.vessel_index("R-9")


def test_json_file_loads_to_the_same_train(
    demo: TrainConfig, raw: dict[str, Any], tmp_path: Path
) -> None:
    path = tmp_path / "train.json"
    path.write_text(json.dumps(raw), encoding="utf-8")
    assert load_train_config(path) == demo


def test_models_are_frozen(demo: TrainConfig) -> None:
    with pytest.raises(ValidationError):
        demo.vessels[0].volume = 3.0  # type: ignore[misc]


def test_estimator_section_is_optional_and_takes_the_defaults(
    demo: TrainConfig, raw: dict[str, Any]
) -> None:
    del raw["estimator"], raw["measurements"]
    config = parse_train_config(raw)
    assert config.estimator == EstimatorConfig()
    # The demo tunes its process noise to its own month; the rest are the defaults.
    tuned = {"concentration_noise", "activity_noise", "feed_noise"}
    for name in EstimatorConfig.model_fields:
        same = getattr(demo.estimator, name) == getattr(config.estimator, name)
        assert same != (name in tuned), name
    assert config.measurements == ()
    assert config.estimator.feed_noise.intensity == pytest.approx(900.0 / 3600.0)


def test_species_missing_from_feed_are_fixed_at_zero_in_species_order(raw: dict[str, Any]) -> None:
    raw["train"]["species"] = ["glucose", "fructose", "mannose"]
    del raw["feed"]["composition"]["fructose"]
    config = parse_train_config(raw)
    assert list(config.feed.composition) == ["glucose", "fructose", "mannose"]
    assert config.feed.composition["fructose"] == 0.0
    assert isinstance(config.feed.composition["mannose"], float)


def test_zero_nominal_flow_is_allowed(raw: dict[str, Any]) -> None:
    raw["feed"]["flow"]["nominal"] = "0 m^3/h"
    assert parse_train_config(raw).feed.flow.nominal == 0.0


BAD_TRAIN = """
[train]
name = "wrenfield-line2"
species = ["glucose", "fructose"]

[[vessels]]
name = "R-201"
volume = "14 m^3"
temperature = { tag = "TI-201", unit = "degC", nominal = "58 degC" }

[[vessels]]
name = "R-202"
volume = "-3 m^3"
temperature = { tag = "TI-201", unit = "degC", nominal = "58 degC" }

[[vessels]]
name = "R-203"
volume = 6
temperature = "57 degC"

[feed]
flow = { tag = "FI-200", unit = "m^3/h", nominal = "12 kg" }
[feed.composition]
glucose = { tag = "AI-200G", unit = "mol/m^3", nominal = "2.4 kmol/m^3", std = "25 mol/m^3" }

[reaction]
kind = "irreversible"
reactant = "glucose"
product = "fructose"
k_ref = "0.8 1/h"
T_ref = "58 degC"
activaton_energy = "62 kJ/mol"

[[measurements]]
tag = "AI-203G"
species = "sucrose"
location = "R-203"
std = "20 mol/m^3"
"""


def test_bad_file_gives_one_problem_per_fault(tmp_path: Path) -> None:
    path = tmp_path / "bad.toml"
    path.write_text(BAD_TRAIN, encoding="utf-8")
    with pytest.raises(ConfigError) as caught:
        load_train_config(path)
    problems = {p.key: p.reason for p in caught.value.problems}
    assert len(caught.value.problems) == len(problems)  # no key reported twice
    assert problems == {
        "vessels[1].volume": "must be positive, got -3 m^3",
        "vessels[2].volume": "give a unit, e.g. '8 m^3' (got the bare number 6)",
        "feed.flow.nominal": "expected a volumetric flow such as '20 m^3/h', got '12 kg'",
        "reaction.activaton_energy": "unknown key (check the spelling)",
        "reaction.activation_energy": "required",
        "measurements[0].species": "'sucrose' is not a declared species "
        "(declared: glucose, fructose)",
        "vessels[1].temperature.tag": "tag 'TI-201' is already used by vessels[0].temperature",
    }
    message = str(caught.value)
    assert message.splitlines()[0] == f"invalid {path} (7 problems):"
    assert "  vessels[1].volume: must be positive, got -3 m^3" in message.splitlines()


@pytest.mark.parametrize(
    ("edit", "key", "reason"),
    [
        (lambda d: d["train"].update(name="Line 2"), "train.name", "lowercase letters"),
        (lambda d: d["train"].pop("species"), "train.species", "required"),
        (lambda d: d["train"].update(specis=["a"]), "train.specis", "unknown key"),
        (lambda d: d["train"]["species"].append("glucose"), "train.species[2]", "declared twice"),
        (lambda d: d["train"].update(species=[]), "train.species", "1 to 6 species"),
        (lambda d: d.update(vessels=[]), "vessels", "1 to 20 vessels"),
        (
            lambda d: d["vessels"][0].update(name="R-202"),
            "vessels[1].name",
            "'R-202' is already the name of vessels[0]",
        ),
        (lambda d: d["vessels"][0].update(name="feed"), "vessels[0].name", "reserved"),
        (
            lambda d: d["vessels"][2].update(temperature="-300 degC"),
            "vessels[2].temperature",
            "above absolute zero",
        ),
        (
            lambda d: d["vessels"][0]["temperature"].update(unit="bar"),
            "vessels[0].temperature.unit",
            "expected a unit of a temperature",
        ),
        (
            lambda d: d["vessels"][0]["temperature"].update(range=["95 degC", "0 degC"]),
            "vessels[0].temperature.range",
            "low end must be below high end, got [95 degC, 0 degC]",
        ),
        (
            lambda d: d["vessels"][0]["temperature"].update(nominal="99 degC"),
            "vessels[0].temperature.nominal",
            "must lie inside range [0 degC, 95 degC], got 99 degC",
        ),
        (
            lambda d: d["vessels"][0]["temperature"].update(bias=True),
            "vessels[0].temperature.bias",
            "only feed composition analyzers",
        ),
        (lambda d: d["feed"]["flow"].update(nominal="-1 m^3/h"), "feed.flow.nominal", "negative"),
        (lambda d: d["feed"].update(model="filtered"), "feed.model", "'state' or 'input'"),
        (
            lambda d: d["feed"]["composition"]["glucose"].pop("std"),
            "feed.composition.glucose.std",
            "required when feed.model = 'state'",
        ),
        (
            lambda d: (
                d["feed"].update(model="input"),
                d["feed"]["composition"]["glucose"].update(bias=True),
            ),
            "feed.composition.glucose.bias",
            "only when feed.model = 'state'",
        ),
        (
            lambda d: d["feed"]["composition"].update(xylose="0 mol/m^3"),
            "feed.composition.xylose",
            "not a declared species",
        ),
        (lambda d: d["reaction"].update(product="glucose"), "reaction.product", "must differ"),
        (lambda d: d["reaction"].update(reactant="sucrose"), "reaction.reactant", "not a declared"),
        (lambda d: d["reaction"].update(kind="second-order"), "reaction.kind", "'irreversible'"),
        (
            lambda d: d["reaction"].pop("equilibrium_constant_ref"),
            "reaction.equilibrium_constant_ref",
            "required when kind = 'reversible'",
        ),
        (
            lambda d: d["reaction"].update(kind="irreversible"),
            "reaction.equilibrium_constant_ref",
            "only when kind = 'reversible'",
        ),
        (lambda d: d["reaction"].update(k_ref="0 1/h"), "reaction.k_ref", "must be positive"),
        (lambda d: d["reaction"].update(k_ref="0.8 1/m"), "reaction.k_ref", "rate constant"),
        (
            lambda d: d["reaction"].update(valid_temperature=["70 degC"]),
            "reaction.valid_temperature",
            "pair [low, high]",
        ),
        (
            lambda d: d["measurements"][0].update(location="R-209"),
            "measurements[0].location",
            "'R-209' is not a vessel (vessels: R-201, R-202, R-203)",
        ),
        (
            lambda d: d["measurements"][0].update(location="feed"),
            "measurements[0].location",
            "declared in feed.composition",
        ),
        (
            lambda d: d["measurements"][1].update(tag="AI-200G"),
            "measurements[1].tag",
            "already used by feed.composition.glucose",
        ),
        (lambda d: d["measurements"][0].update(std="0 mol/m^3"), "measurements[0].std", "positive"),
        (
            lambda d: d["measurements"][0].update(unit="g/L"),
            "measurements[0].unit",
            "concentration",
        ),
        (lambda d: d["measurements"][0].update(kind="online"), "measurements[0].kind", "'lab'"),
        (
            lambda d: d["estimator"].update(gate_probability=1.0),
            "estimator.gate_probability",
            "must be less than 1",
        ),
        (lambda d: d["estimator"].update(horizon=6), "estimator.horizon", "give a unit"),
        (
            lambda d: d["estimator"]["initial_std"].update(activity=-0.2),
            "estimator.initial_std.activity",
            "must not be negative, got -0.2",
        ),
        (
            lambda d: d["estimator"]["feed_noise"].update(per="0 h"),
            "estimator.feed_noise.per",
            "positive",
        ),
        (
            lambda d: d["estimator"]["activity_noise"].update(sigma="0.01 mol/m^3"),
            "estimator.activity_noise.sigma",
            "dimensionless",
        ),
        (
            lambda d: d["estimator"].update(estimate_activity="yes"),
            "estimator.estimate_activity",
            "true or false",
        ),
        (lambda d: d.update(sensors=[]), "sensors", "unknown key (check the spelling)"),
        (lambda d: d["vessels"][0].update(name=""), "vessels[0].name", "must not be empty"),
        (
            lambda d: d["measurements"][0].update(tag="AI-203G "),
            "measurements[0].tag",
            "must not begin or end with spaces",
        ),
        (lambda d: d["vessels"][0].update(volume=True), "vessels[0].volume", "got True"),
    ],
)
def test_each_fault_is_reported_at_its_key(
    raw: dict[str, Any], edit: Any, key: str, reason: str
) -> None:
    edit(raw)
    problems = problems_of(raw)
    assert set(problems) == {key}
    assert reason in problems[key]


def test_faults_are_all_collected_not_just_the_first(raw: dict[str, Any]) -> None:
    raw["vessels"][0]["volume"] = "14 kg"
    raw["reaction"]["k_ref"] = "fast"
    raw["estimator"]["horizon"] = "-1 h"
    raw["measurements"][0]["species"] = "sucrose"
    assert set(problems_of(raw)) == {
        "vessels[0].volume",
        "reaction.k_ref",
        "estimator.horizon",
        "measurements[0].species",
    }


def test_flat_mapping_without_a_train_table_is_accepted(
    demo: TrainConfig, raw: dict[str, Any]
) -> None:
    flat = {**raw.pop("train"), **raw}
    assert parse_train_config(flat) == demo
    del flat["name"]
    assert set(problems_of(flat)) == {"train.name"}


def test_train_table_may_not_hold_sections(raw: dict[str, Any]) -> None:
    raw["train"]["reaction"] = copy.deepcopy(raw["reaction"])
    assert problems_of(raw) == {
        "train.reaction": "'reaction' is a section of its own, not a train key"
    }


def test_toml_syntax_error_names_line_and_column(tmp_path: Path) -> None:
    path = tmp_path / "broken.toml"
    path.write_text('[train]\nname = "x\n', encoding="utf-8")
    with pytest.raises(ConfigError) as caught:
        load_train_config(path)
    (problem,) = caught.value.problems
    assert problem.key == "<file>"
    assert "line 2" in problem.reason
    assert caught.value.source == str(path)


def test_json_syntax_error_names_line_and_column(tmp_path: Path) -> None:
    path = tmp_path / "broken.json"
    path.write_text('{\n  "train": {,}\n}', encoding="utf-8")
    with pytest.raises(ConfigError) as caught:
        load_train_config(path)
    (problem,) = caught.value.problems
    assert problem.key == "<file>"
    assert "line 2, column 13" in problem.reason


def test_unreadable_or_unknown_files_are_config_errors(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="cannot read the file"):
        load_train_config(tmp_path / "missing.toml")
    yaml = tmp_path / "train.yaml"
    yaml.write_text("name: x\n", encoding="utf-8")
    with pytest.raises(ConfigError, match="unknown file type '.yaml'"):
        load_train_config(yaml)


def test_python_callers_build_models_in_si(demo: TrainConfig) -> None:
    assert TrainConfig.model_validate(demo.model_dump()) == demo
    vessel = VesselConfig(name="R-1", volume=8.0, temperature=330.0)
    assert vessel.nominal_temperature == 330.0
    flow = FlowTag.model_validate({"tag": "F", "unit": "m^3/h", "nominal": "12 m^3/h"})
    assert flow.nominal == pytest.approx(1.0 / 300.0)
    with pytest.raises(TypeError, match="no dimension"):
        TagInput(tag="X", unit="degC", nominal=300.0)


def test_python_callers_get_the_cross_checks_too(demo: TrainConfig) -> None:
    data = demo.model_dump()
    data["measurements"][0]["location"] = "R-209"
    with pytest.raises(ValidationError, match="'R-209' is not a vessel"):
        TrainConfig.model_validate(data)


def test_error_texts() -> None:
    problem = ConfigProblem("vessels[1].volume", "must be positive, got -3 m^3")
    assert str(problem) == "vessels[1].volume: must be positive, got -3 m^3"
    error = ConfigError([problem, ConfigProblem("reaction.k_ref", "required")])
    assert str(error).splitlines() == [
        "invalid train config (2 problems):",
        "  vessels[1].volume: must be positive, got -3 m^3",
        "  reaction.k_ref: required",
    ]
    refused = ReadingRefused("AI-203G", "older than the 6 h horizon")
    assert (refused.tag, refused.reason) == ("AI-203G", "older than the 6 h horizon")
    assert str(refused) == "reading of tag 'AI-203G' refused: older than the 6 h horizon"
