"""Robot, test and config files that cannot silently be wrong, read within bounds.

Each case runs through the command line (typer's CliRunner): its exit code, the key
named, one line, no traceback. Physics checks name their source.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from sandbox.cli import app
from sandbox.plausibility import MAX_MASS, efficiency
from sandbox.record import default_run_dir
from sandbox.robot import RobotFileError, key_kind, load_robot, robot_from_dict, value_to_si
from sandbox.sweep.plan import SweepError, parse_spread, parse_vary
from sandbox.yamlfile import MAX_FILE_BYTES, YamlFileError, parse_yaml_text

ROOT = Path(__file__).resolve().parents[1]
CONSTANT = ROOT / "tests" / "controllers" / "constant.py"
EXIT_BAD_INPUT = 2

BASE = """\
body:
  frame: {depth: 80 mm, width: 120 mm, height: 260 mm, mass: 180 g, bottom: -10 mm}
  parts:
    - {name: battery, mass: 260 g, size: [50 mm, 60 mm, 30 mm], at: [0, 0, 30 mm]}
wheels: {radius: 34 mm, width: 25 mm, mass: 35 g, track: 150 mm}
motors: {rated_voltage: 6 V, no_load_speed: 250 rpm, stall_torque: 1.5 kgf*cm,
         stall_current: 1.6 A, gear_ratio: 48}
