"""`upright run --isolate`: a controller that hangs is stopped, and nothing is lost."""

from __future__ import annotations

import json
from pathlib import Path

from typer.testing import CliRunner

from sandbox.cli import app

ROOT = Path(__file__).resolve().parents[1]
SHELF_RUNNER = str(ROOT / "robots" / "shelf-runner.yaml")


def test_an_endless_step_ends_the_run_as_a_controller_error(tmp_path: Path) -> None:
    """An endless loop in step(): exit 3 after the step timeout, summary and trace kept."""
    out = tmp_path / "run"
    result = CliRunner().invoke(app, [
        "run", SHELF_RUNNER, str(ROOT / "tests" / "controllers" / "endless.py"), "--isolate",
        "--step-timeout", "0.5", "--duration", "0.5", "--out", str(out), "--no-plots"])
    assert result.exit_code == 3, result.output
    assert "longer than" in result.output
    summary = json.loads((out / "summary.json").read_text())
    assert summary["status"] == "controller_error"
    assert (out / "trace.csv").read_text().startswith("t_s,")


def test_isolated_and_in_process_runs_write_the_same_trace(tmp_path: Path) -> None:
    """The same seed gives the same trace bytes whether the controller is isolated or not."""
    traces = []
    for flag in ([], ["--isolate"]):
        out = tmp_path / ("iso" if flag else "here")
        result = CliRunner().invoke(app, [
            "run", SHELF_RUNNER, str(ROOT / "controllers" / "cascade.py"), "--duration", "1",
            "--out", str(out), "--no-plots", *flag])
        assert result.exit_code == 0, result.output
        traces.append((out / "trace.csv").read_bytes())
    assert traces[0] == traces[1]


def test_step_timeout_out_of_range_is_bad_input() -> None:
    result = CliRunner().invoke(app, [
        "run", SHELF_RUNNER, str(ROOT / "controllers" / "cascade.py"), "--isolate",
        "--step-timeout", "nan"])
    assert result.exit_code == 2
    assert "--step-timeout must be a number from 0.001 to 60 s" in result.output
