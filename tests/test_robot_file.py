"""The robot description file: examples load, derived figures, defaults, errors, overrides, fuzz."""

from __future__ import annotations

import copy
import math
import re
from pathlib import Path

import numpy as np
import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from sandbox.robot import (
    Accel,
    Battery,
    Driver,
    Encoders,
    Gyro,
    Imu,
    Motors,
    RobotFileError,
    RobotSpec,
    apply_overrides,
    load_robot,
    nearest_key,
    parse_yaml,
    robot_from_dict,
)

ROBOTS_DIR = Path(__file__).resolve().parents[1] / "robots"
ROBOT_FILES = sorted(ROBOTS_DIR.glob("*.yaml"))
G_N = 9.80665  # m/s², standard gravity, exact (3rd CGPM 1901) [published]
KGF = 9.80665  # N per kgf, exact (NIST SP 811, B.8) [published]
RPM = 2 * math.pi / 60  # rad/s per rpm, exact

MINIMAL_YAML = """\
body:
  frame: {depth: 80 mm, width: 120 mm, height: 220 mm, mass: 180 g, bottom: -10 mm}
wheels: {radius: 34 mm, width: 25 mm, mass: 35 g, track: 150 mm}
"""


def minimal_data() -> dict:
    """Plain data of a description with only the required sections."""
    return yaml.safe_load(MINIMAL_YAML)


def with_part(**part) -> dict:
    """Minimal data plus one body part (defaults: a 50 g box 20 mm a side at 50 mm up)."""
    data = minimal_data()
    entry = {"name": "battery", "mass": "50 g", "size": ["20 mm"] * 3, "at": [0, 0, "50 mm"]}
    entry.update(part)
    data["body"]["parts"] = [entry]
    return data


def problems_of(data, overrides=None) -> list[str]:
    """The problem lines RobotFileError lists for ``data`` (fails the test if none raised)."""
    with pytest.raises(RobotFileError) as info:
        robot_from_dict(data, "bot.yaml", overrides)
    return info.value.problems


