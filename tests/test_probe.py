"""`analyze --controller`: identification, the loop's poles and margins, findings.

No physics engine here: the probe drives controller scripts with synthetic readings
and closes the loop on the robot's linear model.
"""

from __future__ import annotations

import math
from pathlib import Path

import control
import numpy as np
import pytest
from ideal_parts import ideal_robot

from sandbox.analysis import PlanarParams, analyze, duty_input_model, emit_config
from sandbox.control import RobotFacts, load_controller_class
from sandbox.probe import (
    ControllerModel,
    SensorGeometry,
    Timing,
    analyze_controller,
    closed_loop_poles,
    identify,
    loop_response,
    loop_state_space,
    sampled_plant,
    stability_margins,
)
from sandbox.probe.report import geometry_of, sample_delay_steps, steps_per_tick

ROOT = Path(__file__).resolve().parents[1]
ROBOTS = sorted((ROOT / "robots").glob("*.yaml"))
DESK_MITE = ROOT / "robots" / "desk-mite.yaml"
CASCADE = str(ROOT / "controllers" / "cascade.py")
PID_TILT = str(ROOT / "controllers" / "pid_tilt.py")
STATE_FEEDBACK = str(ROOT / "tests" / "controllers" / "state_feedback.py")


def _ideal(robot: Path, overrides: dict | None = None):
    """The demo robot with ideal parts: the linear loop knows no play, friction or filter."""
    return ideal_robot(Path(robot).stem, overrides)


def _state_feedback_config(spec) -> tuple[dict, dict]:
    """The raw gains `--emit-config` writes for a script, plus the one-tick model it needs."""
    result = analyze(spec)
    config = emit_config(result, STATE_FEEDBACK)
    config["step_matrix"] = result["A_discrete"]
    config["step_input"] = [row[0] for row in result["B_discrete"]]
    return config, result


def _law_transfer(spec, config: dict, q: np.ndarray) -> np.ndarray:
    """The state-feedback script's exact transfer (inputs x len(q)), derived from its code.

    ŝ_k = M0 y_k + M1 y_{k-1} + m u_{k-1} with y = [tilt, gyro, n_left, n_right]
    (the deadbeat reconstruction of tests/controllers/state_feedback.py), u_k = −K ŝ_k,
    so U = −K (M0 + M1 q) / (1 + K m q) · Y in the delay operator q.
    """
    F = np.asarray(config["step_matrix"], dtype=float)
    g = np.asarray(config["step_input"], dtype=float)
    K = np.array([config[k] for k in ("k_position", "k_speed", "k_pitch", "k_pitch_rate")])
    r = spec.wheels.radius
    c = RobotFacts.from_spec(spec, 200.0, 1e-3).counts_per_wheel_rev / (2 * math.pi)
    x_row = np.array([r, 0.0, r / (2 * c), r / (2 * c)])
    pitch, rate = np.eye(4)[0], np.eye(4)[1]
    # v_{k-1} = (x_k − F00 x0 − F02 p0 − F03 w0 − g0 u0) / F01, then v_k from row 1
    v0_now = x_row / F[0, 1]
    v0_before = -(F[0, 0] * x_row + F[0, 2] * pitch + F[0, 3] * rate) / F[0, 1]
    v0_u = -g[0] / F[0, 1]
    v_now = F[1, 1] * v0_now
    v_before = F[1, 0] * x_row + F[1, 1] * v0_before + F[1, 2] * pitch + F[1, 3] * rate
    v_u = F[1, 1] * v0_u + g[1]
    M0 = np.vstack([x_row, v_now, pitch, rate])
    M1 = np.vstack([np.zeros(4), v_before, np.zeros(4), np.zeros(4)])
    m = np.array([0.0, v_u, 0.0, 0.0])
    return np.array([-(K @ (M0[:, j][:, None] + M1[:, j][:, None] * q)) / (1 + (K @ m) * q)
                     for j in range(4)])


