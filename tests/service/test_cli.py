"""The command line: clear one-line errors, non-zero exits, and the demo's table."""

from __future__ import annotations

from pathlib import Path

from typer.testing import CliRunner

from service.cli import app

DEMO = Path("replay_data/wrenfield/train.toml")
runner = CliRunner()


def test_check_accepts_the_demo_train_and_reports_observability():
    result = runner.invoke(app, ["check", str(DEMO)])
    assert result.exit_code == 0
    assert "ok: wrenfield-line2, 3 vessels, 2 species" in result.output
    assert "all 8 states are observable" in result.output


def test_check_lists_every_problem_and_exits_2(tmp_path):
    text = DEMO.read_text()
    text = text.replace('volume = "9 m^3"', 'volume = "-9 m^3"')
    text = text.replace('k_ref = "0.8 1/h"', 'k_ref = "0.8 kg"')
    bad = tmp_path / "bad.toml"
    bad.write_text(text)
    result = runner.invoke(app, ["check", str(bad)])
    assert result.exit_code == 2
    assert "vessels[1].volume: must be positive" in result.output
    assert "reaction.k_ref:" in result.output


def test_check_warns_when_a_vessel_cannot_be_estimated(tmp_path):
    # Without the product analyzer and the lab sample only the feed is measured:
    # no vessel's contents can be estimated, and the report says what to measure.
    text = DEMO.read_text()
    head, _, _ = text.partition("[[measurements]]")
    head += text[text.index("[estimator]") :]
    sparse = tmp_path / "sparse.toml"
    sparse.write_text(head)
    result = runner.invoke(app, ["check", str(sparse)])
    assert result.exit_code == 0
    assert "warning:" in result.output
    assert "cannot estimate" in result.output
    assert "Consider measuring:" in result.output


def test_check_missing_file_is_one_line_and_exit_2(tmp_path):
    result = runner.invoke(app, ["check", str(tmp_path / "nope.toml")])
    assert result.exit_code == 2
    assert result.output.strip().count("\n") == 0


def test_demo_prints_estimates_beside_truth():
    result = runner.invoke(app, ["demo", "--hours", "2", "--seed", "3"])
    assert result.exit_code == 0, result.output
    assert "estimates" in result.output and "true" in result.output
    assert "monitoring aid, not a safety system" in result.output


def test_demo_refuses_a_non_positive_duration():
    result = runner.invoke(app, ["demo", "--hours", "0"])
    assert result.exit_code == 2