def write(tmp_path: Path, text: str, name: str = "bot.yaml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


# ------------------------------------------------------------------ the example robots


def test_there_are_example_robots():
    """The three demo robots ship with the project."""
    assert {p.stem for p in ROBOT_FILES} >= {"desk-mite", "shelf-runner", "tall-mast"}


@pytest.mark.parametrize("path", ROBOT_FILES, ids=lambda p: p.stem)
def test_example_robot_loads_with_consistent_figures(path):
    """Every example loads, and its derived figures follow from its values:
    total mass = Σ masses; centre of mass = mass-weighted average of the pieces' centres
    (definition, any statics text); R = V/I_stall, k_t = T_stall/I_stall, k_e = V/ω_nl
    (SOURCES.md §5, catalogue-style figures) [published]; reflected inertia J G²
    [published: any gear-train text]; battery nominal = cells × cell voltage."""
    spec = load_robot(path)
    assert spec.name == path.stem
    fig = spec.figures
    frame, wheels, motors = spec.body.frame, spec.wheels, spec.motors
    body_masses = [frame.mass] + [p.mass for p in spec.body.parts]
    centres = [(0.0, 0.0, frame.bottom + frame.height / 2)] + [p.at for p in spec.body.parts]
    body_mass = sum(body_masses)
    body_com = sum(m * np.array(c) for m, c in zip(body_masses, centres, strict=True)) / body_mass
    total = body_mass + 2 * wheels.mass
    assert fig.body.mass == pytest.approx(body_mass, rel=1e-12), "body mass"
    assert fig.mass == pytest.approx(total, rel=1e-12), "total mass"
    np.testing.assert_allclose(fig.body.com, body_com, rtol=1e-12, atol=1e-15, err_msg="body com")
    # The wheels' centres lie on the axle (x = z = 0), so they pull the com toward it.
    np.testing.assert_allclose(fig.com, body_com * body_mass / total, rtol=1e-12, atol=1e-15,
                               err_msg="whole-robot com")
    assert fig.resistance == pytest.approx(motors.rated_voltage / motors.stall_current, rel=1e-12)
    assert fig.torque_constant == pytest.approx(
        motors.stall_torque / motors.stall_current, rel=1e-12), "torque constant"
    assert fig.back_emf_constant == pytest.approx(
        motors.rated_voltage / motors.no_load_speed, rel=1e-12), "back-EMF constant"
    assert fig.reflected_inertia == pytest.approx(
        motors.rotor_inertia * motors.gear_ratio**2, rel=1e-12), "reflected inertia"
    assert fig.battery_voltage == pytest.approx(
        spec.battery.cells * spec.battery.cell_voltage, rel=1e-12), "battery voltage"
    # The model reproduces the catalogue stall torque: k_t V / R = T_stall (SOURCES.md §5).
    assert fig.torque_constant * motors.rated_voltage / fig.resistance == pytest.approx(
        motors.stall_torque, rel=1e-12), "stall torque reproduced"
    wheel_axial = 0.5 * wheels.mass * wheels.radius**2  # solid disc, Meriam & Kraige table
    assert fig.wheel_inertia_axle == pytest.approx(wheel_axial, rel=1e-12), "wheel inertia"


@pytest.mark.parametrize("path", ROBOT_FILES, ids=lambda p: p.stem)
def test_si_dict_round_trips(path):
    """The description dumped in SI (bare numbers) validates back to the same description."""
    spec = load_robot(path)
    assert robot_from_dict(spec.to_si_dict()) == spec


# shelf-runner's values as shipped when this test was written (kept here so that edits to the
# demo robot do not move the hand-worked numbers below).
HAND_WORKED_YAML = """\
name: hand-worked
body:
  frame: {depth: 80 mm, width: 120 mm, height: 220 mm, mass: 180 g, bottom: -10 mm}
  parts:
    - {name: battery, mass: 260 g, size: [50 mm, 60 mm, 30 mm], at: [0, 0, 30 mm]}
    - {name: main board, mass: 40 g, size: [70 mm, 55 mm, 15 mm], at: [0, 0, 180 mm]}
    - {name: payload deck, mass: 60 g, size: [100 mm, 120 mm, 4 mm], at: [0, 0, 212 mm]}
wheels: {radius: 34 mm, width: 25 mm, mass: 35 g, track: 150 mm}
motors: {rated_voltage: 6 V, no_load_speed: 250 rpm, stall_torque: 1.5 kgf*cm,
         stall_current: 1.6 A, gear_ratio: 48, rotor_inertia: 1.0e-7 kg*m^2}
driver: {voltage_drop: 1.8 V}
battery: {cells: 6, cell_voltage: 1.2 V}
"""


def test_figures_by_hand():
    """A shelf-runner-like robot worked by hand (masses in g, positions in mm):
    body 180 + 260 + 40 + 60 = 540 g; com z = (180·100 + 260·30 + 40·180 + 60·212)/540
    = 84.667 mm (frame centre = −10 + 220/2 = 100 mm); whole robot 540 + 2·35 = 610 g.
    Motors (SOURCES.md §5) [published]: T_stall = 1.5 kgf·cm = 0.14709975 N·m,
    R = 6/1.6 = 3.75 Ω, k_t = T_stall/1.6, k_e = 6 V / 250 rpm; J G² = 1e-7·48².
    Battery 6 × 1.2 = 7.2 V; after the driver's 1.8 V drop 5.4 V, so each wheel can give
    T = k_t·5.4/R = 0.132389775 N·m. Static torque balance on the body (moments about the
    axle, any statics text) [published]: 2T = m_b g l sin θ, so
    sin θ = 2·0.132389775 / (0.54·9.80665·0.0846667) = 0.590551 → θ = 36.196°."""
    fig = robot_from_dict(yaml.safe_load(HAND_WORKED_YAML)).figures
    com_z = (0.180 * 0.100 + 0.260 * 0.030 + 0.040 * 0.180 + 0.060 * 0.212) / 0.540
    assert fig.body.mass == pytest.approx(0.540, rel=1e-12), "body mass"
    assert fig.mass == pytest.approx(0.610, rel=1e-12), "total mass"
    assert com_z == pytest.approx(0.0846667, rel=1e-6)
    np.testing.assert_allclose(fig.body.com, [0, 0, com_z], rtol=1e-12, atol=1e-15,
                               err_msg="body com")
    np.testing.assert_allclose(fig.com, [0, 0, com_z * 0.540 / 0.610], rtol=1e-12, atol=1e-15,
                               err_msg="whole-robot com")
    assert fig.com_height == pytest.approx(com_z, rel=1e-12), "com height"
    stall_torque = 1.5 * KGF * 0.01
    assert stall_torque == pytest.approx(0.14709975, rel=1e-12)
    assert fig.resistance == pytest.approx(3.75, rel=1e-12), "resistance"
    assert fig.torque_constant == pytest.approx(stall_torque / 1.6, rel=1e-12), "k_t"
    assert fig.back_emf_constant == pytest.approx(6.0 / (250 * RPM), rel=1e-12), "k_e"
    assert fig.reflected_inertia == pytest.approx(1e-7 * 48**2, rel=1e-12), "J G^2"
    assert fig.reflected_inertia == pytest.approx(2.304e-4, rel=1e-12)
    assert fig.battery_voltage == pytest.approx(7.2, rel=1e-12), "battery nominal voltage"
    assert fig.drive_voltage == pytest.approx(5.4, rel=1e-12), "drive voltage"
    available = stall_torque / 1.6 * 5.4 / 3.75
    assert available == pytest.approx(0.132389775, rel=1e-12)
    assert fig.available_stall_torque == pytest.approx(available, rel=1e-12), "wheel torque"
    sin_tilt = 2 * available / (0.540 * G_N * com_z)
    assert sin_tilt == pytest.approx(0.590551, rel=1e-6)
    assert math.degrees(fig.steepest_hold_tilt) == pytest.approx(36.196131, abs=1e-5), "tilt deg"


def test_steepest_hold_tilt_is_a_right_angle_when_motors_can_hold_any_tilt():
    """Stall torque 20 kgf·cm per wheel against the same body: 2T > m_b g l, so the torque
    balance 2T = m_b g l sin θ holds at any tilt (statics) [derived]: 90°."""
    data = yaml.safe_load(HAND_WORKED_YAML)
    data["motors"]["stall_torque"] = "20 kgf*cm"
    data["motors"]["stall_current"] = "9 A"  # a gearbox efficiency of 95 %, not above 100 %
    fig = robot_from_dict(data).figures
    assert 2 * fig.available_stall_torque > fig.body.mass * G_N * fig.com_height
    assert fig.steepest_hold_tilt == pytest.approx(math.pi / 2, abs=1e-15)


# ------------------------------------------------------------------ defaults


def test_only_body_and_wheels_gets_every_default_section(tmp_path):
    """A file with only body and wheels loads; every other section takes its defaults."""
    spec = load_robot(write(tmp_path, MINIMAL_YAML, "tiny-bot.yaml"))
    assert spec.name == "tiny-bot"
    assert spec.body.parts == []
    assert spec.body.frame.bottom == pytest.approx(-0.010)
    assert spec.motors == Motors()
    assert spec.driver == Driver()
    assert spec.battery == Battery()
    assert spec.imu == Imu()
    assert spec.imu.gyro == Gyro() and spec.imu.accel == Accel()
    assert spec.encoders == Encoders()
    assert spec.wheels.friction == 0.9 and spec.wheels.rolling_resistance == 0.0


def test_default_values_in_si():
    """Defaults written with units come out in SI by the exact factors (NIST SP 811)."""
    spec = robot_from_dict(minimal_data())
    assert spec.name == "robot"
    assert spec.motors.no_load_speed == pytest.approx(250 * RPM, rel=1e-12), "no-load speed"
    assert spec.motors.stall_torque == pytest.approx(1.5 * KGF * 0.01, rel=1e-12), "stall torque"
    assert spec.battery.capacity == pytest.approx(7200.0, rel=1e-12), "capacity 2000 mAh"
    assert spec.battery_voltage == pytest.approx(7.2, rel=1e-12), "6 × 1.2 V"
    assert spec.imu.accel.range == pytest.approx(2 * G_N, rel=1e-12), "accel range 2 g"
    assert spec.imu.accel.noise_density == pytest.approx(0.0002 * G_N, rel=1e-12)
    assert spec.imu.gyro.range == pytest.approx(math.radians(250), rel=1e-12), "gyro range"


def test_default_name_from_an_awkward_file_name(tmp_path):
    """Without a name key the file's stem is used, cut to the characters a name may hold."""
    spec = load_robot(write(tmp_path, MINIMAL_YAML, "my bot (v2).yaml"))
    assert spec.name == "my bot -v2-"


def test_spec_is_frozen():
    """A loaded description is a value: its fields cannot be reassigned."""
    spec = robot_from_dict(minimal_data())
    with pytest.raises(Exception, match="frozen"):
        spec.name = "other"  # type: ignore[misc]


# ------------------------------------------------------------------ bad input, one class each


def test_unknown_key_suggests_the_nearest():
    """A misspelt key is named with the nearest valid key."""
    data = minimal_data()
    data["wheels"]["trak"] = data["wheels"].pop("track")
    problems = problems_of(data)
    assert "wheels.trak: unknown key (did you mean 'track'?)" in problems, problems
    assert "wheels.track: missing (required)" in problems, problems


def test_unknown_key_without_a_near_one_lists_the_allowed():
    """A key nothing like a valid one lists the keys allowed there."""
    data = minimal_data()
    data["wheels"]["zzzzzz"] = 1
    (problem,) = problems_of(data)
    assert problem.startswith("wheels.zzzzzz: unknown key (allowed: radius, width, mass, track")


@pytest.mark.parametrize(
    ("word", "known", "expected"),
    [("trak", ["radius", "width", "mass", "track"], "track"),
     ("wdith", ["radius", "width", "mass", "track"], "width"),
     ("whels", ["body", "wheels", "motors"], "wheels"),
     ("qqqq", ["radius", "width"], None)],
)
def test_nearest_key(word, known, expected):
    """Mistyped keys find their nearest (swapped letters count as close); nonsense finds none."""
    assert nearest_key(word, known) == expected


def test_wrong_dimension_names_key_and_kind():
    """A mass given as a length: the key and the kind expected are named."""
    data = minimal_data()
    data["body"]["frame"]["mass"] = "80 mm"
    (problem,) = problems_of(data)
    assert problem.startswith("body.frame.mass: "), problem
    assert "'80 mm' is a length, expected a mass" in problem, problem


def test_negative_radius():
    """A negative wheel radius is refused with the key and the value in SI."""
    data = minimal_data()
    data["wheels"]["radius"] = "-34 mm"
    (problem,) = problems_of(data)
    assert problem.startswith("wheels.radius: "), problem
    assert "greater than 0" in problem and "-0.034" in problem, problem


def test_zero_mass():
    """A part with zero mass is refused, naming the part's key."""
    (problem,) = problems_of(with_part(mass="0 g"))
    assert problem.startswith("body.parts[0].mass: "), problem
    assert "greater than 0" in problem, problem


def test_part_with_a_zero_size():
    """A part with a side of zero is refused, naming which side."""
    (problem,) = problems_of(with_part(size=["20 mm", 0, "20 mm"]))
    assert problem.startswith("body.parts[0].size[1]: "), problem
    assert "greater than 0" in problem, problem


def test_frame_below_the_ground():
    """A frame whose underside is below the wheels' contact (−radius) is refused."""
    data = minimal_data()
    data["body"]["frame"]["bottom"] = "-40 mm"  # wheel radius 34 mm
    (problem,) = problems_of(data)
    assert "body.frame.bottom" in problem and "ground" in problem, problem
    assert "-34 mm" in problem, problem


def test_part_below_the_ground():
    """A part reaching below −radius is refused, naming the part."""
    (problem,) = problems_of(with_part(at=[0, 0, "-30 mm"]))  # underside −40 mm
    assert "body.parts[0] (battery)" in problem and "ground" in problem, problem


def test_missing_required_key():
    """A required key left out is named as missing."""
    data = minimal_data()
    del data["wheels"]["mass"]
    assert problems_of(data) == ["wheels.mass: missing (required)"]


def test_missing_required_section():
    """A description without wheels names the missing section."""
    data = minimal_data()
    del data["wheels"]
    assert problems_of(data) == ["wheels: missing (required)"]


def test_driver_drop_larger_than_the_battery():
    """A driver that eats the whole battery voltage leaves nothing: refused, keys named."""
    data = minimal_data()
    data["driver"] = {"voltage_drop": "9 V"}  # default battery 7.2 V
    (problem,) = problems_of(data)
    assert "driver.voltage_drop" in problem, problem


def test_yaml_syntax_error_has_line_number(tmp_path):
    """A YAML syntax error names the file and the line (1-based)."""
    text = MINIMAL_YAML + "motors: {gear_ratio: 30\nbattery: {cells: 4}\n"
    path = write(tmp_path, text)
    with pytest.raises(RobotFileError) as info:
        load_robot(path)
    (problem,) = info.value.problems
    assert problem.startswith("line "), problem
    assert "YAML syntax error" in problem, problem
    assert str(info.value).startswith(f"{path}: line ")


def test_yaml_bad_tagged_value_is_a_file_error():
    """YAML that parses but cannot be built (a date with month 13) is a RobotFileError."""
    with pytest.raises(RobotFileError, match="cannot read the YAML"):
        parse_yaml("when: 2020-13-45\n", "bot.yaml")


def test_missing_file(tmp_path):
    """A file that does not exist is named."""
    path = tmp_path / "nowhere.yaml"
    with pytest.raises(RobotFileError) as info:
        load_robot(path)
    assert info.value.problems[0].startswith("no such file (check the path")
    assert str(path) in str(info.value)


@pytest.mark.parametrize("text", ["- body\n- wheels\n", "just text\n", "42\n", ""])
def test_top_level_not_a_mapping(tmp_path, text):
    """A file whose top level is a list, a scalar or empty is refused."""
    with pytest.raises(RobotFileError) as info:
        load_robot(write(tmp_path, text))
    assert "mapping" in str(info.value)


def test_several_problems_listed_one_line_each():
    """Every problem is reported at once, one line each, each line naming the file."""
    data = minimal_data()
    data["wheels"]["trak"] = 1
    data["body"]["frame"]["mass"] = "80 mm"
    data["wheels"]["radius"] = -1
    data["motors"] = {"gear_ratio": 0.5}
    with pytest.raises(RobotFileError) as info:
        robot_from_dict(data, "bot.yaml")
    problems = info.value.problems
    keys = ["wheels.trak", "body.frame.mass", "wheels.radius", "motors.gear_ratio"]
    for key in keys:
        assert any(p.startswith(key + ":") for p in problems), (key, problems)
    lines = str(info.value).splitlines()
    assert len(lines) == len(problems) == len(keys)
    assert all(line.startswith("bot.yaml: ") for line in lines), lines


def test_robot_file_error_is_a_value_error():
    """Core errors subclass built-ins (project rule)."""
    assert issubclass(RobotFileError, ValueError)


# ------------------------------------------------------------------ overrides


def test_overrides_with_dotted_keys_and_list_index():
    """Dotted overrides set nested keys and list items; the input is left untouched."""
    data = with_part()
    before = copy.deepcopy(data)
    spec = robot_from_dict(
        data,
        overrides={"body.parts.0.mass": "120 g", "wheels.friction": 0.4,
                   "motors.gear_ratio": 30, "body.parts.0.at": [0, 0, "60 mm"]},
    )
    assert spec.body.parts[0].mass == pytest.approx(0.120)
    assert spec.body.parts[0].at == pytest.approx((0.0, 0.0, 0.060))
    assert spec.wheels.friction == 0.4
    assert spec.motors.gear_ratio == 30
    assert data == before, "overrides changed the caller's data"


def test_override_creates_a_missing_section(tmp_path):
    """An override into a section the file leaves out creates it (on top of its defaults)."""
    spec = load_robot(write(tmp_path, MINIMAL_YAML), {"encoders.counts_per_rev": 64})
    assert spec.encoders.counts_per_rev == 64
    assert spec.motors == Motors()


def test_override_value_is_still_validated():
    """An override goes through the same checks as the file: a bad value is named."""
    problems = problems_of(minimal_data(), {"wheels.radius": "3 kg"})
    assert len(problems) == 1 and problems[0].startswith("wheels.radius: "), problems


@pytest.mark.parametrize(
    "dotted", ["body.parts.5.mass", "body.parts.x.mass", "wheels.radius.x", "body..mass"]
)
def test_bad_override_path(dotted):
    """An override path leading nowhere is a RobotFileError naming the path."""
    problems = problems_of(with_part(), {dotted: 1})
    assert len(problems) == 1 and dotted in problems[0], problems


def test_bad_override_path_direct():
    """apply_overrides lists every bad path, one line each."""
    with pytest.raises(RobotFileError) as info:
        apply_overrides(with_part(), {"body.parts.7.mass": 1, "wheels.radius.q": 2}, "b.yaml")
    assert len(info.value.problems) == 2


# ------------------------------------------------------------------ fuzzing

FUZZ = settings(max_examples=120, deadline=None, derandomize=True,
                suppress_health_check=[HealthCheck.too_slow])
EXAMPLE_DATA = yaml.safe_load((ROBOTS_DIR / "shelf-runner.yaml").read_text(encoding="utf-8"))
EXAMPLE_TEXT = (ROBOTS_DIR / "desk-mite.yaml").read_text(encoding="utf-8")


def _places(node, path=()) -> list[tuple]:
    """Every path (keys and list indexes) in nested data, the root included."""
    out = [path]
    if isinstance(node, dict):
        for key, value in node.items():
            out += _places(value, (*path, key))
    elif isinstance(node, list):
        for i, value in enumerate(node):
            out += _places(value, (*path, i))
    return out


PLACES = _places(EXAMPLE_DATA)
scalars = st.one_of(
    st.none(), st.booleans(), st.integers(-(10**30), 10**30), st.integers(10**308, 10**400),
    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=12),
    st.sampled_from(["35 mm", "80 g", "2 g", "-5 mm", "0", "1e400", "80 %", "5 Hz", "nan",
                     "250 rpm", "brake", "#12ab4f", "kg", "1,5 mm"]),
)
values = st.recursive(scalars, lambda inner: st.one_of(
    st.lists(inner, max_size=4), st.dictionaries(st.text(max_size=6), inner, max_size=3)),
    max_leaves=6)
