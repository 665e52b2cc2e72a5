"""The diagnosis of runs that fall or fail: detectors on synthetic arrays, then short runs
whose cause is known by construction (too little gain, too much delay, no speed feedback,
a controller asking for duty 2, a frame that meets the floor before the tilt limit)."""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from ideal_parts import ideal_robot
from typer.testing import CliRunner

from sandbox.analysis import PlanarParams, duty_input_model, fall_time_constant, zoh_discretise
from sandbox.cli import app
from sandbox.diagnose import diagnose, needs_diagnosis
from sandbox.diagnose.findings import CLIPPED_SHARE, SENSOR_CLIP_FRACTION
from sandbox.diagnose.signals import (
    exponential_growth,
    final_run,
    half_cycles,
    oscillation,
    steady_growth,
    touching_tilt,
)
from sandbox.report import render_report
from sandbox.robot import load_robot
from sandbox.runner import RunSettings
from sandbox.session import run_once

ROOT = Path(__file__).resolve().parents[1]
SHELF_RUNNER = ROOT / "robots" / "shelf-runner.yaml"
PD = str(ROOT / "tests" / "controllers" / "pd_gyro.py")
CONSTANT = str(ROOT / "tests" / "controllers" / "constant.py")
PID_TILT = str(ROOT / "controllers" / "pid_tilt.py")
# An ideal IMU and no gearbox or rolling friction: the run is the linear model's loop
# (sensor noise, bias and Coulomb friction are not in it).
IDEAL = {"motors.friction_torque": 0.0, "wheels.rolling_resistance": 0.0,
         "imu.gyro.bias": 0.0, "imu.gyro.noise_density": 0.0,
         "imu.accel.bias": 0.0, "imu.accel.noise_density": 0.0}
RATE = 200.0
DT = 1.0 / RATE


# --------------------------------------------------------------------- detectors


def test_oscillation_reads_frequency_and_growth_of_a_growing_sine():
    """y = A e^(σt) sin(2πft): zero crossings every 1/(2f) and peaks growing as e^(σt)
    (the definition of an exponentially growing sinusoid; peak times shift uniformly, so
    the log-peak slope is σ)."""
    t = np.arange(0.0, 3.0, DT)
    y = 0.002 * np.exp(1.5 * t) * np.sin(2 * math.pi * 3.0 * t + 0.3)
    swing = oscillation(t, y)
    assert swing["frequency_hz"] == pytest.approx(3.0, rel=0.01)
    assert swing["growth_rate_1_s"] == pytest.approx(1.5, rel=0.03)
    assert swing["last_peak"] > swing["first_peak"]


def test_oscillation_none_for_noise_and_for_a_single_excursion():
    """White noise has no single frequency; one bump is no swing."""
    t = np.arange(0.0, 3.0, DT)
    noise = np.random.default_rng(3).normal(0.0, 0.01, t.size)
    assert oscillation(t, noise) is None
    assert oscillation(t, 0.1 * np.exp(-((t - 1.5) ** 2) / 0.01)) is None


def test_half_cycles_cross_where_the_sine_does():
    """sin(2πft) crosses zero at k/(2f); linear interpolation gets them to rounding."""
    t = np.arange(0.0, 1.0, DT)
    swings = half_cycles(t, np.sin(2 * math.pi * 2.0 * t + 0.1))
    starts = [s[0] for s in swings]
    expected = [(k * math.pi - 0.1) / (2 * math.pi * 2.0) for k in range(1, 1 + len(starts))]
    assert np.allclose(starts, expected, atol=2e-4)
    assert all(s[2] == pytest.approx(1.0, abs=1e-3) for s in swings)


def test_exponential_growth_rate_and_refusals():
    """ln|y| of y = y0 e^(λt) is a line of slope λ; a sine changes sign (no divergence);
    a ramp is not exponential (the log fit's R² stays under the threshold)."""
    t = np.arange(0.0, 2.0, DT)
    grow = exponential_growth(t, -0.001 * np.exp(2.5 * t))
    assert grow["growth_rate_1_s"] == pytest.approx(2.5, rel=1e-6)
    assert exponential_growth(t, 0.1 * np.sin(2 * math.pi * t)) is None
    assert exponential_growth(t, 0.001 + 0.001 * t) is None  # grows 3x only: under one e-fold


