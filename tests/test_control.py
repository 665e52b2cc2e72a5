"""The controller contract, script loading, duty checks, and the PID / tilt helpers."""

from __future__ import annotations

import dataclasses
import math
import os
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg
import scipy.signal

from sandbox.control import (
    ComplementaryTilt,
    ControllerError,
    ControllerLoadError,
    KalmanTilt,
    Pid,
    Reading,
    RobotFacts,
    Setpoint,
    check_duties,
    controller_rate,
    load_controller_class,
    make_controller,
)
from sandbox.robot import robot_from_dict

REPO = Path(__file__).resolve().parents[1]

ONE_BOX_ROBOT = {
    "name": "one-box",
    "body": {"frame": {"depth": 0.08, "width": 0.12, "height": 0.2, "mass": 0.5, "bottom": 0.01}},
    "wheels": {"radius": 0.04, "width": 0.02, "mass": 0.05, "track": 0.15},
    "motors": {"rated_voltage": 6.0, "no_load_speed": 20.0, "gear_ratio": 30},
    "battery": {"cells": 6, "cell_voltage": 1.2},
    "driver": {"voltage_drop": 1.2},
    "encoders": {"counts_per_rev": 12},
    "imu": {"at": [0.0, 0.0, 0.1]},
}


def one_box_facts(rate_hz: float = 200.0) -> RobotFacts:
    return RobotFacts.from_spec(robot_from_dict(ONE_BOX_ROBOT), rate_hz, 0.001)


def write(folder: Path, name: str, text: str) -> Path:
    path = folder / name
    path.write_text(textwrap.dedent(text), encoding="utf-8")
    return path


GOOD_SCRIPT = """
    from sandbox.control import Pid

    class Controller:
        rate_hz = 100

        def __init__(self, config, robot):
            self.gain = config.get("kp", 1.0)
            self.radius = robot.wheel_radius
            self.pid = Pid(self.gain)

        def step(self, r):
            r.log("seen_t", r.t)
            return (self.gain * 0.1, -self.gain * 0.1)

    class Balancer(Controller):
        def step(self, r):
            return (0.5, 0.5)
"""


# --------------------------------------------------------------------- values


def test_setpoint_is_a_frozen_value():
    """Setpoint holds speed (m/s) and turn (rad/s), defaults still, and cannot be changed."""
    point = Setpoint(speed=0.3, turn=-0.5)
    assert (point.speed, point.turn) == (0.3, -0.5)
    assert Setpoint() == Setpoint(0.0, 0.0)
    with pytest.raises(dataclasses.FrozenInstanceError):
        point.speed = 1.0  # type: ignore[misc]


def test_reading_log_collects_channels_and_take_logs_clears_them():
    """r.log records float channels for the tick (last value wins); take_logs hands them over."""
    r = Reading(t=0.5, dt=0.005, gyro=(0.0, 0.1, 0.0), accel=(0.0, 0.0, 9.8), ticks=(3, -2),
                battery_v=7.2, setpoint=Setpoint(0.2, 0.0))
    r.log("tilt", 0.25)
    r.log("duty_cmd", np.float32(0.5))
    r.log("count", 3)
    r.log("tilt", 0.5)
    logs = r.take_logs()
    assert logs == {"tilt": 0.5, "duty_cmd": 0.5, "count": 3.0}
    assert all(type(v) is float for v in logs.values()), "logged values become plain floats"
    assert r.logs == {} and r.take_logs() == {}
    with pytest.raises(AttributeError):
        r.unknown_field = 1  # __slots__: no stray attributes


@pytest.mark.parametrize("name", ["", "two words", "1st", "log.tilt", "tilt-rate", "tīlt", 5,
                                  None, "x" * 65])
def test_reading_log_rejects_names_that_are_not_simple_identifiers(name):
    """A channel name must be an ASCII identifier of at most 64 characters."""
    with pytest.raises(ControllerError, match="channel name"):
        Reading().log(name, 1.0)


@pytest.mark.parametrize("value", ["0.5", None, [1.0, 2.0], np.array([1.0]), b"1", object()])
def test_reading_log_rejects_values_that_are_not_one_number(value):
    """A logged value must convert to float and not be text or an array."""
    with pytest.raises(ControllerError, match="r.log"):
        Reading().log("tilt", value)