def test_a_known_linear_law_is_identified_and_closes_the_loop_analyze_predicts() -> None:
    """The discrete LQR state feedback `analyze --emit-config` writes, run as a script that
    rebuilds the state exactly (ideal tilt sensor, no delays): the identified transfer from
    each input equals the law's own (derived from its code) within 1e-6, and the closed
    loop's poles are analyze's eig(Φ − ΓK) within 1e-6, the rest at the origin (the
    reconstruction is deadbeat). Source: the zero-order-hold closed loop x_{k+1} = (Φ − ΓK)x_k
    (Franklin, Powell & Workman, *Digital Control of Dynamic Systems*, ch. 8) [memory];
    reference values computed here with scipy (analysis.dlqr, analysis.zoh_discretise)."""
    spec = _ideal(DESK_MITE)
    config, result = _state_feedback_config(spec)
    probed = analyze_controller(spec, STATE_FEEDBACK, config, accel_feels_motion=False)
    assert probed["warnings"] == [], probed["warnings"]
    model = ControllerModel(
        den=np.asarray(probed["controller_model"]["denominator"]),
        num=np.array([probed["controller_gains"][n]["numerator"]
                      for n in ("tilt", "gyro", "ticks_left", "ticks_right")]))
    q = np.exp(-1j * np.array([0.0, 0.01, 0.3, 1.0, 2.0, 3.1]))
    found, law = model.response(q), _law_transfer(spec, config, q)
    for j, name in enumerate(("tilt", "gyro", "ticks_left", "ticks_right")):
        scale = np.max(np.abs(law[j]))
        assert np.max(np.abs(found[j] - law[j])) <= 1e-6 * scale, f"{name} transfer"
        static = probed["controller_gains"][name]["static_gain"]
        assert static == pytest.approx(law[j][0].real, rel=1e-6, abs=1e-12), f"{name} gain"
    expected = [complex(a, b) for a, b in result["closed_loop_poles_discrete"]]
    poles = [complex(a, b) for a, b in probed["closed_loop_poles"]]
    for z in expected:
        nearest = min(poles, key=lambda p: abs(p - z))
        assert abs(nearest - z) <= 1e-6, f"closed-loop pole {z} (nearest {nearest})"
        poles.remove(nearest)
    assert all(abs(p) < 1e-3 for p in poles), f"the reconstruction's poles {poles}"
    assert probed["stable"]


def _loop_of(robot: Path, script: str, config: dict):
    """The sampled plant and identified model of a script on a robot, as analyze builds them."""
    spec = _ideal(robot)
    cls = load_controller_class(script)
    facts = RobotFacts.from_spec(spec, 200.0, 1e-3)
    model = identify(cls, config, facts).model
    A, B = duty_input_model(PlanarParams.from_spec(spec))
    spt = steps_per_tick(1e-3, 200.0)
    plant = sampled_plant(A, B, geometry_of(spec, facts),
                          Timing(1e-3, spt, 0, sample_delay_steps(spec, 1e-3, spt)))
    return plant, model


SLOW = pytest.mark.slow


@pytest.mark.parametrize(("robot", "script"), [
    (DESK_MITE, CASCADE), (DESK_MITE, STATE_FEEDBACK),
    pytest.param(ROOT / "robots" / "shelf-runner.yaml", CASCADE, marks=SLOW),
    pytest.param(ROOT / "robots" / "tall-mast.yaml", CASCADE, marks=SLOW),
], ids=["desk-mite-cascade", "desk-mite-state-feedback", "shelf-runner-cascade",
        "tall-mast-cascade"])
@pytest.mark.filterwarnings("ignore:singular matrix in frequency response")
def test_margins_agree_with_python_control(robot: Path, script: str) -> None:
    """Every gain margin, phase margin, their crossover frequencies and the delay margin of
    the loop broken at the duty (the script with the emitted LQR gains) against
    python-control's `control.stability_margins(..., returnall=True)` on the same
    discrete-time state space (loop_state_space, dt = the controller period), within 1e-6.

    python-control is given its own frequency response of that system (`control.frd` on
    our grid, 1e-5/T to Nyquist): its polynomial method ('poly', 'best') finds spurious
    crossings on these 6- to 16-state loops (a crossover at |L| = 1.70, checked against
    its own `sys(z)`), so the tf route is no reference here. It gives no delay margin: the
    phase margin (rad) over its gain crossover (rad/s), the least over all crossovers."""
    spec = _ideal(robot)
    config = (_state_feedback_config(spec)[0] if script == STATE_FEEDBACK
              else emit_config(analyze(spec), script))
    plant, model = _loop_of(robot, script, config)
    ours = stability_margins(loop_response(plant, model), plant.period, stable=True)
    A, B, C = loop_state_space(plant, model)
    system = control.ss(A, B[:, None], C[None, :], 0.0, plant.period)
    grid = np.geomspace(1e-5 / plant.period, math.pi / plant.period * (1 - 1e-9), 20000)
    gms, pms, _, wpcs, wgcs, _ = control.stability_margins(control.frd(system, grid),
                                                           returnall=True)
    hz = 2 * math.pi
    assert len(gms) == len(ours.gain_margins_all) and len(pms) == len(ours.phase_margins_all)
    assert len(gms) + len(pms) > 0, "the loop has margins to compare"
    np.testing.assert_allclose(ours.gain_margins_all, gms, rtol=1e-6, err_msg="gain margins")
    np.testing.assert_allclose(np.array(ours.phase_crossovers_hz) * hz, wpcs, rtol=1e-6,
                               err_msg="phase crossovers")
    np.testing.assert_allclose(ours.phase_margins_all, pms, atol=1e-6,
                               err_msg="phase margins (deg)")
    np.testing.assert_allclose(np.array(ours.gain_crossovers_hz) * hz, wgcs, rtol=1e-6,
                               err_msg="gain crossovers")
    if len(pms):
        delay = min(math.radians(p % 360.0) / w for p, w in zip(pms, wgcs))
        assert ours.delay_margin_s == pytest.approx(delay, rel=1e-6), "delay margin"