mutations = st.lists(
    st.tuples(st.sampled_from(["replace", "delete", "add"]), st.sampled_from(PLACES),
              st.text(max_size=8), values),
    min_size=1, max_size=4,
)


def _mutate(data, mutation) -> object:
    """Apply one mutation at a path; paths made stale by earlier mutations are skipped."""
    op, path, new_key, value = mutation
    if not path:
        return value if op == "replace" else data
    parent = data
    try:
        for key in path[:-1]:
            parent = parent[key]
        if op == "replace":
            parent[path[-1]] = value
        elif op == "delete":
            del parent[path[-1]]
        elif isinstance(parent, dict):
            parent[new_key] = value
        elif isinstance(parent, list):
            parent.append(value)
    except (KeyError, IndexError, TypeError):
        pass
    return data


def _accepts_or_names_problems(call) -> None:
    """The call gives a RobotSpec (whose figures derive) or a RobotFileError with lines."""
    try:
        spec = call()
    except RobotFileError as err:
        assert err.problems and all(isinstance(p, str) and p for p in err.problems)
    else:
        assert isinstance(spec, RobotSpec)
        assert np.isfinite(spec.figures.mass)


@FUZZ
@given(mutations)
def test_fuzz_mutated_data(changes):
    """Random mutations of a valid description never raise anything but RobotFileError."""
    data = copy.deepcopy(EXAMPLE_DATA)
    for change in changes:
        data = _mutate(data, change)
    _accepts_or_names_problems(lambda: robot_from_dict(data, "fuzz.yaml"))


