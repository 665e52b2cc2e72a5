"""The imperfections in force are listed: facts.imperfections, the report's parts section,
`upright inspect` and the run's table ('ideal parts' when the file lists none)."""

from pathlib import Path

import pytest
from ideal_parts import ROBOTS, ideal_robot
from typer.testing import CliRunner

from sandbox.cli import app
from sandbox.facts import imperfections, parts_summary
from sandbox.report import render_report
from sandbox.robot import load_robot

NAMES = sorted(p.stem for p in ROBOTS.glob("*.yaml"))


@pytest.mark.parametrize("name", NAMES)
def test_demo_robots_have_honest_parts_and_ideal_copies_have_none(name):
    """Each demo robot lists play, static friction, a per-side difference, an IMU filter,
    jitter and compute time; its ideal copy (tests/ideal_parts.py) lists nothing."""
    labels = " | ".join(row[0] for row in imperfections(load_robot(ROBOTS / f"{name}.yaml")))
    for word in ("gearbox play", "static (breakaway) friction", "low-pass", "group delay",
                 "mounting error", "loop jitter", "compute time"):
        assert word in labels, (name, word)
    assert ".left." in labels or ".right." in labels
    ideal = ideal_robot(name)
    assert imperfections(ideal) == []
    assert parts_summary(ideal).startswith("ideal parts")
    assert not ideal.figures.sides_differ


def test_a_side_override_names_both_sides_and_the_change():
    """motors.right.stall_torque 4 % below the section's: the row gives the other side's
    value and the percentage."""
    spec = ideal_robot("shelf-runner", {"motors.right.stall_torque": "1.44 kgf*cm",
                                        "imu.gyro.bandwidth": "40 Hz", "imu.filter_order": 1})
    rows = {row[0]: row[1:] for row in imperfections(spec)}
    (label,) = [k for k in rows if k.startswith("motors.right.stall_torque")]
    assert "0.1471" in label and rows[label][0].endswith("(-4.0 %)")
    # first-order low-pass: group delay 1/(2 pi f_c) = 3.98 ms at 40 Hz (standard)
    (gyro,) = [k for k in rows if k.startswith("gyro low-pass")]
    assert "order 1" in gyro and "group delay 4 ms" in gyro
    assert parts_summary(spec) == "sides differ, IMU filter 40 Hz"


def _suite(rows):
    return {"robot": "r", "controller": "c.py", "seed": 0, "passed": True, "tests": [],
            "imperfections": rows, "parts": "play 1.5°" if rows else "ideal parts (x)"}


def test_report_lists_the_imperfections_or_says_ideal_parts(tmp_path):
    page = render_report(tmp_path, _suite([["gearbox play (backlash)", "1.5", "deg"]]))
    assert 'id="imperfections"' in page and "gearbox play (backlash)" in page
    assert "Parts: play 1.5°" in page
    ideal = render_report(tmp_path, _suite([]))
    assert "Ideal parts: the robot file lists no imperfections" in ideal
    assert "Parts: ideal parts" in ideal


def test_inspect_lists_imperfections_or_says_ideal_parts(tmp_path):
    out = CliRunner().invoke(app, ["inspect", str(ROBOTS / "desk-mite.yaml")])
    assert out.exit_code == 0, out.output
    assert "gearbox play (backlash), total at the output" in out.output
    assert "loop jitter" in out.output and "compute time" in out.output
    import yaml
    from ideal_parts import ideal_data

    plain = Path(tmp_path) / "plain.yaml"
    plain.write_text(yaml.safe_dump(ideal_data("desk-mite")))
    out = CliRunner().invoke(app, ["inspect", str(plain)])
    assert out.exit_code == 0, out.output
    assert "ideal parts (no imperfections in the file)" in out.output