def test_steady_growth_times_a_rise_but_not_a_jump():
    """A speed ramping up over 3 s rises steadily for about 3 s (from a tenth of its peak);
    a jump (as a push gives) followed by a plateau rises in about no time."""
    t = np.arange(0.0, 4.0, DT)
    ramp = steady_growth(t, np.clip(t - 1.0, 0.0, None) * 0.2)
    assert ramp["end_s"] == pytest.approx(4.0 - DT, abs=0.11)
    assert ramp["start_s"] == pytest.approx(1.3, abs=0.11)
    assert ramp["rising_share"] > 0.95
    jump = steady_growth(t, np.where(t > 2.0, 0.3, 0.0))
    assert jump["end_s"] - jump["start_s"] < 0.25


def test_final_run_counts_the_stretch_that_reaches_the_end():
    t = np.arange(10) * 0.005
    assert final_run(t, np.array([0, 1, 0, 0, 0, 0, 1, 1, 1, 1], bool)) == pytest.approx(
        (0.02, 0.03))
    assert final_run(t, np.array([1] * 9 + [0], bool))[0] == 0.0


def test_touching_tilt_matches_the_corner_geometry():
    """The lowest front corner (a, b) of a box meets a floor r below the axle when
    a sinθ − b cosθ = r, i.e. θ = atan2(b, a) + asin(r / √(a²+b²)) (plane geometry)."""
    spec = load_robot(SHELF_RUNNER, {"body.parts": []})
    frame = spec.body.frame
    a, b = frame.depth / 2, frame.bottom
    expected = math.atan2(b, a) + math.asin(spec.wheels.radius / math.hypot(a, b))
    assert touching_tilt(spec) == pytest.approx(expected, abs=math.radians(0.1))


# --------------------------------------------------------------------- findings on arrays


def synthetic(n: int = 400, **columns) -> dict[str, np.ndarray]:
    """A quiet trace of n ticks at 200 Hz; ``columns`` replace any column."""
    t = np.arange(n) * DT
    zeros = np.zeros(n)
    trace = {name: zeros.copy() for name in (
        "x_m", "pitch_rad", "pitch_rate_rad_s", "speed_m_s", "duty_l", "duty_r",
        "gyro_x_rad_s", "gyro_y_rad_s", "gyro_z_rad_s", "accel_x_m_s2", "accel_y_m_s2",
        "wheel_l_rad", "wheel_r_rad")}
    trace["t_s"] = t
    trace["accel_z_m_s2"] = np.full(n, 9.81)
    trace["battery_v"] = np.full(n, 7.2)
    trace.update(columns)
    return trace


def codes(findings: list[dict]) -> list[str]:
    return [f["code"] for f in findings]


@pytest.fixture(scope="module")
def shelf():
    return load_robot(SHELF_RUNNER)


def test_tilt_limit_or_frame_decides_how_a_fall_ended(shelf):
    """Past the fall limit: tilt_limit. Stopped under it: the world saw the frame touch."""
    n = 100
    pitch = np.linspace(0.0, math.radians(61.0), n)
    summary = {"status": "fell", "fell_at_s": (n - 1) * DT, "rate_hz": RATE}
    found = diagnose(synthetic(n, pitch_rad=pitch), summary, shelf)
    assert "tilt_limit" in codes(found) and "frame_touched" not in codes(found)
    touched = diagnose(synthetic(n, pitch_rad=pitch * 42 / 61), summary, shelf)
    frame = next(f for f in touched if f["code"] == "frame_touched")
    assert frame["figures"]["pitch_deg"] == pytest.approx(42.0)
    assert frame["figures"]["flat_floor_touch_deg"] == pytest.approx(
        math.degrees(touching_tilt(shelf)))