def test_robot_facts_of_a_single_box_body():
    """Facts from a one-box body: pitch inertia about the axle = box inertia m(a²+c²)/12 plus
    m·d² (parallel-axis theorem; Meriam & Kraige, *Dynamics*, inertia appendix [published]);
    counts per wheel turn = encoder counts × gear ratio; no-load wheel speed scales with the
    drive voltage, ω = V_drive / K_e (SOURCES.md §5)."""
    facts = one_box_facts(rate_hz=250.0)
    mass, depth, height, centre_z = 0.5, 0.08, 0.2, 0.01 + 0.1
    expected_inertia = mass * (depth**2 + height**2) / 12 + mass * centre_z**2
    assert facts.pitch_inertia == pytest.approx(expected_inertia, rel=1e-12), "pitch_inertia"
    assert facts.com_height == pytest.approx(centre_z, rel=1e-12), "com_height"
    assert facts.mass == pytest.approx(0.5 + 2 * 0.05, rel=1e-12), "mass"
    assert facts.counts_per_wheel_rev == 12 * 30
    assert facts.battery_voltage == pytest.approx(7.2) and facts.drive_voltage == pytest.approx(6.0)
    assert facts.max_wheel_speed == pytest.approx(20.0 * 6.0 / 6.0, rel=1e-12), "max_wheel_speed"
    assert facts.imu_at == (0.0, 0.0, 0.1)
    assert (facts.wheel_radius, facts.track) == (0.04, 0.15)
    assert (facts.rate_hz, facts.physics_dt) == (250.0, 0.001)
    with pytest.raises(dataclasses.FrozenInstanceError):
        facts.mass = 1.0  # type: ignore[misc]


def test_robot_facts_reject_a_bad_rate():
    """A controller rate or physics step that is not positive is refused."""
    spec = robot_from_dict(ONE_BOX_ROBOT)
    with pytest.raises(ValueError, match="rate_hz"):
        RobotFacts.from_spec(spec, 0.0, 0.001)
    with pytest.raises(ValueError, match="physics_dt"):
        RobotFacts.from_spec(spec, 200.0, -1.0)


# --------------------------------------------------------------------- loading scripts


def test_load_good_file_default_class_and_run_one_step(tmp_path):
    """A script's Controller class loads, receives (config, robot) and steps."""
    cls = load_controller_class(str(write(tmp_path, "ctrl.py", GOOD_SCRIPT)))
    assert cls.__name__ == "Controller"
    config = {"kp": 2.0}
    controller = make_controller(cls, config, one_box_facts())
    assert controller.radius == 0.04 and controller.gain == 2.0
    r = Reading(t=0.25)
    assert check_duties(controller.step(r)) == (0.2, -0.2, False)
    assert r.take_logs() == {"seen_t": 0.25}
    assert controller_rate(cls, None) == 100.0


def test_load_named_class_with_colon(tmp_path):
    """'file.py:ClassName' picks that class."""
    path = write(tmp_path, "ctrl.py", GOOD_SCRIPT)
    cls = load_controller_class(f"{path}:Balancer")
    assert cls.__name__ == "Balancer"
    assert make_controller(cls, {}, one_box_facts()).step(Reading()) == (0.5, 0.5)


def test_load_gives_a_fresh_module_each_time(tmp_path, monkeypatch):
    """Loading again after the file changed gives the new code, even with bytecode caching on and
    the rewrite keeping size and modification time (what a cached .pyc is checked against)."""
    monkeypatch.setattr(sys, "dont_write_bytecode", False)
    body = "class Controller:\n    def step(self, r):\n        return ({0}, {0})\n"
    path = write(tmp_path, "ctrl.py", body.format(0.1))
    first = load_controller_class(str(path))
    stamp = path.stat()
    path.write_text(body.format(0.2))
    os.utime(path, ns=(stamp.st_atime_ns, stamp.st_mtime_ns))
    second = load_controller_class(str(path))
    assert first is not second
    assert second.step(None, None) == (0.2, 0.2) and first.step(None, None) == (0.1, 0.1)
    assert not (tmp_path / "__pycache__").exists(), "no bytecode cache in the user's folder"


def test_load_imports_sibling_modules_then_forgets_them(tmp_path):
    """The script's folder is on sys.path while it imports; the sibling does not linger."""
    write(tmp_path, "tilt_gains_helper.py", "GAIN = 7.5\n")
    path = write(tmp_path, "ctrl.py", """
        import tilt_gains_helper

        class Controller:
            def __init__(self, config, robot):
                self.gain = tilt_gains_helper.GAIN

            def step(self, r):
                return (0.0, 0.0)
    """)
    cls = load_controller_class(str(path))
    assert make_controller(cls, {}, one_box_facts()).gain == 7.5
    assert str(tmp_path) not in sys.path
    assert "tilt_gains_helper" not in sys.modules


def test_load_missing_file(tmp_path):
    """A path that does not exist is a load error naming it."""
    with pytest.raises(ControllerLoadError, match="no such controller file"):
        load_controller_class(str(tmp_path / "absent.py"))


def test_load_refuses_a_file_that_is_not_python(tmp_path):
    """Only .py files are controller scripts."""
    path = write(tmp_path, "ctrl.txt", "class Controller: pass\n")
    with pytest.raises(ControllerLoadError, match=r"ending in \.py"):
        load_controller_class(str(path))


