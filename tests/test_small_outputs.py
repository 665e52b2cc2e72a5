"""Small things a new user sees: flags without <bool>, no progress lines in logs, clipped
duties in the run table, tune verdicts in words, results.csv columns and units, and rates
the physics step divides near the one asked for. No engine runs here."""

from __future__ import annotations

import csv
import io
import sys
from types import SimpleNamespace

import numpy as np
from typer.testing import CliRunner

from sandbox import cli
from sandbox.rates import fits, nearby_rates, round_rates
from sandbox.sweep.jobs import check_entry
from sandbox.sweep.store import read_results, results_csv_text
from sandbox.sweep.tune import verdict_text


def test_help_shows_no_bool_on_plain_flags():
    result = CliRunner().invoke(cli.app, ["run", "--help"], env={"COLUMNS": "120"})
    assert result.exit_code == 0
    assert "<bool>" not in result.output and "--video" in result.output


def test_progress_is_silent_when_stderr_is_not_a_terminal(monkeypatch):
    """No 'frames'/'tests' label left behind in a log, and no carriage-return lines."""
    stream = io.StringIO()
    monkeypatch.setattr(sys, "stderr", stream)
    with cli._progress_bar(9, "tests") as bar:
        for _ in range(9):
            bar.update(1)
    line = cli._ProgressLine("runs")
    line(1, 4)
    line.close()
    assert stream.getvalue() == ""


def test_run_table_says_how_many_duties_were_clipped(capsys):
    summary = {"status": "completed", "duration_s": 1.0, "fell_at_s": None,
               "max_abs_pitch_deg": 1.0, "rms_pitch_deg": 0.5, "drift_m": 0.0,
               "saturation_fraction": 0.1, "realtime_factor": 10.0, "clipped_duties": 20}
    result = SimpleNamespace(summary=summary, trace={"t_s": np.zeros(200)}, message="",
                             status="completed")
    cli._print_run(result, None)
    out = capsys.readouterr().out
    assert "duties clipped" in out and "20 of 200 ticks (10.0 %)" in out
    assert cli._clipped_text(0, 200) == "none"


def test_tune_verdicts_say_what_happened():
    assert verdict_text({"passed": True, "status": "completed"}) == "passed"
    assert verdict_text({"passed": False, "status": "fell", "fell_at_s": 2.345}) == \
        "fell at 2.35 s"
    checks = [check_entry({"label": "position held", "limit": "0.5 m", "value": 0.8,
                           "passed": False}),
              check_entry({"label": "stays up", "limit": "0", "value": 0.0, "passed": True})]
    row = {"passed": False, "status": "completed", "checks": checks}
    assert verdict_text(row) == "failed: position held"
    assert verdict_text({"passed": False, "status": "controller_error"}) == "controller error"


def test_results_csv_passed_columns_and_unit_row(tmp_path):
    """passed.<check> is 1 when the check passed; measured.<check>_<unit> its figure; the
    second row gives each column's unit."""
    checks = [check_entry({"label": "stays up", "limit": "0", "value": 0.0, "passed": True}),
              check_entry({"label": "position held", "limit": "1.02 m", "value": 1.5,
                           "passed": False})]
    row = {"index": 0, "cell": 0, "sample": 0, "seed": 0, "status": "completed",
           "passed": False, "max_abs_pitch_deg": 3.0, "checks": checks,
           "values": {"wheels.radius": 0.034, "config.kp": 4.0}, "message": ""}
    text = results_csv_text(["wheels.radius", "config.kp"], [row])
    rows = list(csv.DictReader(io.StringIO(text)))
    units, point = rows
    assert point["passed.stays_up"] == "1" and point["passed.position_held"] == "0"
    assert point["passed"] == "0" and float(point["measured.position_held_m"]) == 1.5
    assert "measured.stays_up" not in point, "the fall flag is already in status"
    assert units["index"] == "unit:" and units["wheels.radius"] == "m"
    assert units["measured.position_held_m"] == "m" and units["max_abs_pitch_deg"] == "deg"
    assert units["passed.stays_up"] == "1 = passed"
    path = tmp_path / "results.csv"
    path.write_text(text, encoding="utf-8")
    assert [r["index"] for r in read_results(path)] == ["0"]


def test_nearby_rates_are_ones_the_step_divides():
    """30 Hz at 1 ms: 25, 40 and 50 Hz (periods of 40, 25 and 20 steps); every suggestion
    fits the step; a round smaller step is offered where one fits the asked rate."""
    assert nearby_rates(1e-3, 30.0) == "25, 40 or 50 Hz"
    assert "--physics-step 0.25" in nearby_rates(1e-3, 800.0)
    for dt, rate in ((1e-3, 30.0), (2e-3, 300.0), (1e-3, 333.0), (3e-4, 30.0)):
        text = nearby_rates(dt, rate)
        for word in text.split(" Hz")[0].replace(" or ", ", ").split(", "):
            assert fits(dt, float(word)) or abs(1 / (float(word) * dt) - round(
                1 / (float(word) * dt))) < 1e-3, (dt, rate, text)
    assert round_rates(1e-3)[:4] == [1000.0, 500.0, 250.0, 200.0]