# §1 model of ../shared/SOURCES.md (torque input, N·m): x'' = −7.546154 θ + 46.153846 τ,
# θ'' = 86.780769 θ − 280.769231 τ
SECTION1_A = np.array([[0, 1, 0, 0], [0, 0, -7.546154, 0], [0, 0, 0, 1], [0, 0, 86.780769, 0]])
SECTION1_B = np.array([[0.0], [46.153846], [0.0], [-280.769231]])


def test_pure_pd_on_the_section1_model_matches_the_hand_computation() -> None:
    """τ = kp·tilt + kd·pitch rate on the wheeled pendulum of SOURCES.md §1 [derived there],
    kp = 0.6 N·m/rad, kd = 0.03 N·m·s/rad, sampled at 10 kHz (ideal tilt, no delays).

    Hand computation (continuous, b = 280.769231, p² = 86.780769): the tilt sees
    θ/τ = −b/(s² − p²), so the loop broken at the torque is L = b(kp + kd s)/(s² − p²).
    - At ω = 0, L = −b kp/p² = −1.94123 (real, negative): gain margin p²/(b kp) = 0.51514
      (−5.7615 dB; lowering the gain that much lets it fall), the only phase crossover
      (Im L = −b kd ω/(ω² + p²) ≠ 0 for ω > 0).
    - |L| = 1: (ω² + p²)² = b²(kp² + kd² ω²); with u = ω²,
      u² + (2p² − b² kd²) u + p⁴ − b² kp² = 0, i.e. u² + 102.613 u − 20848.39 = 0
      → u = 101.928, ω_c = 10.0959 rad/s.
    - arg L = 180° + atan(kd ω/kp), phase margin atan(kd ω_c/kp) = 26.784°.
    - delay margin = 0.467477 rad / 10.0959 rad/s = 46.30 ms.
    - closed loop s² + b kd s + (b kp − p²) = 0: s = −4.2115 ± 7.9965j.
    The formulas are evaluated below; the sampled loop adds the hold's lag ω_c T/2
    (0.03°), hence tolerances of 0.1° and 0.2 %."""
    kp, kd, b, p2 = 0.6, 0.03, 280.769231, 86.780769
    plant = sampled_plant(SECTION1_A, SECTION1_B,
                          SensorGeometry(0.04, 1.0, 0.1, accel_feels_motion=False),
                          Timing(1e-4, 1))
    model = ControllerModel(den=np.array([1.0]), num=np.array([[kp], [kd], [0.0], [0.0]]))
    margins = stability_margins(loop_response(plant, model), plant.period, stable=True)
    u = (-(2 * p2 - (b * kd) ** 2) + math.sqrt((2 * p2 - (b * kd) ** 2) ** 2
                                               - 4 * (p2 ** 2 - (b * kp) ** 2))) / 2
    w_c = math.sqrt(u)
    pm = math.atan(kd * w_c / kp)
    assert w_c == pytest.approx(10.0959, rel=1e-4), "hand value of the crossover"
    assert margins.gain_margin == pytest.approx(p2 / (b * kp), rel=2e-3), "gain margin"
    assert margins.phase_crossover_hz == 0.0
    assert margins.crossover_hz * 2 * math.pi == pytest.approx(w_c, rel=2e-3), "crossover"
    assert margins.phase_margin_deg == pytest.approx(math.degrees(pm), abs=0.1), "phase margin"
    assert margins.delay_margin_s == pytest.approx(pm / w_c, rel=2e-3), "delay margin"
    s = np.log(closed_loop_poles(plant, model)) / plant.period
    tilt_poles = [z for z in s if abs(z) > 1e-3]  # x and v: the free double integrator
    expected = complex(-b * kd / 2, math.sqrt(b * kp - p2 - (b * kd / 2) ** 2))
    assert len(tilt_poles) == 2
    for z in tilt_poles:
        assert abs(complex(z.real, abs(z.imag)) - expected) <= 2e-3 * abs(expected)