def test_load_syntax_error_names_file_and_line(tmp_path):
    """A syntax error names the file and the line."""
    path = write(tmp_path, "broken.py", """
        class Controller:
            def step(self, r)
                return (0, 0)
    """)
    with pytest.raises(ControllerLoadError) as caught:
        load_controller_class(str(path))
    message = str(caught.value)
    assert "broken.py, line 3" in message and "syntax error" in message


def test_load_exception_at_import_names_line_and_type(tmp_path):
    """An exception raised while the script imports names its type, message and line."""
    path = write(tmp_path, "raises.py", """
        GAIN = 1.0
        SCALE = GAIN / 0.0
    """)
    with pytest.raises(ControllerLoadError) as caught:
        load_controller_class(str(path))
    message = str(caught.value)
    assert "raises.py, line 3" in message and "ZeroDivisionError" in message
    assert not any(name.startswith("upright_controller_") and str(
        getattr(module, "__file__", "")) == str(path) for name, module in sys.modules.items())


def test_load_no_such_class_lists_the_classes_there(tmp_path):
    """A missing class name is reported with the classes that do exist."""
    path = write(tmp_path, "ctrl.py", GOOD_SCRIPT)
    with pytest.raises(ControllerLoadError, match=r"no class named 'Pilot'.*Balancer, Controller"):
        load_controller_class(f"{path}:Pilot")
    empty = write(tmp_path, "empty.py", "X = 1\n")
    with pytest.raises(ControllerLoadError, match=r"no class named 'Controller'.*none"):
        load_controller_class(str(empty))


def test_load_refuses_non_class_and_class_without_step(tmp_path):
    """The name must be a class, and the class must have a step method."""
    path = write(tmp_path, "ctrl.py", """
        def Controller(config, robot):
            return None

        class Idle:
            def __init__(self, config, robot):
                pass
    """)
    with pytest.raises(ControllerLoadError, match="is a function, not a class"):
        load_controller_class(str(path))
    with pytest.raises(ControllerLoadError, match=r"'Idle' has no step"):
        load_controller_class(f"{path}:Idle")
    with pytest.raises(ControllerLoadError, match="not a class name"):
        load_controller_class(f"{path}:9lives")


def test_make_controller_wraps_errors_in_init(tmp_path):
    """An exception in __init__ becomes ControllerError with the original as its cause and the
    script line; a config dict is copied so the controller cannot change the caller's."""
    path = write(tmp_path, "ctrl.py", """
        class Controller:
            def __init__(self, config, robot):
                config["touched"] = True
                self.kp = config["kp"]

            def step(self, r):
                return (0.0, 0.0)
    """)
    cls = load_controller_class(str(path))
    config: dict = {}
    with pytest.raises(ControllerError) as caught:
        make_controller(cls, config, one_box_facts())
    assert isinstance(caught.value.__cause__, KeyError)
    assert "Controller.__init__ raised KeyError" in str(caught.value)
    assert "ctrl.py, line 5" in str(caught.value)
    assert config == {}, "the caller's config is untouched"


def test_make_controller_reports_a_wrong_init_signature(tmp_path):
    """__init__ must take (config, robot)."""
    path = write(tmp_path, "ctrl.py", """
        class Controller:
            def __init__(self):
                pass

            def step(self, r):
                return (0.0, 0.0)
    """)
    with pytest.raises(ControllerError, match=r"does not fit its __init__ signature"):
        make_controller(load_controller_class(str(path)), {}, one_box_facts())


def test_controller_rate_precedence_and_validation():
    """Override, else class rate_hz, else 200 Hz; non-positive or non-numbers are refused."""

    class WithRate:
        rate_hz = 500

    class Plain:
        pass

    class Broken:
        rate_hz = "fast"

    assert controller_rate(WithRate, 100.0) == 100.0
    assert controller_rate(WithRate, None) == 500.0
    assert controller_rate(Plain, None) == 200.0
    with pytest.raises(ControllerLoadError, match="Broken.rate_hz"):
        controller_rate(Broken, None)
    for bad in (0.0, -5.0, math.nan, math.inf, True):
        with pytest.raises(ControllerLoadError, match="positive number of Hz"):
            controller_rate(Plain, bad)


SHIPPED_CONTROLLERS = sorted((REPO / "controllers").glob("*.py"))


@pytest.mark.parametrize("script", SHIPPED_CONTROLLERS, ids=lambda p: p.name)
def test_example_controllers_load(script):
    """Every shipped controller script loads and has a step method."""
    assert callable(load_controller_class(str(script)).step), script.name


# --------------------------------------------------------------------- duty checks