@FUZZ
@given(st.dictionaries(
    st.lists(st.sampled_from(["body", "parts", "0", "1", "9", "-1", "frame", "mass", "wheels",
                              "radius", "x", "", "motors", "imu", "gyro", "bits"]),
             min_size=1, max_size=4).map(".".join),
    values, max_size=3))
def test_fuzz_overrides(overrides):
    """Random override paths and values give a RobotSpec or RobotFileError only."""
    _accepts_or_names_problems(lambda: robot_from_dict(EXAMPLE_DATA, "fuzz.yaml", overrides))


@FUZZ
@given(st.one_of(
    st.text(max_size=80),
    st.text(alphabet=":-[]{}#&*!|>'\"%@`,? \n\tab01.=e", max_size=80),
    st.tuples(st.integers(0, len(EXAMPLE_TEXT)), st.integers(0, 40), st.text(max_size=10)).map(
        lambda cut: EXAMPLE_TEXT[: cut[0]] + cut[2] + EXAMPLE_TEXT[cut[0] + cut[1]:]),
))
def test_fuzz_yaml_text(tmp_path_factory, text):
    """Random YAML text (free, YAML-punctuation-heavy, or a damaged example file) through
    parse_yaml/load_robot gives a RobotSpec or RobotFileError only."""
    path = tmp_path_factory.getbasetemp() / "fuzz-bot.yaml"
    path.write_text(text, encoding="utf-8")
    _accepts_or_names_problems(lambda: load_robot(path))
    try:
        parse_yaml(text, "fuzz.yaml")
    except RobotFileError:
        pass