def test_saturation_side_duration_and_clipping(shelf):
    """Duty at +1 on both sides for the last 0.3 s: saturated for 0.3 s, both sides, +1; a
    controller whose output was clipped on most ticks gets that as the first cause."""
    n = 400
    duty = np.where(np.arange(n) >= n - 60, 1.0, 0.2)
    summary = {"status": "fell", "fell_at_s": (n - 1) * DT, "clipped_duties": 0}
    found = diagnose(synthetic(n, duty_l=duty, duty_r=duty), summary, shelf)
    sat = next(f for f in found if f["code"] == "saturated")["figures"]
    assert sat["final_s"] == pytest.approx(60 * DT) and sat["side"] == "both sides"
    assert sat["sign"] == "+1"
    clipped = diagnose(synthetic(n, duty_l=np.ones(n), duty_r=np.ones(n)),
                       {**summary, "clipped_duties": int(CLIPPED_SHARE * n) + 1}, shelf)
    assert clipped[0]["code"] == "saturated" and "scale it" in clipped[0]["text"]


def test_top_speed_against_the_back_emf_limit(shelf):
    """Wheel rate 95 % of (battery − driver drop) / ke: top_speed at 0.95 (DC motor
    steady state, no-load speed ∝ voltage; SOURCES §5)."""
    n = 200
    limit = (7.2 - shelf.driver.voltage_drop) / shelf.figures.back_emf_constant
    rate = np.linspace(0.0, 0.95 * limit, n)
    trace = synthetic(n, wheel_rate_l_rad_s=rate, wheel_rate_r_rad_s=rate)
    found = diagnose(trace, {"status": "fell", "fell_at_s": 1.0}, shelf)
    top = next(f for f in found if f["code"] == "top_speed")["figures"]
    assert top["fraction"] == pytest.approx(0.95, rel=1e-9)
    assert top["limit_rad_s"] == pytest.approx(limit)


def test_sensor_clipping_while_balancing_or_only_in_the_fall(shelf):
    """A gyro at its range with the robot upright is a cause; in the final fall, a consequence."""
    n = 200
    rng = shelf.imu.gyro.range
    gyro = np.zeros(n)
    gyro[50:55] = rng
    upright = diagnose(synthetic(n, gyro_y_rad_s=gyro), {"status": "fell"}, shelf)
    clip = next(f for f in upright if f["code"] == "sensor_clipped")
    assert clip["figures"]["while_balancing"] and clip["figures"]["axes"] == ["y"]
    assert upright[0]["code"] == "sensor_clipped"
    falling = np.where(np.arange(n) > 150, SENSOR_CLIP_FRACTION * rng, 0.0)
    pitch = np.where(np.arange(n) > 140, math.radians(30.0), 0.0)
    late = diagnose(synthetic(n, gyro_y_rad_s=falling, pitch_rad=pitch), {"status": "fell"},
                    shelf)
    assert not next(f for f in late if f["code"] == "sensor_clipped")["figures"][
        "while_balancing"]


def test_wheel_lift_from_the_axle_height(shelf):
    """Axle height = body centre-of-mass z less its offset turned by the pitch; rising 5 mm
    above the start on a flat floor means the wheels left it; not judged off flat floors."""
    n = 200
    com = shelf.figures.body.com
    z = np.full(n, 0.034 + com[2])
    z[120:] += 0.005
    trace = synthetic(n, pose_z_m=z)
    lifted = diagnose(trace, {"status": "fell"}, shelf)
    lift = next(f for f in lifted if f["code"] == "wheel_lifted")["figures"]
    assert lift["rise_m"] == pytest.approx(0.005) and lift["t_s"] == pytest.approx(120 * DT)
    assert "wheel_lifted" not in codes(diagnose(trace, {"status": "fell"}, shelf,
                                                flat_floor=False))


def test_failed_test_names_the_disturbance_it_followed(shelf):
    """A fall 0.4 s after the second push: that push, its time, kind and size."""
    n = 1200
    marks = [[2.0, "push 0.05 N*s"], [5.0, "push 0.075 N*s"]]
    verdict = {"passed": False, "checks": [], "disturbance_times_s": [2.0, 5.0]}
    found = diagnose(synthetic(n), {"status": "fell", "fell_at_s": 5.4}, shelf, marks=marks,
                     test_result=verdict)
    event = next(f for f in found if f["code"] == "disturbance")["figures"]
    assert (event["t_s"], event["kind"], event["size"]) == (5.0, "push", "0.075 N*s")
    assert event["failed_at_s"] == 5.4
    early = diagnose(synthetic(n), {"status": "fell", "fell_at_s": 1.0}, shelf, marks=marks,
                     test_result=verdict)
    assert next(f for f in early if f["code"] == "disturbance")["figures"]["t_s"] is None


