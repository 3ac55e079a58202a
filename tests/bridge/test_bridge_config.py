"""The bridge file: the example loads, conversions are right, every fault is named."""

from __future__ import annotations

from pathlib import Path

import pytest
from typer.testing import CliRunner

from estimator.errors import ConfigError
from service.bridge.config import load_bridge_config, parse_bridge_config
from service.cli import app

EXAMPLE = Path("deploy/bridge.example.toml")
runner = CliRunner()


def minimal(**extra: object) -> dict[str, object]:
    data: dict[str, object] = {
        "service": {"url": "http://127.0.0.1:8470", "key_env": "KEY"},
        "spool": {"path": "spool.db"},
        "sources": [{"kind": "csv_folder", "name": "exports", "folder": "in"}],
    }
    data.update(extra)
    return data


def problems(data: dict[str, object]) -> dict[str, str]:
    with pytest.raises(ConfigError) as caught:
        parse_bridge_config(data, base_dir=Path("/srv/bridge"))
    return {p.key: p.reason for p in caught.value.problems}


def test_the_example_file_loads_with_its_conversions():
    config = load_bridge_config(EXAMPLE)
    gains = {t.source_tag: t.gain_and_bias for t in config.tags}
    # 1 L/min = 1e-3 m^3 / (1/60 h) = 0.06 m^3/h  [C]
    assert gains["WF2.FI200.PV"] == pytest.approx((0.06, 0.0), rel=1e-12)
    # degC = (degF - 32) * 5/9: gain 5/9, bias -160/9  [C]
    gain, bias = gains["ns=2;s=Line2.R201.TT.PV"]
    assert gain == pytest.approx(5 / 9, rel=1e-12) and bias == pytest.approx(-160 / 9, rel=1e-12)
    assert gains["WF2.AI200G.PV"] == pytest.approx((1000.0, 0.0), rel=1e-12)
    assert gains["ns=2;s=Line2.R203.AT.Raw"] == (0.125, 0.0)
    csv_source = config.sources[0]
    assert csv_source.kind == "csv_folder"
    assert csv_source.column_separator == ";"  # a decimal comma makes ';' the default
    assert csv_source.done == Path("/srv/wrenfield/exports/incoming/done")
    assert config.status.interval == 60.0 and config.spool.keep_sent == 2 * 86400.0


def test_scaling_applies_before_the_unit_conversion():
    config = parse_bridge_config(
        minimal(
            tags=[
                {
                    "source_tag": "T",
                    "train": "l2",
                    "tag": "TI-1",
                    "scale": 0.1,
                    "offset": 30.0,
                    "unit": "degF",
                    "train_unit": "degC",
                }
            ]
        )
    )
    gain, bias = config.tags[0].gain_and_bias
    raw = 1000.0  # 0.1 * 1000 + 30 = 130 degF = 54.444... degC  [C]
    assert gain * raw + bias == pytest.approx((130.0 - 32.0) * 5 / 9, rel=1e-12)


def test_relative_paths_are_taken_from_the_file_folder():
    config = parse_bridge_config(minimal(), base_dir=Path("/srv/bridge"))
    assert config.spool.path == Path("/srv/bridge/spool.db")
    assert config.sources[0].folder == Path("/srv/bridge/in")
    assert config.sources[0].failed == Path("/srv/bridge/in/failed")


def test_every_problem_is_named_by_its_key():
    found = problems(
        {
            "service": {"url": "ftp://x", "timeout": 3},
            "spool": {"path": "s.db", "max_readings": 5},
            "sources": [
                {"kind": "csv_folder", "name": "a", "folder": "in", "time_zone": "Mars/Base"},
                {"kind": "csv_folder", "name": "b", "folder": "in", "decimal": ",",
                 "delimiter": ","},
                {"kind": "ftp", "name": "c"},
            ],
            "tags": [
                {"source_tag": "X", "train": "Line 2", "tag": "FI-200"},
                {"source_tag": "Y", "train": "l2", "tag": "FI-200", "unit": "bar",
                 "train_unit": "m^3/h"},
                {"source_tag": "Z", "train": "l2", "tag": "FI-200", "colour": "red"},
            ],
            "extra": 1,
        }
    )
    assert found["service.url"].startswith("must be an http:// or https:// URL")
    assert found["service.timeout"].startswith("give a unit")
    assert found["spool.max_readings"].startswith("input should be greater than or equal to 10")
    assert found["sources[0].time_zone"].startswith("unknown time zone 'Mars/Base'")
    assert found["sources[1].delimiter"] == "must differ from the decimal mark"
    assert found["sources[2]"] == "kind must be 'csv_folder' or 'opcua', got 'ftp'"
    assert "got 'Line 2'" in found["tags[0].train"]
    assert found["tags[1].unit"].startswith("cannot convert 'bar' to 'm^3/h'")
    assert found["tags[2].colour"] == "unknown key (check the spelling)"
    assert found["extra"] == "unknown key (check the spelling)"