NONLINEAR = '''
class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.power = config["power"]

    def step(self, r):
        tilt = -r.accel[0] / r.accel[2]
        duty = 8.0 * tilt + 4.0e{exp} * tilt ** self.power + 0.8 * r.gyro[1]
        return duty, duty
'''


@pytest.mark.parametrize(("power", "test"), [(2, "sign"), (3, "size")])
def test_a_nonlinear_script_gets_a_warning_naming_the_test(tmp_path: Path, power: int,
                                                           test: str) -> None:
    """A tilt law with a square term (1 mrad probe: 4e3·θ² = 0.5 of 8θ) is not odd, which
    the sign test shows; a cube term (4e5·θ³ at 1 mrad = 0.05 of 8θ, 0.8 at 4 mrad) is odd
    but not proportional, which the size test shows (superposition, derived)."""
    script = tmp_path / f"power{power}.py"
    script.write_text(NONLINEAR.replace("{exp}", "3" if power == 2 else "5"))
    probed = analyze_controller(_ideal(DESK_MITE), str(script), {"power": power})
    tilt_warnings = [w for w in probed["warnings"] if w.startswith("tilt: nonlinear")]
    assert any(f"({test} test)" in w for w in tilt_warnings), probed["warnings"]
    assert not any(w.startswith("gyro: nonlinear") for w in probed["warnings"])


def test_tilt_only_pid_shows_the_runaway_pole_and_what_it_lacks() -> None:
    """pid_tilt with the emitted gains but speed_kd = 0 (a PID on the tilt alone): with no
    wheel-speed feedback the wheeled pendulum's slow mode is not held (the cart-pendulum
    argument: a tilt-only law leaves the cart's modes uncontrolled, Franklin, Powell &
    Emami-Naeini, Example 2.7 class) [memory]: a closed-loop pole at or right of z = 1
    and the finding that names the missing feedback. With the emitted speed_kd it is
    stable and has margins."""
    spec = _ideal(DESK_MITE)
    config = emit_config(analyze(spec), PID_TILT)
    probed = analyze_controller(spec, PID_TILT, {**config, "speed_kd": 0.0})
    poles = [complex(a, b) for a, b in probed["closed_loop_poles"]]
    assert not probed["stable"]
    assert any(abs(z.imag) < 1e-9 and z.real >= 1.0 - 1e-9 for z in poles if z != 1.0) \
        or sum(abs(z - 1.0) < 1e-6 for z in poles) >= 2, poles
    assert max(abs(z) for z in poles) > 1.0
    texts = " ".join(f["text"] for f in probed["findings"])
    assert "lacks wheel-speed feedback" in texts, texts
    assert not any(f["code"] == "wrong_sign" for f in probed["findings"])
    fixed = analyze_controller(spec, PID_TILT, config)
    assert fixed["stable"] and fixed["delay_margin_s"] > 0 and fixed["phase_margin_deg"] > 30
    assert not any("lacks" in f["text"] for f in fixed["findings"])


def test_a_destabilising_sign_is_reported() -> None:
    """pid_tilt with the tilt gain's sign flipped: a lean forward drives the wheels backward,
    the pendulum's restoring condition (closed-loop stiffness b·kp − p² > 0, SOURCES.md §1
    [derived]) fails: unstable, and the finding names the tilt feedback and its sign."""
    spec = _ideal(DESK_MITE)
    config = emit_config(analyze(spec), PID_TILT)
    probed = analyze_controller(spec, PID_TILT, {**config, "kp": -config["kp"]})
    assert not probed["stable"]
    signs = [f for f in probed["findings"] if f["code"] == "wrong_sign"]
    assert [f["figures"]["state"] for f in signs] == ["pitch_rad"], probed["findings"]
    assert "destabilising sign" in signs[0]["text"]