def test_an_event_that_comes_during_the_fall_is_not_blamed_for_it(shelf):
    """A long shove from 6.00 s tips the robot (past 5 deg from 6.07 s, the fall's onset);
    a small push at 6.17 s lands on a robot already falling: the shove is named, the push
    listed as coming during the fall. Without an event before the onset, the last one
    before the fall is named as before."""
    n = 1240
    t = np.arange(n) * DT
    pitch = np.where(t > 6.0, 0.5 * (np.exp(8.0 * (t - 6.0)) - 1.0), 0.0)
    marks = [[2.0, "push 0.05 N*s"], [6.0, "push 2 N for 0.2 s"], [6.17, "push 0.05 N*s"]]
    verdict = {"passed": False, "checks": [], "disturbance_times_s": [2.0, 6.0, 6.17]}
    found = diagnose(synthetic(n, pitch_rad=pitch), {"status": "fell", "fell_at_s": 6.18},
                     shelf, marks=marks, test_result=verdict)
    event = next(f for f in found if f["code"] == "disturbance")
    onset = float(t[np.nonzero(np.abs(pitch) < math.radians(5.0))[0][-1]])
    assert event["figures"]["t_s"] == 6.0 and event["figures"]["onset_s"] == onset
    assert event["figures"]["during_fall"] == [{"t_s": 6.17, "label": "push 0.05 N*s"}]
    assert "already falling" in event["text"] and "6.17 s" in event["text"]
    # the same fall with no event before its onset: the last event before the fall
    late = [[6.17, "push 0.05 N*s"]]
    event = next(f for f in diagnose(synthetic(n, pitch_rad=pitch),
                                     {"status": "fell", "fell_at_s": 6.18}, shelf, marks=late,
                                     test_result=verdict) if f["code"] == "disturbance")
    assert event["figures"]["t_s"] == 6.17 and event["figures"]["during_fall"] == []


def test_only_falls_and_failed_tests_are_diagnosed():
    assert needs_diagnosis("fell", None)
    assert needs_diagnosis("completed", {"passed": False})
    assert not needs_diagnosis("completed", {"passed": True})
    assert not needs_diagnosis("completed", None)
    assert not needs_diagnosis("controller_error", {"passed": False})
    assert not needs_diagnosis("interrupted", None)


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(n=st.integers(0, 300), seed=st.integers(0, 2**16), scale=st.floats(1e-6, 3.0),
       status=st.sampled_from(["fell", "completed"]), fell_at=st.none() | st.floats(0, 2))
def test_any_trace_gives_plain_findings(shelf, n, seed, scale, status, fell_at):
    """Random traces of any length never crash the diagnosis; every finding is plain,
    JSON-ready data with a known code."""
    rng = np.random.default_rng(seed)
    columns = {name: scale * rng.standard_normal(n) for name in (
        "pitch_rad", "speed_m_s", "duty_l", "duty_r", "gyro_y_rad_s", "x_m", "wheel_l_rad")}
    trace = synthetic(n, **columns)
    verdict = {"passed": False, "checks": [{"label": "position held", "passed": False,
                                            "limit_value": 0.5}],
               "disturbance_times_s": [0.5]}
    found = diagnose(trace, {"status": status, "fell_at_s": fell_at}, shelf,
                     marks=[[0.5, "push 0.1 N*s"]], test_result=verdict)
    known = {"tilt_limit", "frame_touched", "wheel_lifted", "saturated", "top_speed",
             "oscillation", "divergence", "runaway", "sensor_clipped", "disturbance"}
    assert all(f["code"] in known and isinstance(f["text"], str) for f in found)
    json.dumps([f["figures"] for f in found], allow_nan=True)