def test_the_api_key_comes_from_a_file_or_a_variable_not_both():
    service = {"url": "http://127.0.0.1:8470", "key_env": "K", "key_file": "key"}
    found = problems(minimal(service=service))
    assert found["service.key_file"].startswith("give the API key's file (key_file) or its")


def opcua(**fields: object) -> dict[str, object]:
    return {
        "kind": "opcua",
        "name": "gw",
        "endpoint": "opc.tcp://127.0.0.1:4840",
        "security_policy": "None",
        **fields,
    }


def test_opcua_login_must_be_chosen_and_anonymous_is_never_implied():
    tag = {"source": "gw", "source_tag": "ns=2;s=A", "train": "l2", "tag": "TI-1"}
    assert problems(minimal(sources=[opcua()], tags=[tag]))["sources[0].user"].startswith(
        "choose a login"
    )
    config = parse_bridge_config(minimal(sources=[opcua(anonymous=True)], tags=[tag]))
    assert config.sources[0].kind == "opcua" and config.sources[0].anonymous
    # A password over an unsecured channel is refused outright.
    found = problems(minimal(sources=[opcua(user="op", password_env="PW")], tags=[tag]))
    assert "clear text" in found["sources[0].user"]
    found = problems(
        minimal(sources=[opcua(security_policy="Basic256Sha256", anonymous=True)], tags=[tag])
    )
    assert found["sources[0].certificate"] == "required with security_policy 'Basic256Sha256'"


def test_opcua_sources_need_nodes_and_node_ids_must_parse():
    found = problems(minimal(sources=[opcua(anonymous=True)]))
    assert found["sources[0]"].startswith("no [[tags]] entry names this source")
    bad = {"source": "gw", "source_tag": "Line2/FI200", "train": "l2", "tag": "FI-200"}
    found = problems(minimal(sources=[opcua(anonymous=True)], tags=[bad]))
    assert found["tags[0].source_tag"].startswith("not an OPC UA node id")
    stray = {"source": "nope", "source_tag": "A", "train": "l2", "tag": "FI-200"}
    assert problems(minimal(tags=[stray]))["tags[0].source"] == "no source named 'nope'"


def test_cli_prints_one_line_per_problem_and_exits_2(tmp_path: Path):
    bad = tmp_path / "bridge.toml"
    bad.write_text('[service]\nurl = "ftp://x"\nkey_env = "K"\n[spool]\npath = "s.db"\n')
    result = runner.invoke(app, ["bridge", "--config", str(bad)])
    assert result.exit_code == 2
    lines = result.output.strip().splitlines()
    assert lines == [
        f"error: {bad}: service.url: must be an http:// or https:// URL, got 'ftp://x'",
        f"error: {bad}: sources: required",
    ]


def test_cli_missing_file_and_missing_key_are_one_line_and_exit_2(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
):
    # The command would send stagewatch's logs to stderr for good; not inside pytest.
    monkeypatch.setattr("service.bridge.runner.configure_logging", lambda json_lines: None)
    result = runner.invoke(app, ["bridge", "--config", str(tmp_path / "nope.toml")])
    assert result.exit_code == 2
    assert result.output.strip() == f"error: {tmp_path / 'nope.toml'} does not exist"
    (tmp_path / "in").mkdir()
    good = tmp_path / "bridge.toml"
    good.write_text(
        '[service]\nurl = "http://127.0.0.1:9"\nkey_env = "STAGEWATCH_BRIDGE_NO_SUCH_KEY"\n'
        '[spool]\npath = "s.db"\n'
        '[[sources]]\nkind = "csv_folder"\nname = "a"\nfolder = "in"\n'
    )
    result = runner.invoke(app, ["bridge", "--config", str(good), "--once"])
    assert result.exit_code == 2
    assert result.output.strip() == (
        f"error: {good}: service.key_env: the environment variable "
        "STAGEWATCH_BRIDGE_NO_SUCH_KEY is not set"
    )
