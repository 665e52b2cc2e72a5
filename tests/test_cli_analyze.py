"""The `upright analyze` command end to end: JSON contract, emitted config, errors."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
import yaml
from typer.testing import CliRunner

from sandbox.analysis import analyze
from sandbox.cli import app
from sandbox.robot import load_robot

ROOT = Path(__file__).resolve().parent.parent
ROBOT = ROOT / "robots" / "shelf-runner.yaml"
runner = CliRunner()


def test_json_has_the_contract_keys_and_matches_the_library():
    """`analyze --json` carries DESIGN.md's keys, and its gain is the library's LQR gain.

    Reference: the LQR gain solves the CARE (SOURCES.md §8); it is checked against
    python-control in tests/test_analysis.py; here the command must pass it through.
    """
    result = runner.invoke(app, ["analyze", str(ROBOT), "--json"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    for key in ("state", "A", "B", "open_loop_poles", "lqr_q", "lqr_r", "lqr_gain"):
        assert key in data, f"missing key {key}"
    assert data["state"] == ["x_m", "v_m_s", "pitch_rad", "pitch_rate_rad_s"]
    assert np.array(data["A"]).shape == (4, 4) and np.array(data["B"]).shape == (4, 1)
    expected = analyze(load_robot(ROBOT))
    assert np.allclose(data["lqr_gain"], expected["lqr_gain"], rtol=1e-12)
    assert all(len(pole) == 2 for pole in data["open_loop_poles"]), "poles as [re, im] pairs"


def test_weights_from_the_command_line_reach_the_design():
    """--q and --r set the LQR weights (Q diagonal, R) exactly."""
    result = runner.invoke(app, ["analyze", str(ROBOT), "--json", "--q", "1,0,10,0", "--r", "100"])
    assert result.exit_code == 0, result.output
    data = json.loads(result.output)
    assert np.allclose(np.diag(data["lqr_q"]), [1, 0, 10, 0])
    assert np.allclose(np.ravel(data["lqr_r"]), [100])


@pytest.mark.parametrize("controller", ["pid_tilt", "cascade"])
def test_emitted_config_is_accepted_by_the_controller(tmp_path, controller):
    """--emit-config writes a YAML mapping that `upright run --config` accepts and that
    keeps shelf-runner up for 3 s from a 3° start (suggested gains from the discrete LQR)."""
    config = tmp_path / f"{controller}.yaml"
    result = runner.invoke(app, ["analyze", str(ROBOT), "--emit-config", str(config),
                                 "--for", controller])
    assert result.exit_code == 0, result.output
    values = yaml.safe_load(config.read_text())
    assert isinstance(values, dict) and values, "a non-empty mapping"
    run = runner.invoke(app, ["run", str(ROBOT), str(ROOT / "controllers" / f"{controller}.py"),
                              "--config", str(config), "--duration", "3", "--tilt", "3",
                              "--out", str(tmp_path / "run"), "--no-plots"])
    assert run.exit_code == 0, run.output


@pytest.mark.parametrize("args, needle", [
    (["--q", "1,2,3"], "expected 4 numbers"),
    (["--q", "a,b,c,d"], "expected 4 numbers"),
    (["--set", "wheels.trak=3"], "did you mean 'track'"),
])
def test_bad_arguments_exit_2_with_a_plain_message(args, needle):
    """Bad input: exit code 2, a one-line message, no traceback (DESIGN.md exit codes)."""
    result = runner.invoke(app, ["analyze", str(ROBOT), *args])
    assert result.exit_code == 2, result.output
    assert needle in result.output
    assert "Traceback" not in result.output