imu: {at: [0, 0, 120 mm]}
"""
BOMB = ('a: &a ["lol","lol","lol","lol","lol","lol","lol","lol","lol"]\n'
        'b: &b [*a,*a,*a,*a,*a,*a,*a,*a,*a]\nc: &c [*b,*b,*b,*b,*b,*b,*b,*b,*b]\n'
        'd: &d [*c,*c,*c,*c,*c,*c,*c,*c,*c]\ne: [*d,*d,*d,*d,*d,*d,*d,*d,*d]\n')


def edit(old: str, new: str) -> str:
    assert old in BASE, old
    return BASE.replace(old, new)


@pytest.fixture
def runner() -> CliRunner:
    return CliRunner()


def inspect(runner: CliRunner, tmp_path: Path, text: str, *args: str):
    path = tmp_path / "bot.yaml"
    path.write_text(text, encoding="utf-8")
    return runner.invoke(app, ["inspect", str(path), *args])


def one_line_error(result, *words: str) -> str:
    """Exit 2, no traceback, exactly one line, naming the file and every word given."""
    assert result.exit_code == EXIT_BAD_INPUT, result.output
    assert isinstance(result.exception, (SystemExit, type(None))), repr(result.exception)
    assert "Traceback" not in result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1, result.output
    assert lines[0].startswith("error: ") and ".yaml: " in lines[0], lines[0]
    for word in words:
        assert word in lines[0], (word, lines[0])
    return lines[0]


# ------------------------------------------------------------------ errors in robot files

ROBOT_ERRORS = {
    # case: (file text, words the one line must hold)
    "stall torque 0.8 on a 1.2 A motor": (
        edit("stall_torque: 1.5 kgf*cm,\n         stall_current: 1.6 A",
             "stall_torque: 0.8,\n         stall_current: 1.2 A"),
        ("motors.stall_torque", "efficiency 291 %", "looks like kgf·cm", "'0.8 kgf*cm'")),
    "no_load_speed 200 (rad/s)": (
        edit("no_load_speed: 250 rpm", "no_load_speed: 200"),
        ("motors.no_load_speed", "looks like rpm", "'200 rpm'")),
    "part at 600 mm on a 260 mm frame": (
        edit("at: [0, 0, 30 mm]", "at: [0, 0, 600 mm]"),
        ("body.parts[0].at", "outside the robot", "more than its own size")),
    "IMU 2 m outside": (edit("at: [0, 0, 120 mm]", "at: [2, 0, 120 mm]"),
                        ("imu.at", "outside the robot")),
    "frame mass 1e300 kg": (edit("mass: 180 g", "mass: 1e300 kg"),
                            ("body.frame.mass", f"at most {MAX_MASS:g} kg")),
    "stall torque 1e6 N*m": (edit("stall_torque: 1.5 kgf*cm", "stall_torque: 1e6 N*m"),
                             ("motors.stall_torque", "at most 1000")),
    "rated voltage 1 kV": (edit("rated_voltage: 6 V", "rated_voltage: 1 kV"),
                           ("motors.rated_voltage", "at most 100 V")),
    "wheels twice": (BASE + "wheels: {radius: 30 mm, width: 25 mm, mass: 35 g, track: 1}\n",
                     ("line 9", "wheels", "twice", "lines 5 and 9")),
    "a key twice in a part": (edit("mass: 260 g,", "mass: 260 g, mass: 20 g,"),
                              ("body.parts[0].mass", "twice on line 4")),
    "alias bomb": (BOMB + BASE, ("line 1", "anchors and aliases")),
    "one alias": (BASE + "extra: &x 1\nmore: *x\n", ("extra", "anchors and aliases")),
    "exponent tower": (edit("radius: 34 mm", "radius: 10**10**10 mm"),
                       ("wheels.radius", "power", "-4 to 4")),
    "100,000-digit number": (edit("radius: 34 mm", "radius: " + "9" * 100_000),
                             ("wheels.radius", "at most 40 characters")),
    "name of 50,000 characters": ("name: " + "x" * 50_000 + "\n" + BASE,
                                  ("name", "at most 2000")),
    "name of 500 characters": ("name: " + "x" * 500 + "\n" + BASE, ("name", "at most 64")),
    "200 gr": (edit("mass: 260 g", "mass: 200 gr"),
               ("body.parts[0].mass", "gr is grains in pint; for grams write g")),
    "5 kg cm": (edit("stall_torque: 1.5 kgf*cm", "stall_torque: 5 kg cm"),
                ("motors.stall_torque",
                 "'5 kg cm' is a mass times a length; for a torque write '5 kgf*cm'")),
    "kgcm": (edit("stall_torque: 1.5 kgf*cm", "stall_torque: 5 kgcm"), ("'5 kgf*cm'",)),
    "kg*cm": (edit("stall_torque: 1.5 kgf*cm", "stall_torque: 5 kg*cm"), ("'5 kgf*cm'",)),
    "oz in": (edit("stall_torque: 1.5 kgf*cm", "stall_torque: 20 oz in"),
              ("motors.stall_torque", "'20 ozf*in'")),
    "ozin": (edit("stall_torque: 1.5 kgf*cm", "stall_torque: 20 ozin"), ("'20 ozf*in'",)),
    "decimal comma in a flow mapping": (edit("radius: 34 mm", "radius: 32,5 mm"),
                                        ("wheels.radius", "decimal comma", "32.5 mm")),
    "decimal comma in a list": (edit("at: [0, 0, 120 mm]", "at: [0, 0, 120,5 mm]"),
                                ("imu.at", "decimal comma", "120.5 mm")),
    "decimal comma in block style": (
        BASE.replace("imu: {at: [0, 0, 120 mm]}", "imu:\n  latency: 1,5 ms"),
        ("imu.latency", "decimal comma", "'1.5 ms'")),
    "nesting 40 deep": (BASE + "deep: " + "[" * 40 + "]" * 40 + "\n",
                        ("deep", "nested more than 16")),
}


@pytest.mark.parametrize("case", sorted(ROBOT_ERRORS))
def test_robot_file_error_one_line(runner, tmp_path, case):
    """Each hostile or mistaken robot file: exit 2, the key named, one line, no traceback."""
    text, words = ROBOT_ERRORS[case]
    one_line_error(inspect(runner, tmp_path, text), *words)


def test_file_too_large(runner, tmp_path):
    """A file beyond MAX_FILE_BYTES is refused before it is parsed."""
    line = one_line_error(inspect(runner, tmp_path, BASE + "#" * MAX_FILE_BYTES + "\n"))
    assert f"at most {MAX_FILE_BYTES}" in line


def test_gearbox_efficiency_above_one_is_impossible():
    """η = K_t,out / K_e,out (SI) cannot exceed 1: in SI a DC motor's torque constant equals
    its back-EMF constant (energy conservation), and a gearbox only loses (../shared/
    SOURCES.md §11 [common practice]). 0.8 N·m at 1.2 A against 6 V at 250 rpm:
    K_t = 0.6667 N·m/A, K_e = 6 / 26.18 = 0.2292 V·s/rad, η = 2.909 [derived]."""
    data = parse_yaml_text(BASE, "bot.yaml")
    data["motors"]["stall_current"] = "1.2 A"
    data["motors"]["stall_torque"] = "0.8 N*m"  # with a unit: no hint, still an error
    with pytest.raises(RobotFileError, match="efficiency 291 %") as info:
        robot_from_dict(data, "bot.yaml")
    assert "looks like" not in str(info.value)
    data["motors"]["stall_torque"] = "0.8 kgf*cm"
    spec = robot_from_dict(data, "bot.yaml")
    rpm = 2 * math.pi / 60  # rad/s per rpm, exact by definition
    assert efficiency(spec) == pytest.approx((0.8 * 0.0980665 / 1.2) / (6 / (250 * rpm)),
                                             rel=1e-12)


# ------------------------------------------------------------------ warnings

WARNINGS = {
    "200 kg part": (edit("mass: 260 g", "mass: 200"),
                    "body.parts[0].mass: 200 is read in SI", "looks like grams: write '200 g'"),
    "efficiency 5 %": (edit("stall_torque: 1.5 kgf*cm", "stall_torque: 0.2 kgf*cm"),
                       "motors: implied gearbox efficiency 5.3 %", "below 15 %"),
    "gyro range 250": (BASE.replace("imu: {at: [0, 0, 120 mm]}",
                                    "imu: {at: [0, 0, 120 mm], gyro: {range: 250}}"),
                       "imu.gyro.range", "looks like deg/s: write '250 deg/s'"),
    "capacity 2000": (BASE + "battery: {capacity: 2000}\n", "battery.capacity", "'2000 mAh'"),
    "accel range 2": (BASE.replace("imu: {at: [0, 0, 120 mm]}",
                                   "imu: {at: [0, 0, 120 mm], accel: {range: 2}}"),
                      "imu.accel.range", "write '2 g'"),
    "stall current 800": (edit("stall_current: 1.6 A", "stall_current: 800"),
                          "motors.stall_current", "write '800 mA'"),
    "centre of mass outside the frame": (
        edit("mass: 260 g, size: [50 mm, 60 mm, 30 mm], at: [0, 0, 30 mm]",
             "mass: 500 g, size: [50 mm, 60 mm, 30 mm], at: [100 mm, 0, 30 mm]"),
        "body: the body's centre of mass (74, 0, 54) mm lies outside the frame", "positions"),
}


@pytest.mark.parametrize("case", sorted(WARNINGS))
def test_warnings_listed_by_inspect(runner, tmp_path, case):
    """Plausible-but-suspect files load (exit 0); inspect lists each warning with its key,
    in the table and in --json."""
    text, *words = WARNINGS[case]
    result = inspect(runner, tmp_path, text)
    assert result.exit_code == 0, result.output
    section = result.stdout.split("Warnings (the robot still runs")[1]
    for word in words:
        assert word in section, (word, section)
    data = json.loads(inspect(runner, tmp_path, text, "--json").stdout)
    assert any(all(w in line for w in words) for line in data["warnings"]), data["warnings"]


def test_warnings_printed_on_stderr_by_run(runner, tmp_path):
    """run prints each warning on stderr, one line naming file and key, and goes on."""
    path = tmp_path / "bot.yaml"
    path.write_text(edit("mass: 260 g", "mass: 20.5"), encoding="utf-8")
    result = runner.invoke(app, ["run", str(path), str(CONSTANT), "--duration", "0.05",
                                 "--out", str(tmp_path / "run"), "--no-plots"])
    assert result.exit_code in (0, 1), result.output
    lines = [line for line in result.stderr.splitlines() if line.startswith("warning: ")]
    assert lines == [f"warning: {path}: body.parts[0].mass: 20.5 is read in SI, which is "
                     "implausible here; it looks like grams: write '20.5 g'"]
    assert (tmp_path / "run" / "summary.json").is_file()


@pytest.mark.parametrize("path", sorted((ROOT / "robots").glob("*.yaml")), ids=lambda p: p.stem)
def test_demo_robots_have_no_warnings(path):
    """The bundled robots are plausible: no warnings, gearbox efficiency 30-80 % (plastic
    spur gearboxes, ../shared/SOURCES.md §11 [common practice])."""
    spec = load_robot(path)
    assert spec.warnings == ()
    assert 0.3 <= efficiency(spec) <= 0.8


def test_inspect_shows_efficiency_and_units(runner):
    """inspect's table carries the implied gearbox efficiency, and the description a unit
    column (SI)."""
    result = runner.invoke(app, ["inspect", str(ROOT / "robots" / "shelf-runner.yaml")])
    assert result.exit_code == 0
    assert "implied gearbox efficiency" in result.stdout
    rows = {line.split()[0]: line.split() for line in result.stdout.splitlines() if line}
    assert rows["motors.no_load_speed"][-1] == "rad/s"
    assert rows["body.frame.mass"][-1] == "kg"
    assert rows["battery.capacity"][-1] == "C"
    assert "Warnings" not in result.stdout


# ------------------------------------------------------------------ accepted spellings


@pytest.mark.parametrize("text", ["0.078 Nm", "0.078 N.m", "0.078 N m", "0.078 N·m",
                                  "78 mNm", "0.078 N*m"])
def test_newton_metre_spellings(runner, tmp_path, text):
    """Nm, N.m, N m and N·m are newton-metres (exact: 1 N·m, SI Brochure [published])."""
    data = json.loads(inspect(runner, tmp_path, edit("1.5 kgf*cm", text).replace(
        "stall_current: 1.6 A", "stall_current: 1.6 A, friction_torque: 0.001"),
        "--json").stdout)
    assert data["description"]["motors"]["stall_torque"] == pytest.approx(0.078, rel=1e-12)


@pytest.mark.parametrize("written", ["1:48", '"1:48"', "'48:1'", "48", "48.0"])
def test_gear_ratio_as_a_ratio(runner, tmp_path, written):
    """gear_ratio takes 48, "1:48" and "48:1", and an unquoted 1:48, which YAML 1.1 would
    read as the base-60 integer 1·60 + 48 = 108 (YAML 1.1 int type): read as 48."""
    data = json.loads(inspect(runner, tmp_path, edit("gear_ratio: 48", f"gear_ratio: {written}"),
                              "--json").stdout)
    assert data["description"]["motors"]["gear_ratio"] == 48.0


def test_gear_ratio_from_set(runner):
    """--set motors.gear_ratio=1:48 reads as the file does: 48, not 108."""
    result = runner.invoke(app, ["inspect", str(ROOT / "robots" / "shelf-runner.yaml"),
                                 "--set", "motors.gear_ratio=1:30", "--json"])
    assert json.loads(result.stdout)["description"]["motors"]["gear_ratio"] == 30.0


@pytest.mark.parametrize("bad", ["'1:0'", "'a:48'", "'1:2:3'"])
def test_gear_ratio_bad_ratio(runner, tmp_path, bad):
    one_line_error(inspect(runner, tmp_path, edit("gear_ratio: 48", f"gear_ratio: {bad}")),
                   "motors.gear_ratio")


# ------------------------------------------------------------------ test and config files

TEST_FILE_ERRORS = {
    "negative payload mass": ("events:\n  - {at: 1, payload: {mass: -0.2}}\n",
                              "events[0].payload.mass", "greater than 0"),
    "negative payload size": ("events:\n  - {at: 1, payload: {mass: 0.2, size: [-5 mm, 1, 1]}}\n",
                              "events[0].payload.size[0]", "greater than 0"),
    "negative push impulse": ("events:\n  - {at: 1, push: {impulse: -0.3}}\n",
                              "events[0].push.impulse", "greater than 0"),
    "negative push force": ("events:\n  - {at: 1, push: {force: -3 N}}\n",
                            "events[0].push.force", "greater than 0"),
    "payload of 1e9 kg": ("events:\n  - {at: 1, payload: {mass: 1e9 kg}}\n",
                          "events[0].payload.mass", "less than or equal to 500"),
    "rough-ground seed -1": (
        "ground: {rough: {amplitude: 2 mm, wavelength: 0.2, seed: -1}}\n",
        "ground.rough.seed", "greater than or equal to 0"),
    "duplicate section": ("duration: 2\nduration: 3\n", "duration", "twice"),
    "alias": ("events:\n  - &p {at: 1, push: {impulse: 0.1}}\n  - *p\n", "events[0]",
              "anchors and aliases"),
}


@pytest.mark.parametrize("case", sorted(TEST_FILE_ERRORS))
def test_test_file_error_one_line(runner, tmp_path, case):
    """A bad test file stops `run` before any simulation: exit 2, key named, one line."""
    text, *words = TEST_FILE_ERRORS[case]
    test_file = tmp_path / "my-test.yaml"
    test_file.write_text(text, encoding="utf-8")
    result = runner.invoke(app, ["run", str(ROOT / "robots" / "desk-mite.yaml"), str(CONSTANT),
                                 "--test", str(test_file), "--out", str(tmp_path / "run")])
    one_line_error(result, "my-test.yaml", *words)


@pytest.mark.parametrize(("text", "words"), [
    (BOMB, ("line 1", "anchors and aliases")),
    ("kp: 1\nkd: 2\nkp: 3\n", ("kp", "twice")),
    ("kp: " + "1" * 5000 + "\n", ("kp", "at most 40")),
])
def test_config_file_within_bounds(runner, tmp_path, text, words):
    """--config files go through the same reader: an alias bomb is refused at once (it
    used to hang), duplicate keys and huge numbers are refused."""
    config = tmp_path / "gains.yaml"
    config.write_text(text, encoding="utf-8")
    result = runner.invoke(app, ["run", str(ROOT / "robots" / "desk-mite.yaml"), str(CONSTANT),
                                 "--config", str(config), "--out", str(tmp_path / "run")])
    one_line_error(result, "gains.yaml", *words)


# ------------------------------------------------------------------ sweeps take unit strings


def test_vary_and_spread_take_unit_strings():
    """--vary and --spread read unit strings for a robot key as --set does; SI numbers
    unchanged. 1 rpm = 2π/60 rad/s exactly (definition)."""
    assert parse_vary("wheels.radius=30mm,35 mm,40 mm").values == (0.03, 0.035, 0.04)
    assert parse_vary("body.parts.0.mass=100 g:300 g:3").values == (0.1, 0.2, 0.3)
    speeds = parse_vary("motors.no_load_speed=60 rpm,120 rpm").values
    assert speeds == pytest.approx((6.283185307179586, 12.566370614359172), rel=1e-12)
    assert parse_spread("wheels.radius=±2 mm").amount == pytest.approx(0.002)
    assert parse_spread("wheels.radius=+-0.002").amount == 0.002
    assert parse_spread("config.max_tilt=±5 deg").amount == pytest.approx(0.0872664625997, 1e-9)
    for bad in ("wheels.radius=30 kg,1", "config.kp=a:2:3"):
        with pytest.raises(SweepError, match="not a number"):
            parse_vary(bad)
    with pytest.raises(SweepError, match="a mass"):
        parse_spread("wheels.radius=±2 kg")
    with pytest.raises(SweepError, match="plain percentage"):
        parse_spread("wheels.radius=2 mm%")


def test_key_kind_and_value_to_si():
    assert key_kind("body.parts.0.size.2") == "length"
    assert key_kind("imu.gyro.range") == "angular_speed"
    assert key_kind("wheels.friction") is None
    assert value_to_si("battery.capacity", "2000 mAh") == pytest.approx(7200.0)
    assert value_to_si("config.kp", "12") == 12.0


# ------------------------------------------------------------------ names, pint


def test_run_folder_name_is_bounded_and_safe(tmp_path):
    """Whatever a name holds, the folder name is one short, safe part under the root."""
    folder = default_run_dir(tmp_path, "../" * 30 + "x" * 5000, "ctrl/../..", "t e s t")
    assert folder.parent == tmp_path
    assert len(folder.name) < 160 and "/" not in folder.name and ".." not in folder.name


def test_pint_only_when_a_unit_string_is_met(tmp_path):
    """Importing sandbox.robot and loading a file of plain numbers never imports pint, nor
    does a file of the usual unit strings (read from pint's factors, sandbox/unitfactors.py);
    the first spelling off that table does."""
    plain = BASE
    for old, new in (("80 mm", "0.08"), ("120 mm", "0.12"), ("260 mm", "0.26"), ("180 g", "0.18"),
                     ("-10 mm", "-0.01"), ("260 g", "0.26"), ("[50 mm, 60 mm, 30 mm]",
                     "[0.05, 0.06, 0.03]"), ("[0, 0, 30 mm]", "[0, 0, 0.03]"), ("34 mm", "0.034"),
                     ("25 mm", "0.025"), ("35 g", "0.035"), ("150 mm", "0.15"), ("6 V", "6"),
                     ("250 rpm", "26.18"), ("1.5 kgf*cm", "0.147"), ("1.6 A", "1.6"),
                     ("[0, 0, 120 mm]", "[0, 0, 0.12]")):
        plain = plain.replace(old, new)
    path = tmp_path / "plain.yaml"
    path.write_text(plain, encoding="utf-8")
    code = ("import sys; from sandbox.robot import load_robot; s = load_robot(sys.argv[1]); "
            "s.warnings; assert 'pint' not in sys.modules, 'pint imported'; "
            "load_robot(sys.argv[2]); assert 'pint' not in sys.modules, 'pint for the demo'; "
            "from sandbox.units import to_si; to_si('2 furlong', 'length'); "
            "assert 'pint' in sys.modules")
    done = subprocess.run([sys.executable, "-c", code, str(path),
                           str(ROOT / "robots" / "desk-mite.yaml")],
                          capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr


def test_yaml_reader_bounds_directly():
    """The reader itself: base-60 integers stay text, aliases and duplicates refused."""
    assert parse_yaml_text("a: 1:48\nb: 12:30:00\nc: 0x10\nd: 1.5\n", "f.yaml") == {
        "a": "1:48", "b": "12:30:00", "c": 16, "d": 1.5}
    with pytest.raises(YamlFileError, match="anchors"):
        parse_yaml_text("a: &x 1\n", "f.yaml")
    with pytest.raises(YamlFileError, match="given twice"):
        parse_yaml_text("a: {b: 1, b: 2}\n", "f.yaml")