@pytest.mark.parametrize(
    ("out", "expected"),
    [
        ((0.25, -0.5), (0.25, -0.5, False)),
        ([1, -1], (1.0, -1.0, False)),
        (np.array([0.3, -0.3]), (0.3, -0.3, False)),
        ((np.float32(0.5), np.int64(0)), (0.5, 0.0, False)),
        ((1.5, -0.2), (1.0, -0.2, True)),
        ((0.1, -7.0), (0.1, -1.0, True)),
        ((-1.0000001, 1.0000001), (-1.0, 1.0, True)),
    ],
)
def test_check_duties_accepts_and_clips(out, expected):
    """Two finite reals pass through as floats, clipped to [-1, 1] with the clip flagged."""
    result = check_duties(out)
    assert result == pytest.approx(expected, abs=1e-7)
    assert type(result[0]) is float and type(result[1]) is float


@pytest.mark.parametrize(
    ("out", "problem"),
    [
        (None, "returned None"),
        (0.5, "returned a float"),
        ((0.1, 0.2, 0.3), "returned 3 values"),
        ((0.1,), "returned 1 values"),
        (np.zeros((2, 2)), r"array of shape \(2, 2\)"),
        ((math.nan, 0.0), "returned NaN for the left duty"),
        ((0.0, math.inf), "returned inf for the right duty"),
        ((-math.inf, 0.0), "returned -inf for the left duty"),
        ((np.float64("nan"), 0.0), "returned NaN for the left duty"),
        (("0.5", 0.5), "returned a str for the left duty"),
        ((0.5, True), "returned a bool"),
        ((0.5, 1j), "returned a complex for the right duty"),
    ],
)
def test_check_duties_rejects(out, problem):
    """None, wrong length, non-numbers, NaN and infinity end the run with a named cause."""
    with pytest.raises(ControllerError, match=problem):
        check_duties(out)


# --------------------------------------------------------------------- Pid


def test_pid_proportional_only_is_kp_times_error():
    """P-only: u = k_p·e (Åström & Murray, *Feedback Systems*, PID chapter [published]),
    and the output limits clip it."""
    pid = Pid(2.5, output_limits=None)
    for setpoint, measurement in [(1.0, 0.2), (-0.3, 0.4), (0.0, 0.0), (10.0, -3.0)]:
        u = pid.update(setpoint, measurement, 0.005)
        assert u == pytest.approx(2.5 * (setpoint - measurement), rel=1e-15), "P output"
    limited = Pid(2.5)
    assert limited.update(1.0, 0.0, 0.005) == 1.0
    assert limited.update(-1.0, 0.0, 0.005) == -1.0


def test_pid_derivative_filter_hand_iterated():
    """Filtered derivative on the measurement, D_k = T_f/(T_f+h)·D_{k−1} − k_d/(T_f+h)·(y_k −
    y_{k−1}) (Åström & Murray, PID implementation; SOURCES.md §6 [published]). Hand iteration,
    k_d = 0.5, T_f = 0.02 s, h = 0.01 s, y = 0, 0.1, 0.3, 0.3: D = 0, −1.666667, −4.444444,
    −2.962963."""
    pid = Pid(0.0, kd=0.5, derivative_filter=0.02, output_limits=None)
    outputs = [pid.update(0.0, y, 0.01) for y in (0.0, 0.1, 0.3, 0.3)]
    np.testing.assert_allclose(outputs, [0.0, -5 / 3, -40 / 9, -80 / 27], rtol=1e-12,
                               err_msg="filtered derivative term D_k")
    assert pid.derivative == pytest.approx(-80 / 27, rel=1e-12)


def test_pid_matches_reference_recursion_on_a_random_sequence():
    """Full PID against a literal transcription of Åström & Murray's discrete forms (SOURCES.md
    §6 [published]) over a seeded random sequence with saturation: D filter, back-calculation
    I_{k+1} = I_k + k_i h e + (h/T_t)(u − v)."""
    rng = np.random.default_rng(7)
    kp, ki, kd, t_f, t_t, h = 3.0, 8.0, 0.2, 0.01, 0.05, 0.005
    setpoints = rng.uniform(-0.5, 0.5, 400)
    measurements = rng.uniform(-0.5, 0.5, 400)
    pid = Pid(kp, ki, kd, derivative_filter=t_f, tracking_time=t_t, output_limits=(-0.8, 0.6))
    integral, derivative, last_y = 0.0, 0.0, measurements[0]
    saturated = 0
    for r, y in zip(setpoints, measurements, strict=True):
        e = r - y
        derivative = t_f / (t_f + h) * derivative - kd / (t_f + h) * (y - last_y)
        v = kp * e + integral + derivative
        u = min(max(v, -0.8), 0.6)
        integral = integral + ki * h * e + (h / t_t) * (u - v)
        last_y = y
        saturated += u != v
        assert pid.update(r, y, h) == pytest.approx(u, abs=1e-12), "PID output u"
        assert pid.integral == pytest.approx(integral, abs=1e-12), "integral state I"
    assert saturated > 50, "the sequence exercises saturation"