def test_report_shows_the_diagnosis(tmp_path):
    suite = {"robot": "r", "controller": "c.py", "seed": 0, "passed": False, "tests": [
        {"name": "push", "status": "fell", "passed": False, "folder": "push", "message": "",
         "checks": [], "figures": {}, "diagnosis": [
             {"code": "runaway", "text": "runaway travel <fast>", "figures": {}}]}]}
    page = render_report(tmp_path, suite)
    assert "runaway travel &lt;fast&gt;" in page and 'class="diagnosis"' in page


# --------------------------------------------------------------------- runs with a known cause


def pd_loop_poles(spec, kp: float, kd: float, delay_ticks: int) -> np.ndarray:
    """Continuous-equivalent poles (1/s) of duty = kp·pitch + kd·pitch_rate, held over each
    period (zero-order hold, sandbox.analysis.zoh_discretise, same as
    scipy.signal.cont2discrete 'zoh') and applied ``delay_ticks`` periods late (the state
    augmented with the duties in the pipeline)."""
    A, B = duty_input_model(PlanarParams.from_spec(spec))
    Ad, Bd = zoh_discretise(A, B, DT)
    K = np.array([0.0, 0.0, kp, kd])  # duty = +K s
    size = 4 + delay_ticks
    loop = np.zeros((size, size))
    loop[:4, :4] = Ad
    if delay_ticks == 0:
        loop[:4, :4] += Bd @ K[None, :]
    else:
        loop[:4, 4:5] = Bd
        loop[4:size - 1, 5:] = np.eye(delay_ticks - 1)
        loop[size - 1, :4] = K
    return np.log(np.linalg.eigvals(loop).astype(complex)) / DT


def pd_run(config: dict, *, latency: float = 0.0, tilt_deg: float = 1.0, duration: float = 4.0,
           overrides: dict | None = None, controller: str = PD, fall_limit_deg: float = 60.0):
    spec = ideal_robot("shelf-runner", {**IDEAL, **(overrides or {})})
    settings = RunSettings(controller=controller, config=config, duration=duration,
                           tilt=math.radians(tilt_deg), latency=latency,
                           fall_limit=math.radians(fall_limit_deg))
    return spec, run_once(spec, settings, write=False)


@pytest.fixture(scope="module")
def ideal_shelf():
    return ideal_robot("shelf-runner", IDEAL)


@pytest.fixture(scope="module")
def base_gains(ideal_shelf):
    from sandbox.control import RobotFacts, pendulum_gains

    return pendulum_gains(RobotFacts.from_spec(ideal_shelf, RATE, 1e-3))


def test_far_too_little_gain_is_a_slow_divergence(ideal_shelf, base_gains):
    """A PD at a fifth of the usual gains: the tilt creeps away without a swing. Its growth
    rate is the linear loop's unstable real pole (within 15 %), below the robot's own fall
    rate (the open-loop pole of analyze's model)."""
    kp, kd = 0.2 * base_gains[0], 0.2 * base_gains[1]
    spec, result = pd_run({"kp": kp, "kd": kd})
    assert result.status == "fell"
    found = result.summary["diagnosis"]
    assert found[0]["code"] == "divergence", found
    poles = pd_loop_poles(spec, kp, kd, 0)
    unstable = max(p.real for p in poles if abs(p.imag) < 1e-9)
    figures = found[0]["figures"]
    assert figures["growth_rate_1_s"] == pytest.approx(unstable, rel=0.15)
    own = 1.0 / fall_time_constant(duty_input_model(PlanarParams.from_spec(spec))[0])
    assert figures["fall_rate_1_s"] == pytest.approx(own)
    assert "oscillation" not in codes(found) and "runaway" not in codes(found)


def test_large_latency_is_a_growing_oscillation_at_the_predicted_frequency(ideal_shelf,
                                                                          base_gains):
    """The same PD at 0.7 of the usual gains with 60 ms latency: a growing swing at the
    frequency of the dominant unstable complex pole of the delayed discrete loop (within
    15 %), read as too much gain for the delay."""
    kp, kd = 0.7 * base_gains[0], 0.7 * base_gains[1]
    spec, result = pd_run({"kp": kp, "kd": kd}, latency=0.06, tilt_deg=0.2)
    assert result.status == "fell"
    first = result.summary["diagnosis"][0]
    assert first["code"] == "oscillation", result.summary["diagnosis"]
    poles = pd_loop_poles(spec, kp, kd, 12)
    dominant = max((p for p in poles if p.imag > 1e-6), key=lambda p: p.real)
    assert dominant.real > 0
    assert first["figures"]["frequency_hz"] == pytest.approx(dominant.imag / (2 * math.pi),
                                                             rel=0.15)
    assert first["figures"]["growth_rate_1_s"] > 0 and "delay" in first["text"]


