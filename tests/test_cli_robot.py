"""The robot commands of the `upright` CLI: --version, inspect, build, bad input, --help."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
import typer
from typer.testing import CliRunner

from sandbox import __version__
from sandbox.cli import app
from sandbox.robot import load_robot
from sandbox.urdf import robot_urdf

ROBOTS_DIR = Path(__file__).resolve().parents[1] / "robots"
ROBOT_FILES = sorted(ROBOTS_DIR.glob("*.yaml"))
EXIT_BAD_INPUT = 2

GOOD_YAML = """\
body:
  frame: {depth: 80 mm, width: 120 mm, height: 220 mm, mass: 180 g, bottom: -10 mm}
  parts:
    - {name: battery, mass: 260 g, size: [50 mm, 60 mm, 30 mm], at: [0, 0, 30 mm]}
wheels: {radius: 34 mm, width: 25 mm, mass: 35 g, track: 150 mm}
"""


@pytest.fixture
def runner() -> CliRunner:
    return CliRunner()


def invoke(runner: CliRunner, *args: str):
    return runner.invoke(app, [str(a) for a in args])


def no_traceback(result) -> None:
    """The command ended through its exit code, printing no Python traceback."""
    assert isinstance(result.exception, (SystemExit, type(None))), repr(result.exception)
    assert "Traceback" not in result.output, result.output


# ------------------------------------------------------------------ --version, --help


def test_version(runner):
    """--version prints the package version and exits 0."""
    result = invoke(runner, "--version")
    assert result.exit_code == 0
    assert result.stdout.strip() == f"upright {__version__}"


def test_console_script_version():
    """The installed `upright` console script runs and reports the same version."""
    exe = shutil.which("upright")
    if exe is None:
        pytest.skip("console script not on PATH")
    done = subprocess.run([exe, "--version"], capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == f"upright {__version__}"


COMMANDS = sorted(typer.main.get_command(app).commands)


@pytest.mark.parametrize("command", [None, *COMMANDS])
def test_help_on_every_command(runner, command):
    """--help works on the app and on every command (exit 0, usage shown)."""
    args = ["--help"] if command is None else [command, "--help"]
    result = invoke(runner, *args)
    assert result.exit_code == 0, result.output
    assert "Usage" in result.stdout


# ------------------------------------------------------------------ inspect


@pytest.mark.parametrize("path", ROBOT_FILES, ids=lambda p: p.stem)
def test_inspect_table_shows_mass_with_units(runner, path):
    """The inspect table names the robot, shows the whole-robot mass (4 significant figures)
    in kg and the other figures with their units."""
    result = invoke(runner, "inspect", path)
    assert result.exit_code == 0, result.output
    spec = load_robot(path)
    text = result.stdout
    assert spec.name in text
    line = next(row for row in text.splitlines() if row.startswith("mass, whole robot"))
    value, unit = line.split()[-2:]
    assert unit == "kg", line
    assert float(value) == pytest.approx(spec.figures.mass, rel=5e-4), "mass in the table"
    for unit in ("kg m^2", "ohm", "N m/A", "V s/rad", "m/s", "deg", "mm"):
        assert unit in text, f"unit {unit!r} missing from the table"
    assert "Description in force (SI units)" in text


@pytest.mark.parametrize("path", ROBOT_FILES, ids=lambda p: p.stem)
def test_inspect_json_equals_derived_figures(runner, path):
    """inspect --json carries the contract keys (DESIGN.md) with the derived figures' values;
    JSON floats round-trip exactly."""
    result = invoke(runner, "inspect", path, "--json")
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    fig = load_robot(path).figures
    assert data["mass_kg"] == fig.mass
    assert data["com_m"] == fig.com.tolist()
    assert data["body_mass_kg"] == fig.body.mass
    assert data["body_com_m"] == fig.body.com.tolist()
    inertia = np.array(data["body_inertia_kg_m2"])
    assert inertia.shape == (3, 3)
    np.testing.assert_array_equal(inertia, fig.body.inertia)
    assert data["wheel_inertia_kg_m2"] == fig.wheel_inertia_axle
    assert data["motor_resistance_ohm"] == fig.resistance
    assert data["torque_constant_n_m_per_a"] == fig.torque_constant
    assert data["back_emf_constant_v_s_per_rad"] == fig.back_emf_constant
    assert data["reflected_rotor_inertia_kg_m2"] == fig.reflected_inertia
    assert data["battery_nominal_voltage_v"] == fig.battery_voltage


def test_inspect_json_pitch_inertia_about_axle(runner, tmp_path):
    """The body's pitch inertia about the axle is I_cm,yy + m (x² + z²) (Steiner, Meriam &
    Kraige, Dynamics) [published]; the battery adds a 30 mm offset worked by hand here."""
    path = tmp_path / "bot.yaml"
    path.write_text(GOOD_YAML, encoding="utf-8")
    data = json.loads(invoke(runner, "inspect", path, "--json").stdout)
    fig = load_robot(path).figures
    m, (x, _, z) = fig.body.mass, fig.body.com
    expected = fig.body.inertia[1, 1] + m * (x * x + z * z)
    assert data["body_pitch_inertia_about_axle_kg_m2"] == pytest.approx(expected, rel=1e-12)
    assert data["body_mass_kg"] == pytest.approx(0.440, rel=1e-12), "180 g + 260 g"
    assert data["body_com_m"][2] == pytest.approx((0.18 * 0.1 + 0.26 * 0.03) / 0.44, rel=1e-12)


def test_inspect_set_overrides(runner):
    """--set changes a key before the figures are derived (wheel inertia m r²/2 with the new r,
    Meriam & Kraige table) [published]."""
    path = ROBOTS_DIR / "shelf-runner.yaml"
    result = invoke(runner, "inspect", path, "--json", "--set", "wheels.radius=40 mm",
                    "--set", "wheels.mass=50 g")
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    assert data["wheel_inertia_kg_m2"] == pytest.approx(0.5 * 0.050 * 0.040**2, rel=1e-12)
    assert data["description"]["wheels"]["radius"] == pytest.approx(0.040)


# ------------------------------------------------------------------ build


@pytest.mark.parametrize("path", ROBOT_FILES, ids=lambda p: p.stem)
def test_build_writes_the_urdf(runner, tmp_path, path):
    """build -o FILE writes exactly robot_urdf of the loaded description."""
    out = tmp_path / "robot.urdf"
    result = invoke(runner, "build", path, "-o", out)
    assert result.exit_code == 0, result.output
    assert out.read_text(encoding="utf-8") == robot_urdf(load_robot(path))
    assert str(out) in result.stdout


def test_build_prints_without_output_file(runner):
    """build without -o prints the URDF to standard output."""
    path = ROBOT_FILES[0]
    result = invoke(runner, "build", path)
    assert result.exit_code == 0, result.output
    assert result.stdout == robot_urdf(load_robot(path))


def test_build_with_set(runner, tmp_path):
    """build --set gives the URDF of the overridden description."""
    path, out = ROBOTS_DIR / "shelf-runner.yaml", tmp_path / "r.urdf"
    result = invoke(runner, "build", path, "-o", out, "--set", "wheels.track=200 mm")
    assert result.exit_code == 0, result.output
    expected = robot_urdf(load_robot(path, {"wheels.track": "200 mm"}))
    assert out.read_text(encoding="utf-8") == expected
    assert 'xyz="0 0.1 0"' in expected


# ------------------------------------------------------------------ bad input


def _replace(old: str, new: str) -> str:
    assert old in GOOD_YAML
    return GOOD_YAML.replace(old, new)


BAD_FILES = {
    "unknown key": (_replace("track: 150 mm", "trak: 150 mm"), "wheels.trak", "did you mean"),
    "wrong dimension": (_replace("mass: 180 g", "mass: 180 mm"), "body.frame.mass",
                        "expected a mass"),
    "negative radius": (_replace("radius: 34 mm", "radius: -34 mm"), "wheels.radius",
                        "greater than 0"),
    "zero mass": (_replace("mass: 260 g", "mass: 0 g"), "body.parts[0].mass", "greater than 0"),
    "zero size": (_replace("[50 mm, 60 mm, 30 mm]", "[50 mm, 0, 30 mm]"),
                  "body.parts[0].size[1]", "greater than 0"),
    "below ground": (_replace("bottom: -10 mm", "bottom: -50 mm"), "body.frame.bottom",
                     "ground"),
    "missing key": (_replace("mass: 35 g, ", ""), "wheels.mass", "missing"),
    "yaml syntax": (GOOD_YAML + "motors: {gear_ratio: 30\n", "line ", "YAML syntax error"),
    "not a mapping": ("- body\n- wheels\n", "", "mapping"),
    "bad value type": (_replace("bottom: -10 mm", "bottom: [1, 2]"), "body.frame.bottom",
                       "expected a length"),
}


@pytest.mark.parametrize("command", ["inspect", "build"])
@pytest.mark.parametrize("case", sorted(BAD_FILES))
def test_bad_file_exit_code_and_message(runner, tmp_path, command, case):
    """Each class of bad input: exit code 2, a message naming the file and the key, and no
    traceback."""
    text, key, words = BAD_FILES[case]
    path = tmp_path / "bad-bot.yaml"
    path.write_text(text, encoding="utf-8")
    result = invoke(runner, command, path)
    assert result.exit_code == EXIT_BAD_INPUT, result.output
    no_traceback(result)
    message = result.stderr
    assert f"{path}: {key}" in message, message
    assert words in message, message
    assert result.stdout == "", "nothing on standard output for bad input"


def test_several_problems_one_line_each(runner, tmp_path):
    """Several problems are all reported, one line each, each naming the file."""
    text = _replace("track: 150 mm", "trak: 150 mm").replace("mass: 180 g", "mass: 180 mm")
    path = tmp_path / "bad-bot.yaml"
    path.write_text(text, encoding="utf-8")
    result = invoke(runner, "inspect", path)
    assert result.exit_code == EXIT_BAD_INPUT
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 3, lines  # wheels.trak unknown, wheels.track missing, frame mass
    assert all(str(path) in line for line in lines), lines


def test_yaml_error_names_the_line(runner, tmp_path):
    """A YAML syntax error on line 6 is reported with that line number."""
    path = tmp_path / "bad-bot.yaml"
    path.write_text(GOOD_YAML + "motors: [gear_ratio: 30\n", encoding="utf-8")
    result = invoke(runner, "inspect", path)
    assert result.exit_code == EXIT_BAD_INPUT
    assert re.search(r"line [67], column \d+", result.stderr), result.stderr


@pytest.mark.parametrize("command", ["inspect", "build"])
def test_missing_file(runner, tmp_path, command):
    """A robot file that does not exist: exit 2, the path named."""
    path = tmp_path / "nowhere.yaml"
    result = invoke(runner, command, path)
    assert result.exit_code == EXIT_BAD_INPUT
    no_traceback(result)
    assert f"{path}: no such file" in result.stderr


@pytest.mark.parametrize(
    ("setting", "words"),
    [("body.parts.9.mass=1", "body.parts.9.mass"),
     ("wheels.radius.x=1", "wheels.radius.x"),
     ("wheels.radius=3 kg", "wheels.radius"),
     ("wheels.trak=1", "did you mean 'track'"),
     ("no-equals-sign", "KEY=VALUE")],
)
def test_bad_set(runner, setting, words):
    """A bad --set (path leading nowhere, wrong dimension, unknown key, no '='): exit 2."""
    result = invoke(runner, "inspect", ROBOTS_DIR / "shelf-runner.yaml", "--set", setting)
    assert result.exit_code == EXIT_BAD_INPUT, result.output
    no_traceback(result)
    assert words in result.stderr, result.stderr


def test_unwritable_output(runner, tmp_path):
    """build -o into a folder that does not exist: exit 2, a plain message."""
    out = tmp_path / "no" / "such" / "dir" / "r.urdf"
    result = invoke(runner, "build", ROBOT_FILES[0], "-o", out)
    assert result.exit_code == EXIT_BAD_INPUT
    no_traceback(result)
    assert "error:" in result.stderr


def test_console_script_bad_input_has_no_traceback(tmp_path):
    """Through the real console script: bad input gives exit 2 and one plain stderr line."""
    exe = shutil.which("upright")
    if exe is None:
        pytest.skip("console script not on PATH")
    path = tmp_path / "bad-bot.yaml"
    path.write_text(_replace("radius: 34 mm", "radius: 34 kg"), encoding="utf-8")
    done = subprocess.run([exe, "inspect", str(path)], capture_output=True, text=True,
                          timeout=60)
    assert done.returncode == EXIT_BAD_INPUT
    assert "Traceback" not in done.stderr + done.stdout
    assert done.stderr.strip() == (
        f"error: {path}: wheels.radius: '34 kg' is a mass, expected a length such as '35 mm'")


def test_set_value_yaml_cannot_build_is_kept_as_text(runner):
    """A --set value YAML reads as an impossible date ('2020-13-45') is kept as text, so the
    key's own check decides (here: a valid robot name)."""
    result = invoke(runner, "inspect", ROBOTS_DIR / "shelf-runner.yaml", "--json",
                    "--set", "name=2020-13-45")
    assert result.exit_code == 0, result.output
    assert json.loads(result.stdout)["name"] == "2020-13-45"