def test_pid_measured_rate_equals_differencing():
    """A measured derivative (gyro) replaces y_k − y_{k−1} by rate·h: the same numbers when the
    rate is the exact difference quotient [derived from SOURCES.md §6]."""
    ys = [0.0, 0.02, 0.05, 0.04, -0.01]
    h = 0.005
    by_difference = Pid(1.0, 2.0, 0.3, derivative_filter=0.004, output_limits=None)
    by_rate = Pid(1.0, 2.0, 0.3, derivative_filter=0.004, output_limits=None)
    previous = ys[0]
    for y in ys:
        expected = by_difference.update(0.0, y, h)
        assert by_rate.update(0.0, y, h, measured_rate=(y - previous) / h) == pytest.approx(
            expected, abs=1e-12), "output with measured rate"
        previous = y


def test_pid_back_calculation_hand_iterated_and_bounded():
    """Back-calculation anti-windup (Åström & Murray; SOURCES.md §6 [published]): k_p = 1,
    k_i = 10, T_t = 0.05 s, h = 0.01 s, constant e = 1.5, limit 1. Then I_{k+1} = 0.8·I_k + 0.05:
    I = 0, 0.05, 0.09, 0.122 and I → 0.25 = k_i·e·T_t − (k_p·e − 1) [derived]. Without
    anti-windup (T_t = ∞) I_k = 0.15·k grows without bound."""
    pid = Pid(1.0, 10.0, tracking_time=0.05)
    integrals = []
    for _ in range(4):
        integrals.append(pid.integral)
        assert pid.update(1.5, 0.0, 0.01) == 1.0, "saturated output"
    np.testing.assert_allclose(integrals, [0.0, 0.05, 0.09, 0.122], rtol=1e-12,
                               err_msg="integral state I_k")
    for _ in range(200):
        pid.update(1.5, 0.0, 0.01)
    assert pid.integral == pytest.approx(0.25, rel=1e-12), "steady integral under saturation"

    windup = Pid(1.0, 10.0, tracking_time=math.inf)
    for _ in range(100):
        windup.update(1.5, 0.0, 0.01)
    assert windup.integral == pytest.approx(15.0, rel=1e-12), "integral without anti-windup"


def test_pid_default_tracking_time_rule():
    """T_t defaults to √(T_i·T_d), T_i = k_p/k_i, T_d = k_d/k_p; T_i without D (Åström & Murray's
    rule of thumb [memory])."""
    assert Pid(2.0, 4.0, 0.5).tracking_time == pytest.approx(math.sqrt(0.5 * 0.25), rel=1e-12)
    assert Pid(2.0, 4.0).tracking_time == pytest.approx(0.5, rel=1e-12)


def test_pid_pure_integral_holds_at_the_limit():
    """Pure I with automatic tracking (T_t = h) gives I_{k+1} = u_k + k_i h e: the integrator
    sits one step past the limit, so after 100 saturated steps the output comes off the limit
    one step after the error changes sign (k_i h e = ±0.5 here) [derived from SOURCES.md §6]."""
    pid = Pid(0.0, 5.0)
    for _ in range(100):
        pid.update(10.0, 0.0, 0.01)
    assert pid.integral == pytest.approx(1.0 + 5.0 * 0.01 * 10.0, rel=1e-12), "held integral"
    outputs = [pid.update(-10.0, 0.0, 0.01) for _ in range(4)]
    np.testing.assert_allclose(outputs, [1.0, 0.5, 0.0, -0.5], atol=1e-12, err_msg="output u")


def test_pid_output_stays_within_limits_and_reset_clears_state():
    """The output never leaves the limits; reset forgets integral, derivative, last measurement."""
    rng = np.random.default_rng(3)
    pid = Pid(4.0, 20.0, 0.1, derivative_filter=0.005, output_limits=(-0.7, 0.9))
    outputs = [pid.update(r, y, 0.005) for r, y in rng.normal(0.0, 1.0, (300, 2))]
    assert min(outputs) >= -0.7 and max(outputs) <= 0.9
    pid.reset()
    assert (pid.integral, pid.derivative, pid.output) == (0.0, 0.0, 0.0)
    assert pid.update(0.0, 5.0, 0.005) == pytest.approx(-0.7), "no derivative kick after reset"


def test_pid_rejects_bad_settings():
    """Non-finite gains, negative filter time, reversed limits, non-positive T_t or dt."""
    for kwargs in ({"kp": math.nan}, {"kp": 1.0, "derivative_filter": -0.1},
                   {"kp": 1.0, "output_limits": (1.0, -1.0)}, {"kp": 1.0, "tracking_time": 0.0}):
        with pytest.raises(ValueError):
            Pid(**kwargs)
    with pytest.raises(ValueError, match="dt"):
        Pid(1.0).update(0.0, 0.0, 0.0)


