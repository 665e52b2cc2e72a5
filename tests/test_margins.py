"""`upright margins`: the bisection itself, the stresses it applies, and one real search."""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

import pytest
from ideal_parts import ideal_robot
from typer.testing import CliRunner

from sandbox.analysis import analyze, emit_config
from sandbox.cli import app
from sandbox.margins import Bracket, Stress, apply_stress, find_margins
from sandbox.robot import robot_from_dict
from sandbox.runner import RunSettings
from sandbox.session import run_once

ROOT = Path(__file__).resolve().parents[1]
DESK_MITE = ROOT / "robots" / "desk-mite.yaml"
CASCADE = str(ROOT / "controllers" / "cascade.py")


def _bisect(stress: Stress, start: float, passes) -> Bracket:
    bracket = Bracket(stress, start)
    while (amount := bracket.next_probe()) is not None:
        bracket.record(amount, passes(amount))
    return bracket


def test_bisection_brackets_a_threshold() -> None:
    """A stress that fails above 0.3137 is bracketed to the resolution, the threshold inside
    (bisection halves the bracket each probe: ⌈log2(0.95/0.02)⌉ = 6 probes after the end)."""
    stress = Stress("strength", "fraction", "", limit=0.95, resolution=0.02)
    bracket = _bisect(stress, 0.0, lambda a: a <= 0.3137)
    assert bracket.passing <= 0.3137 < bracket.failing
    assert bracket.failing - bracket.passing <= 0.02
    assert bracket.runs == 1 + math.ceil(math.log2(0.95 / 0.02))


def test_a_robot_that_survives_the_whole_range_says_so() -> None:
    """If the far end passes, one run is enough and the margin is marked beyond the range."""
    stress = Stress("payload", "kg", "", limit=1.0, resolution=0.01)
    bracket = _bisect(stress, 0.0, lambda a: True)
    assert bracket.runs == 1 and bracket.failing is None
    assert bracket.entry(0.0)["beyond_range"]


def test_quantised_and_log_searches() -> None:
    """Delays land on whole physics steps; the bandwidth is bisected on a log scale down to
    the lowest cut-off that passes, to 5 %."""
    delay = Stress("delay", "s", "", limit=0.1, resolution=0.001, quantum=0.001)
    bracket = _bisect(delay, 0.0, lambda a: a <= 0.0237)
    assert bracket.passing == pytest.approx(0.023, abs=1e-12)
    assert bracket.failing == pytest.approx(0.024, abs=1e-12)
    assert all(abs(a / 0.001 - round(a / 0.001)) < 1e-9 for a, _ in bracket.log)
    band = Stress("imu_bandwidth", "Hz", "", limit=1.0, resolution=math.log(1.05),
                  smaller_is_worse=True, log=True)
    bracket = _bisect(band, 500.0, lambda f: f >= 17.0)
    assert bracket.failing < 17.0 <= bracket.passing
    assert bracket.passing / bracket.failing <= 1.05


def test_stresses_change_what_they_say(tmp_path: Path) -> None:
    """Strength scales both motors' stall torque; a payload adds exactly its mass on top of
    the frame (mass is additive); a delay adds to the settings' latency."""
    spec = ideal_robot("desk-mite")
    robot = spec.to_si_dict()
    settings = RunSettings(controller=CASCADE, latency=0.002)
    weak, _ = apply_stress(robot, settings, ("strength", 0.25))
    assert weak["motors"]["stall_torque"] == pytest.approx(0.75 * robot["motors"]["stall_torque"])
    loaded, _ = apply_stress(robot, settings, ("payload", 0.05))
    heavier = robot_from_dict(loaded, "test")
    assert heavier.figures.mass == pytest.approx(spec.figures.mass + 0.05, rel=1e-12)
    top = robot["body"]["frame"]["bottom"] + robot["body"]["frame"]["height"]
    assert loaded["body"]["parts"][-1]["at"][2] > top
    _, later = apply_stress(robot, settings, ("delay", 0.01))
    assert later.latency == pytest.approx(0.012)
    assert robot == spec.to_si_dict(), "the original description is left alone"


def test_delay_margin_is_monotone_at_its_bracket() -> None:
    """On a constructed case (the emitted LQR-derived gains of `analyze` for the cascade
    example on desk-mite), the delay margin lies inside the bracket the bisection reports,
    and it is monotone there: a run at the margin less the resolution passes the push test,
    a run at the margin plus the resolution fails it."""
    spec = ideal_robot("desk-mite")
    config = emit_config(analyze(spec), CASCADE)
    settings = RunSettings(controller=CASCADE, config=config)
    result = find_margins(spec, settings, stresses=("delay",), workers=1)
    assert result.baseline_passed
    (entry,) = result.margins
    assert not entry["beyond_range"], "the search range holds the margin"
    assert entry["margin"] < entry["failed_at"] <= entry["margin"] + entry["resolution"] + 1e-12

    def passes(latency: float) -> bool:
        run = run_once(spec, replace(settings, latency=latency), test="push", write=False)
        return bool(run.summary["test_result"]["passed"])

    assert passes(max(entry["margin"] - entry["resolution"], 0.0))
    assert not passes(entry["margin"] + entry["resolution"])


def test_cli_reports_a_robot_that_already_fails() -> None:
    """A controller that fails the test unstressed: exit 1 and a message saying to fix that."""
    result = CliRunner().invoke(app, [
        "margins", str(DESK_MITE), str(ROOT / "tests" / "controllers" / "constant.py"),
        "--stress", "delay", "--workers", "1"])
    assert result.exit_code == 1, result.output
    assert "already fails" in result.output