def test_deeply_nested_yaml_is_a_file_error():
    """Nesting deeper than the parser's recursion limit is reported, not a RecursionError."""
    with pytest.raises(RobotFileError):
        parse_yaml("[" * 1000 + "]" * 1000, "deep.yaml")


# ------------------------------------------------------------------ fuzzing: duplicates,
# aliases, bare numbers

BLOCK_KEY_LINES = [i for i, line in enumerate(EXAMPLE_TEXT.splitlines())
                   if re.match(r"^\s*[a-z_]+:", line) and line.count("{") == line.count("}")]
FLOW_ITEMS = [m.span() for m in re.finditer(r"(?<=[{,] )[a-z_]+: [^,}\n\[]+(?=[,}])",
                                            EXAMPLE_TEXT)]
UNIT_VALUES = [m.span() for m in re.finditer(r"(?<=[:\[,] )(-?[0-9.]+(?:e-?[0-9]+)?) "
                                             r"(mm|g|V|A|rpm|kgf\*cm|ohm|mAh|Hz|deg/s)(?=[,\]}\s])",
                                             EXAMPLE_TEXT)]


@FUZZ
@given(st.sampled_from(BLOCK_KEY_LINES))
def test_fuzz_duplicated_block_key_is_refused(line_number):
    """Any key line given twice in a row (same mapping) is refused naming the key and both
    lines; nothing is silently merged."""
    lines = EXAMPLE_TEXT.splitlines()
    text = "\n".join(lines[: line_number + 1] + [lines[line_number]] + lines[line_number + 1:])
    key = lines[line_number].split(":")[0].strip()
    with pytest.raises(RobotFileError) as info:
        parse_yaml(text, "dup.yaml")
    message = str(info.value)
    assert "given twice" in message and key in message, message
    assert f"line {line_number + 2}" in message, message