def test_pi_closed_loop_with_first_order_plant_matches_scipy():
    """PI on a first-order plant G = K/(T s + 1), zero-order hold h: the loop driven by Pid
    equals scipy.signal.dlsim of the closed loop built from scipy.signal.cont2discrete, and the
    integrator removes the steady-state error (final-value theorem; Franklin, Powell &
    Emami-Naeini, *Feedback Control of Dynamic Systems*, steady-state error [published])."""
    gain, time_constant, h = 2.0, 0.5, 0.01
    kp, ki, target = 0.8, 3.0, 0.4
    num, den, _ = scipy.signal.cont2discrete(([gain], [time_constant, 1.0]), h, method="zoh")
    b, a = float(num.ravel()[-1]), -float(den.ravel()[-1])  # y_{k+1} = a y_k + b u_k
    closed_a = np.array([[a - b * kp, b], [-ki * h, 1.0]])
    closed_b = np.array([[b * kp], [ki * h]])
    steps = 600
    _, reference, _ = scipy.signal.dlsim(
        (closed_a, closed_b, np.array([[1.0, 0.0]]), np.array([[0.0]]), h),
        np.full(steps, target))
    pid = Pid(kp, ki, output_limits=None)
    y, trace = 0.0, []
    for _ in range(steps):
        trace.append(y)
        y = a * y + b * pid.update(target, y, h)
    np.testing.assert_allclose(trace, reference.ravel(), atol=1e-12, err_msg="plant output y")
    assert trace[-1] == pytest.approx(target, abs=1e-6), "steady-state output"


# --------------------------------------------------------------------- ComplementaryTilt


def test_complementary_alpha():
    """α = τ/(τ + dt) = 0.98039216 for τ = 0.5 s, dt = 0.01 s (SOURCES.md §7 [derived])."""
    tilt = ComplementaryTilt(0.5)
    assert tilt.alpha(0.01) == pytest.approx(0.98039216, abs=5e-9), "alpha"
    tilt.update(0.0, 0.0, 0.01)  # first update starts from the accelerometer
    assert tilt.update(0.0, 1.0, 0.01) == pytest.approx(1 - 0.98039216, abs=5e-9), "one step"


def test_complementary_starts_from_the_accelerometer():
    """The first update takes the accelerometer tilt as is; reset starts over."""
    tilt = ComplementaryTilt(0.5)
    assert tilt.update(3.0, 0.2, 0.01) == 0.2
    tilt.reset()
    assert tilt.update(0.0, -0.1, 0.01) == -0.1


def test_complementary_constant_gyro_bias_gives_tau_times_bias():
    """Constant gyro bias b with a constant true tilt leaves a steady error τ·b (SOURCES.md §7,
    exact [derived]): τ = 0.5 s, b = 0.01 rad/s → 0.005 rad. Residual after 3000 steps is
    α^3000 ≈ 1e-26 of the start."""
    tilt, true_tilt, bias = ComplementaryTilt(0.5), 0.1, 0.01
    for _ in range(3000):
        estimate = tilt.update(bias, true_tilt, 0.01)
    assert estimate - true_tilt == pytest.approx(0.005, abs=1e-12), "steady tilt error"


def test_complementary_from_reading_uses_gyro_y_and_accel_tilt():
    """At a static 10° the specific force reads f_x = −1.702907, f_z = 9.657665 m/s² (SOURCES.md
    §4 [derived]); atan2(−f_x, f_z) returns 10°."""
    tilt = ComplementaryTilt(0.5)
    r = Reading(dt=0.005, gyro=(0.3, 0.0, -0.2), accel=(-1.702907, 0.0, 9.657665))
    for _ in range(5):
        estimate = tilt.update_from_reading(r)
    assert estimate == pytest.approx(math.radians(10.0), abs=1e-6), "tilt from reading"


# --------------------------------------------------------------------- KalmanTilt


def test_kalman_scalar_random_walk_steady_state():
    """With the bias fixed (bias_noise = 0, initial_bias_std = 0) the filter is a scalar random
    walk with q = rate_noise²·dt = 1e-4, r = angle_noise² = 1e-2 (dt = 1 s): steady prior
    P = (q + √(q² + 4qr))/2 = 1.05125e-3, gain 0.0951249 (SOURCES.md §8 [derived])."""
    kalman = KalmanTilt(0.1, 0.01, 0.0, initial_bias_std=0.0)
    for _ in range(300):
        kalman.update(0.0, 0.0, 1.0)
    assert kalman.prior_covariance[0, 0] == pytest.approx(1.05125e-3, rel=1e-5), "prior P"
    assert kalman.gain[0] == pytest.approx(0.0951249, rel=1e-6), "Kalman gain"
    assert kalman.gain[1] == 0.0 and kalman.covariance[1, 1] == 0.0