def test_tilt_only_pid_runs_away_to_top_speed():
    """pid_tilt without its wheel-speed term: travel runs away and the motors reach their
    top speed, the first finding naming the missing speed feedback."""
    _, result = pd_run({"speed_kd": 0.0}, controller=PID_TILT, duration=10.0, overrides={})
    assert result.status == "fell"
    found = result.summary["diagnosis"]
    assert found[0]["code"] == "runaway", found
    assert "wheel-speed feedback" in found[0]["text"]
    assert "top_speed" in codes(found)


def test_duty_two_is_saturation_first():
    """A controller returning 2.0: clipped every tick, saturated on both sides from the start."""
    _, result = pd_run({"left": 2.0, "right": 2.0}, controller=CONSTANT, overrides={})
    first = result.summary["diagnosis"][0]
    assert first["code"] == "saturated", result.summary["diagnosis"]
    assert first["figures"]["side"] == "both sides" and first["figures"]["sign"] == "+1"
    assert first["figures"]["clipped_ticks"] == result.summary["clipped_duties"] > 0


def test_low_frame_touches_the_floor_before_the_tilt_limit():
    """A frame reaching 25 mm below the axle (wheel radius 34 mm; its top kept where the
    parts are) meets a flat floor at the tilt its
    corner geometry gives, far under a 80° fall limit: frame_touched at that tilt."""
    spec, result = pd_run({}, controller=CONSTANT, tilt_deg=3.0, duration=3.0, overrides={
        "body.frame.bottom": "-25 mm", "body.frame.height": "235 mm"}, fall_limit_deg=80.0)
    assert result.status == "fell"
    ending = next(f for f in result.summary["diagnosis"] if f["code"] == "frame_touched")
    expected = math.degrees(touching_tilt(spec))
    assert ending["figures"]["pitch_deg"] == pytest.approx(expected, abs=3.0)
    assert ending["figures"]["limit_deg"] == pytest.approx(80.0)


def test_cli_prints_the_diagnosis_and_writes_it(tmp_path):
    out = tmp_path / "run"
    result = CliRunner().invoke(app, ["run", str(SHELF_RUNNER), CONSTANT, "--set",
                                      "config.left=2", "--set", "config.right=2",
                                      "--duration", "1", "--out", str(out), "--no-plots"])
    assert result.exit_code == 1, result.output
    assert "why (most likely first" in result.output and "1. [saturated]" in result.output
    summary = json.loads((out / "summary.json").read_text())
    assert summary["diagnosis"][0]["code"] == "saturated"


def test_suite_prints_the_first_finding_of_each_failed_test(tmp_path, monkeypatch):
    """`upright suite` prints, under its table, the first finding of every failed test."""
    import sandbox.suite

    def fake_suite(spec, settings, folder, **kwargs):
        figures = {"max_abs_pitch_deg": 40.0, "drift_m": 0.1}
        return {"passed": False, "tests": [
            {"name": "push", "passed": False, "status": "fell", "checks": [],
             "figures": figures, "diagnosis": [
                 {"code": "runaway", "text": "runaway travel", "figures": {}},
                 {"code": "top_speed", "text": "second finding", "figures": {}}]},
            {"name": "slope", "passed": True, "status": "completed", "checks": [],
             "figures": figures, "diagnosis": []}]}

    monkeypatch.setattr(sandbox.suite, "run_suite", fake_suite)
    result = CliRunner().invoke(app, ["suite", str(SHELF_RUNNER), CONSTANT, "--out",
                                      str(tmp_path / "suite")])
    assert result.exit_code == 1, result.output
    assert "push: [runaway] runaway travel" in result.output
    assert "second finding" not in result.output and "slope: [" not in result.output