@FUZZ
@given(st.sampled_from(FLOW_ITEMS))
def test_fuzz_duplicated_flow_key_is_refused(span):
    """A key repeated inside a flow mapping ({radius: 21 mm, radius: 21 mm}) is refused."""
    start, end = span
    item = EXAMPLE_TEXT[start:end]
    text = EXAMPLE_TEXT[:start] + item + ", " + EXAMPLE_TEXT[start:]
    with pytest.raises(RobotFileError, match=f"{item.split(':')[0]}: given twice"):
        parse_yaml(text, "dup.yaml")


@FUZZ
@given(st.sampled_from(BLOCK_KEY_LINES + [-1]), st.booleans(), st.text(
    alphabet="abcxyz_0123", min_size=1, max_size=6))
def test_fuzz_anchors_and_aliases_are_refused(line_number, use_alias, name):
    """An anchor on any value (and an alias to it) is refused with one line naming it."""
    lines = EXAMPLE_TEXT.splitlines()
    if line_number < 0:
        lines.append(f"extra: &{name} 1")
    else:
        key, _, rest = lines[line_number].partition(":")
        lines[line_number] = f"{key}: &{name}{rest}" if rest.strip() else \
            f"{key}: &{name}{rest}"
    if use_alias:
        lines.append(f"again: *{name}")
    with pytest.raises(RobotFileError) as info:
        load_robot_text("\n".join(lines) + "\n")
    assert len(info.value.problems) == 1 and "anchors and aliases" in info.value.problems[0]


def load_robot_text(text: str):
    return robot_from_dict(parse_yaml(text, "fuzz.yaml"), "fuzz.yaml")


@FUZZ
@given(st.sets(st.sampled_from(UNIT_VALUES), min_size=1, max_size=6))
def test_fuzz_bare_numbers(spans):
    """Units dropped from any values (a bare number is SI): a RobotSpec whose warnings are
    one line each naming a key, or a RobotFileError with one line per problem."""
    text = EXAMPLE_TEXT
    for start, end in sorted(spans, reverse=True):
        text = text[:start] + text[start:end].split(" ")[0] + text[end:]
    try:
        spec = load_robot_text(text)
    except RobotFileError as err:
        assert err.problems and all(p and "\n" not in p for p in err.problems)
    else:
        assert all(isinstance(w, str) and "\n" not in w and ": " in w for w in spec.warnings)
        assert np.isfinite(spec.figures.mass)