def test_kalman_steady_gain_matches_discrete_riccati():
    """The two-state filter's steady gain equals the one from
    scipy.linalg.solve_discrete_are(Fᵀ, Hᵀ, Q, R) on its own model, K = P Hᵀ (H P Hᵀ + R)⁻¹
    (reference library; SOURCES.md §8), to 1e-6."""
    kalman = KalmanTilt(0.02, 0.002, 0.001)
    dt = 0.005
    for _ in range(6000):
        kalman.update(0.0, 0.0, dt)
    f, h, q, r = kalman.matrices(dt)
    prior = scipy.linalg.solve_discrete_are(f.T, h.T, q, r)
    gain = (prior @ h.T / (h @ prior @ h.T + r)).ravel()
    np.testing.assert_allclose(kalman.gain, gain, rtol=1e-6, atol=1e-9, err_msg="steady gain K")
    np.testing.assert_allclose(kalman.prior_covariance, prior, rtol=1e-6, err_msg="prior P")


def test_kalman_process_noise_is_the_exact_discretisation():
    """Q equals Van Loan's matrix-exponential discretisation of the continuous model
    A = [[0, −1], [0, 0]], Q_c = diag(rate_noise², bias_noise²) (Van Loan, IEEE TAC 23(3), 1978
    [memory]; computed with scipy.linalg.expm)."""
    dt, rate_noise, bias_noise = 0.01, 0.003, 0.02
    f, _, q, _ = KalmanTilt(0.05, rate_noise, bias_noise).matrices(dt)
    a = np.array([[0.0, -1.0], [0.0, 0.0]])
    qc = np.diag([rate_noise**2, bias_noise**2])
    block = scipy.linalg.expm(np.block([[-a, qc], [np.zeros((2, 2)), a.T]]) * dt)
    phi = block[2:, 2:].T
    np.testing.assert_allclose(f, phi, rtol=1e-12, err_msg="transition F")
    np.testing.assert_allclose(q, phi @ block[:2, 2:], rtol=1e-9, atol=1e-18,
                               err_msg="process noise Q")


def test_kalman_learns_a_constant_gyro_bias():
    """Noise-free constant tilt and gyro bias: the filter is a stable linear observer of an exact
    model, so its error decays to zero (observer convergence; Franklin, Powell & Emami-Naeini,
    estimator design [published]): bias → b, angle → true tilt, rate → 0."""
    kalman, true_tilt, bias = KalmanTilt(0.02, 0.002, 0.001), 0.15, 0.03
    for _ in range(8000):
        kalman.update(bias, true_tilt, 0.005)
    assert kalman.bias == pytest.approx(bias, abs=1e-6), "gyro bias estimate"
    assert kalman.angle == pytest.approx(true_tilt, abs=1e-7), "tilt estimate"
    assert kalman.rate == pytest.approx(0.0, abs=1e-6), "bias-corrected rate"


def test_kalman_beats_the_accelerometer_alone_on_noisy_data():
    """Seeded noise: accelerometer tilt σ = 0.02 rad, gyro white noise 0.002 rad/s/√Hz, bias
    0.02 rad/s on a 1 Hz tilt swing; after 2 s the filter's RMS tilt error is under half the
    raw accelerometer's [derived: fusion with an unbiased gyro lowers the error variance]."""
    rng = np.random.default_rng(11)
    dt, n = 0.005, 2000
    t = np.arange(n) * dt
    true_tilt = 0.1 * np.sin(2 * np.pi * t)
    true_rate = 0.2 * np.pi * np.cos(2 * np.pi * t)
    gyro = true_rate + 0.02 + rng.normal(0.0, 0.002 / math.sqrt(dt), n)
    accel_tilt = true_tilt + rng.normal(0.0, 0.02, n)
    kalman = KalmanTilt(0.02, 0.002, 0.001)
    estimates = np.array([kalman.update(w, z, dt) for w, z in zip(gyro, accel_tilt, strict=True)])
    late = t > 2.0
    filter_rms = np.sqrt(np.mean((estimates[late] - true_tilt[late]) ** 2))
    raw_rms = np.sqrt(np.mean((accel_tilt[late] - true_tilt[late]) ** 2))
    assert filter_rms < 0.5 * raw_rms, f"filter RMS {filter_rms:.4f} rad vs raw {raw_rms:.4f} rad"
    assert kalman.bias == pytest.approx(0.02, abs=0.005), "gyro bias estimate"


def test_kalman_from_reading_and_validation():
    """update_from_reading starts at the accelerometer tilt; bad noise settings are refused."""
    kalman = KalmanTilt(0.02, 0.002, 0.001)
    r = Reading(dt=0.005, gyro=(0.0, 0.0, 0.0), accel=(-1.702907, 0.0, 9.657665))
    assert kalman.update_from_reading(r) == pytest.approx(math.radians(10.0), abs=1e-6)
    for args in ((0.0, 0.1, 0.1), (0.1, -1.0, 0.1), (0.1, 0.1, math.nan)):
        with pytest.raises(ValueError):
            KalmanTilt(*args)


# --------------------------------------------------------------------- tilt, odometry, gains

def _facts(**changes):
    base = dict(wheel_radius=0.04, track=0.15, counts_per_wheel_rev=1000.0, mass=1.1,
                com_height=0.1,
                battery_voltage=7.2, drive_voltage=6.0, max_wheel_speed=30.0,
                imu_at=(0.0, 0.0, 0.1), physics_dt=0.001, rate_hz=200.0, pitch_inertia=0.02,
                body_mass=1.0, stall_torque=0.3)
    base.update(changes)
    return RobotFacts(**base)


def test_accel_tilt_static_and_with_own_acceleration():
    """Static tilt 10°: f = (−g sin θ, 0, g cos θ) gives back 10° (SOURCES.md §4 [derived]).

    Accelerating forward at a while upright, the specific force is (a, 0, g): taking a
    out gives 0° (Newton's second law in the body frame, small tilt).
    """
    from sandbox.control import accel_tilt

    g = 9.80665
    r = Reading(accel=(-1.702907, 0.0, 9.657665))
    assert accel_tilt(r) == pytest.approx(math.radians(10.0), abs=1e-6)
    r = Reading(accel=(0.8, 0.0, g))
    assert accel_tilt(r, forward_acceleration=0.8) == pytest.approx(0.0, abs=1e-12)
    assert accel_tilt(r) == pytest.approx(math.atan2(-0.8, g), abs=1e-12), "uncorrected"


def test_accel_tilt_refuses_readings_far_from_one_g():
    """|f| more than 0.1 g from 1 g (a shove, free fall, a dropped-out sensor) gives None,
    and the complementary filter then integrates the gyro alone (exact)."""
    from sandbox.control import accel_tilt

    assert accel_tilt(Reading(accel=(0.0, 0.0, 0.0))) is None
    assert accel_tilt(Reading(accel=(5.0, 0.0, 9.8))) is None
    tilt = ComplementaryTilt(0.5)
    tilt.update(0.0, 0.1, 0.01)
    assert tilt.update(0.2, None, 0.01) == pytest.approx(0.1 + 0.2 * 0.01, abs=1e-15)


def test_wheel_odometry_distance_speed_and_acceleration():
    """Distance = r (wheel turn relative to the body + tilt) (rolling without slip, any
    dynamics text); at constant speed the filtered speed converges to it and the
    acceleration to zero (first-order low-pass, unit DC gain [derived])."""
    from sandbox.control import WheelOdometry

    facts = _facts()
    odometry = WheelOdometry(facts, speed_filter=0.02)
    counts = facts.counts_per_wheel_rev
    assert odometry.update((int(counts), int(counts)), 0.0, 0.005) == pytest.approx(
        2 * math.pi * 0.04)
    assert odometry.update((0, 0), 0.25, 0.005) == pytest.approx(0.04 * 0.25)
    odometry.reset()
    speed = 0.3  # m/s
    for k in range(400):
        turn = speed * k * 0.005 / 0.04  # rad
        ticks = int(round(turn / (2 * math.pi) * counts))
        odometry.update((ticks, ticks), 0.0, 0.005)
    assert odometry.speed == pytest.approx(speed, rel=0.02), "speed (m/s)"
    assert abs(odometry.acceleration) < 0.2, "acceleration at constant speed (m/s^2)"


def test_pendulum_gains_place_the_tilt_loop_poles():
    """I θ̈ = m g l θ − T (kp θ + kd θ̇) has characteristic s² + (T kd / I) s + (T kp − m g l)/I;
    the gains must give ω_n = speed_up √(m g l / I) and ζ = damping (second-order
    pole placement, Franklin, Powell & Emami-Naeini ch. 3 [memory for the chapter])."""
    from sandbox.control import pendulum_gains

    facts = _facts()
    kp, kd = pendulum_gains(facts, speed_up=2.0, damping=0.7)
    g = 9.80665
    lean = facts.body_mass * g * facts.com_height
    torque = 2 * facts.stall_torque
    omega_sq = (torque * kp - lean) / facts.pitch_inertia
    omega = math.sqrt(omega_sq)
    assert omega == pytest.approx(2.0 * math.sqrt(lean / facts.pitch_inertia), rel=1e-12)
    assert torque * kd / facts.pitch_inertia / (2 * omega) == pytest.approx(0.7, rel=1e-12)
