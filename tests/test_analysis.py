"""Linear model, poles and LQR of sandbox.analysis against SOURCES.md §1 and §8."""

from __future__ import annotations

import json
import math
from dataclasses import replace
from pathlib import Path

import control
import numpy as np
import pytest
import scipy.linalg
import scipy.signal
import yaml

from sandbox.analysis import (
    RAW_GAIN_KEYS,
    STATE_NAMES,
    AnalysisError,
    PlanarParams,
    analysis_table,
    analyze,
    cart_pendulum_model,
    config_yaml,
    controllability_rank,
    controller_stem,
    default_weights,
    delayed_spectral_radius,
    dlqr,
    duty_input_model,
    emit_config,
    equivalent_poles,
    fall_time_constant,
    lqr,
    open_loop_poles,
    rate_warning,
    suggest_gains,
    torque_input_model,
    zoh_discretise,
)
from sandbox.control import RobotFacts, load_controller_class, make_controller
from sandbox.robot import load_robot

REPO = Path(__file__).resolve().parents[1]
ROBOT_FILES = sorted((REPO / "robots").glob("*.yaml"))

# SOURCES §1 worked example: m_b = 1, I_b = 0.01, l = 0.10, m_w = 0.05, r = 0.04,
# I_w = ½ m_w r² = 4e-5, g = 9.81; input = total wheel torque.
WORKED = PlanarParams(
    body_mass=1.0, body_pitch_inertia=0.01, com_height=0.10, wheel_mass=0.05,
    wheel_inertia=4e-5, wheel_radius=0.04, gravity=9.81,
)
# Messner & Tilbury's angle phi is minus our pitch: their state = T · ours.
FLIP_PITCH = np.diag([1.0, 1.0, -1.0, -1.0])


@pytest.fixture(scope="module")
def shelf_runner():
    return load_robot(ROBOT_FILES[0].parent / "shelf-runner.yaml")


@pytest.fixture(scope="module", params=ROBOT_FILES, ids=lambda p: p.stem)
def every_robot(request):
    return load_robot(request.param)


def unstable_pole(A: np.ndarray) -> float:
    return float(max(z.real for z in open_loop_poles(A)))


# ------------------------------------------------------------------ §1 torque model


def test_worked_example_matrices_and_pole():
    """SOURCES §1 [derived from the Lagrangian of Franklin, Powell & Emami-Naeini Ex. 2.7]:
    A(ẍ,θ) = −7.546154, A(θ̈,θ) = 86.780769, B = [0, 46.153846, 0, −280.769231],
    p = 9.31562 s⁻¹, all rel 1e-6."""
    A, B = torque_input_model(WORKED)
    assert A[1, 2] == pytest.approx(-7.546154, rel=1e-6), "A(x_dd, pitch)"
    assert A[3, 2] == pytest.approx(86.780769, rel=1e-6), "A(pitch_dd, pitch)"
    np.testing.assert_allclose(B.ravel(), [0, 46.153846, 0, -280.769231], rtol=1e-6,
                               err_msg="B (per N·m of wheel torque)")
    np.testing.assert_array_equal(A[:, [1, 3]][[1, 3]], 0.0, err_msg="no damping without motors")
    assert unstable_pole(A) == pytest.approx(9.31562, rel=1e-6), "unstable pole (1/s)"
    assert fall_time_constant(A) == pytest.approx(1 / 9.31562, rel=1e-6), "fall time (s)"
    # p² = m_b g l M11 / (M11 M22 − m_b² l²) (SOURCES §1 closed form)
    m11, m22, ml = 1.15, 0.02, 0.1
    closed_form = math.sqrt(ml * 9.81 * m11 / (m11 * m22 - ml**2))
    assert unstable_pole(A) == pytest.approx(closed_form, rel=1e-12), "pole vs closed form"


def test_heavy_wheels_tend_to_fixed_pivot():
    """SOURCES §1: fixed-pivot limit √(m g l / I_pivot) = 7.003571 s⁻¹ [published,
    compound pendulum]; 7.4871 at m_w = 1 kg [derived]; pole falls as wheels get heavier."""
    def pole(wheel_mass: float) -> float:
        heavier = replace(WORKED, wheel_mass=wheel_mass, wheel_inertia=0.5 * wheel_mass * 0.04**2)
        return unstable_pole(torque_input_model(heavier)[0])

    assert pole(1.0) == pytest.approx(7.4871, abs=5e-5), "pole at m_w = 1 kg (1/s)"
    assert pole(1e6) == pytest.approx(7.003571, rel=1e-6), "pole as m_w -> infinity (1/s)"
    trend = [pole(m) for m in (0.05, 0.2, 1.0, 10.0, 100.0)]
    assert np.all(np.diff(trend) < 0), f"pole not falling with m_w: {trend}"


# ------------------------------------------------------------------ rotor inertia


@pytest.mark.parametrize("rotor", [1e-5, 2.304e-4, 1e-3, 0.05])
def test_reflected_inertia_matches_closed_form(rotor):
    """SOURCES §1 [derived]: J per motor adds J/r² to M11, −J/r to M12 and J to M22
    (two motors); then p² = m g l M11' / (M11' M22' − M12'²)."""
    A, _ = torque_input_model(replace(WORKED, reflected_inertia=rotor))
    r, mgl = 0.04, 1.0 * 9.81 * 0.10
    m11 = 1.15 + 2 * rotor / r**2
    m12 = 0.10 - 2 * rotor / r
    m22 = 0.02 + 2 * rotor
    expected = math.sqrt(mgl * m11 / (m11 * m22 - m12**2))
    assert unstable_pole(A) == pytest.approx(expected, rel=1e-10), f"pole with J = {rotor}"
    assert unstable_pole(A) < 9.31562, "rotor inertia must slow the fall"


def test_huge_rotor_inertia_locks_wheel_to_body():
    """Limit J -> inf: wheel and body turn as one and roll on the floor; the pole is
    √(m g l / I_contact), I_contact = I_b + m_b (l + r)² + 2 m_w r² + 2 I_w (parallel-axis
    theorem about the contact line, any dynamics text, e.g. Meriam & Kraige) [derived]."""
    A, _ = torque_input_model(replace(WORKED, reflected_inertia=1e4))
    r = 0.04
    contact_inertia = 0.01 + 1.0 * (0.10 + r) ** 2 + 2 * 0.05 * r**2 + 2 * 4e-5
    expected = math.sqrt(1.0 * 9.81 * 0.10 / contact_inertia)
    assert unstable_pole(A) == pytest.approx(expected, rel=1e-6), "rolling rigid-body pole"


# ------------------------------------------------------------------ duty model

MOTORISED = replace(
    WORKED, reflected_inertia=2e-4, torque_constant=0.09, back_emf_constant=0.23,
    resistance=3.75, drive_voltage=5.4,
)


def test_duty_input_scales_with_drive_voltage():
    """DC motor T = K_t (V − K_e ω)/R (SOURCES §5 [published]): B per duty is the
    torque-input B times 2 K_t V_drive / R, and doubles when V_drive doubles; A does not."""
    A_t, B_t = torque_input_model(MOTORISED)
    A_d, B_d = duty_input_model(MOTORISED)
    np.testing.assert_allclose(B_d, B_t * 2 * 0.09 * 5.4 / 3.75, rtol=1e-12, err_msg="B per duty")
    A_2, B_2 = duty_input_model(replace(MOTORISED, drive_voltage=10.8))
    np.testing.assert_allclose(B_2, 2 * B_d, rtol=1e-12, err_msg="B at double voltage")
    np.testing.assert_allclose(A_2, A_d, rtol=1e-12, err_msg="A must not depend on V_drive")
    A_0, _ = duty_input_model(replace(MOTORISED, back_emf_constant=0.0))
    np.testing.assert_allclose(A_0, A_t, rtol=1e-12, atol=1e-12, err_msg="A without back-EMF")


def test_back_emf_damps_speed_and_pitch_rate():
    """Back-EMF current opposes the wheel's relative rate (SOURCES §5 [published]):
    the diagonal rate terms A(v̇, v) and A(θ̈, θ̇) become negative (damping)."""
    A, _ = duty_input_model(MOTORISED)
    assert A[1, 1] < 0, f"A(v_dot, v) = {A[1, 1]} should be negative"
    assert A[3, 3] < 0, f"A(pitch_dd, pitch_rate) = {A[3, 3]} should be negative"


def test_steady_duty_gives_no_load_speed():
    """SOURCES §5 [published]: a free wheel settles at ω_nl = V / K_e; upright with no
    load, a constant duty u must settle at v = u·V_drive·r / K_e with zero pitch."""
    A, B = duty_input_model(MOTORISED)
    duty = 0.3
    # equilibrium of [v, pitch, pitch_rate] (x is free to grow)
    steady = np.linalg.solve(A[1:, 1:], -B[1:, 0] * duty)
    expected_speed = duty * 5.4 * 0.04 / 0.23
    assert steady[0] == pytest.approx(expected_speed, rel=1e-10), "steady speed (m/s)"
    np.testing.assert_allclose(steady[1:], 0.0, atol=1e-12, err_msg="steady pitch, pitch rate")


# ------------------------------------------------------------------ cart–pendulum reference


def test_cart_pendulum_matches_messner_tilbury():
    """Messner & Tilbury, Control Tutorials, inverted pendulum [published]: A rows 2 and 4,
    B to 4 decimals; poles 0, −0.1428, 5.5651, −5.6041 [derived]; LQR with
    Q = diag(5000, 0, 100, 0), R = 1 gives K = [−70.7107, −37.8345, 105.5298, 20.9238]
    [derived with python-control]. Their angle is minus our pitch (T = diag(1,1,−1,−1))."""
    A, B = cart_pendulum_model(0.5, 0.2, 0.1, 0.006, 0.3, 9.8)
    A_theirs, B_theirs = FLIP_PITCH @ A @ FLIP_PITCH, FLIP_PITCH @ B
    np.testing.assert_allclose(A_theirs[1], [0, -0.1818, 2.6727, 0], atol=5e-5, err_msg="A row 2")
    np.testing.assert_allclose(A_theirs[3], [0, -0.4545, 31.1818, 0], atol=5e-5, err_msg="A row 4")
    np.testing.assert_allclose(B_theirs.ravel(), [0, 1.8182, 0, 4.5455], atol=5e-5, err_msg="B")
    poles = np.sort(open_loop_poles(A).real)
    np.testing.assert_allclose(poles, [-5.6041, -0.1428, 0.0, 5.5651], atol=5e-5,
                               err_msg="open-loop poles (1/s)")
    weights = np.diag([5000.0, 0, 100, 0]), np.array([[1.0]])
    published = [-70.7107, -37.8345, 105.5298, 20.9238]
    K_theirs, _, _ = lqr(A_theirs, B_theirs, *weights)
    np.testing.assert_allclose(K_theirs.ravel(), published, atol=5e-5, err_msg="K, their angle")
    K_ours, _, _ = lqr(A, B, *weights)
    np.testing.assert_allclose((K_ours @ FLIP_PITCH).ravel(), published, atol=5e-5,
                               err_msg="K in our convention, mapped to theirs")


# ------------------------------------------------------------------ LQR


def test_lqr_double_integrator():
    """SOURCES §8: double integrator, Q = I, R = 1 -> K = [1, √3], P = [[√3, 1], [1, √3]]
    (closed form of the CARE [derived])."""
    K, P, closed = lqr(np.array([[0.0, 1], [0, 0]]), np.array([[0.0], [1]]), np.eye(2), [[1.0]])
    np.testing.assert_allclose(K.ravel(), [1, math.sqrt(3)], rtol=1e-9, err_msg="K")
    np.testing.assert_allclose(P, [[math.sqrt(3), 1], [1, math.sqrt(3)]], rtol=1e-9, err_msg="P")
    assert max(z.real for z in closed) < 0, "closed loop must be stable"


def test_lqr_section8_oracle():
    """SOURCES §8 [derived]: the §1 model with Q = diag(1, 0, 10, 0), R = 100
    -> K = [−0.1, −0.132904, −0.902502, −0.101293]."""
    A, B = torque_input_model(WORKED)
    K, _, _ = lqr(A, B, np.diag([1.0, 0, 10, 0]), [[100.0]])
    np.testing.assert_allclose(K.ravel(), [-0.1, -0.132904, -0.902502, -0.101293], atol=5e-7,
                               err_msg="K (N·m per state unit)")


@pytest.mark.parametrize("model", ["worked-torque", "motorised-duty", "shelf-runner-duty"])
def test_lqr_agrees_with_python_control(model, shelf_runner):
    """Reference libraries (SOURCES §8): control.lqr -> (K, S, E) and
    scipy.linalg.solve_continuous_are; ours agrees to rel 1e-6, and P solves the CARE."""
    if model == "worked-torque":
        A, B = torque_input_model(WORKED)
    elif model == "motorised-duty":
        A, B = duty_input_model(MOTORISED)
    else:
        A, B = duty_input_model(PlanarParams.from_spec(shelf_runner))
    Q, R = default_weights()
    K, P, closed = lqr(A, B, Q, R)
    K_ref, S_ref, E_ref = control.lqr(A, B, Q, R)
    np.testing.assert_allclose(K, K_ref, rtol=1e-6, err_msg="K vs control.lqr")
    np.testing.assert_allclose(P, S_ref, rtol=1e-6, atol=1e-9, err_msg="P vs control.lqr S")
    np.testing.assert_allclose(np.sort_complex(closed), np.sort_complex(E_ref), rtol=1e-6,
                               err_msg="closed-loop poles vs control.lqr E")
    P_scipy = scipy.linalg.solve_continuous_are(A, B, Q, R)
    np.testing.assert_allclose(P, P_scipy, rtol=1e-6, atol=1e-9, err_msg="P vs scipy")
    residual = A.T @ P + P @ A - P @ B @ np.linalg.solve(R, B.T @ P) + Q
    assert np.abs(residual).max() < 1e-8 * np.abs(Q).max(), "CARE residual"


def test_lqr_rejects_bad_weights_and_uncontrollable_model():
    """CARE needs Q ⪰ 0, R ≻ 0 and a stabilisable pair (Kalman's conditions, any LQR text)."""
    A, B = torque_input_model(WORKED)
    with pytest.raises(AnalysisError, match="R must be"):
        lqr(A, B, np.eye(4), [[0.0]])
    with pytest.raises(AnalysisError, match="Q must be"):
        lqr(A, B, -np.eye(4), [[1.0]])
    with pytest.raises(AnalysisError, match="Q 4x4"):
        lqr(A, B, np.eye(3), [[1.0]])
    with pytest.raises(AnalysisError):
        lqr(A, np.zeros((4, 1)), np.eye(4), [[1.0]])


# ------------------------------------------------------------------ controllability


def test_controllability_of_every_robot(every_robot):
    """Kalman rank test; the rank agrees with numpy's rank of control.ctrb (python-control)."""
    A, B = duty_input_model(PlanarParams.from_spec(every_robot))
    assert controllability_rank(A, B) == 4, f"{every_robot.name} is not controllable"
    assert np.linalg.matrix_rank(control.ctrb(A, B)) == 4, "python-control's ctrb rank"


def test_no_drive_voltage_is_uncontrollable():
    """Kalman rank test: with B = 0 nothing is reachable (rank 0); the torque model of
    §1 is controllable (rank 4, agreeing with control.ctrb)."""
    A, B = duty_input_model(replace(MOTORISED, drive_voltage=0.0))
    assert controllability_rank(A, B) == 0, "rank with no drive voltage"
    A, B = torque_input_model(WORKED)
    assert controllability_rank(A, B) == np.linalg.matrix_rank(control.ctrb(A, B)) == 4


# ------------------------------------------------------------------ suggested gains


def test_cascade_and_pid_expand_to_lqr_law(shelf_runner):
    """The suggested gains reproduce u = −K s of the discrete design (algebraic identity,
    checked on seeded random states): cascade fully, pid_tilt on its speed, pitch and
    pitch-rate terms (it has no position term)."""
    result = analyze(shelf_runner)
    K = np.array(result["lqr_gain_discrete"]).ravel()
    cascade = result["suggested_config"]["cascade"]
    pid = result["suggested_config"]["pid_tilt"]
    states = np.random.default_rng(seed=7).normal(size=(50, 4)) * [0.3, 0.5, 0.1, 1.0]
    for x, v, pitch, pitch_rate in states:
        target = -(cascade["speed_kp"] * v + cascade["position_kp"] * x)
        duty = cascade["tilt_kp"] * (pitch - target) + cascade["tilt_kd"] * pitch_rate
        lqr_duty = -K @ [x, v, pitch, pitch_rate]
        assert duty == pytest.approx(lqr_duty, rel=1e-12, abs=1e-12), "cascade vs -K s (duty)"
        pid_duty = pid["kp"] * pitch + pid["kd"] * pitch_rate + pid["speed_kd"] * v
        assert pid_duty == pytest.approx(-K[1:] @ [v, pitch, pitch_rate], rel=1e-12, abs=1e-12)
    assert pid["kp"] > 0 and pid["kd"] > 0, "forward lean must drive forward (positive duty)"
    assert pid["speed_kd"] > 0, "rolling forward must ask for more forward duty (lean back)"
    assert pid["ki"] == 0.0
    assert 0.2 <= pid["filter_time_constant"] <= 2.0


def test_pid_tilt_law_leaves_only_drift(every_robot):
    """Dropping the position gain (pid_tilt has none) leaves the discrete closed loop
    stable but for one eigenvalue at z = 1: position drifts, nothing else grows [derived:
    x does not enter the dynamics, so its column of Ad − Bd K is e₁]."""
    result = analyze(every_robot)
    Ad, Bd = np.array(result["A_discrete"]), np.array(result["B_discrete"])
    pid = result["suggested_config"]["pid_tilt"]
    K = np.array([[0.0, -pid["speed_kd"], -pid["kp"], -pid["kd"]]])
    radii = np.sort(np.abs(np.linalg.eigvals(Ad - Bd @ K)))
    assert radii[-1] == pytest.approx(1.0, abs=1e-9), "position eigenvalue |z| (drift)"
    assert radii[-2] < 1.0, f"{every_robot.name}: pid_tilt loop unstable, |z| = {radii}"


def test_suggest_gains_needs_a_pitch_gain():
    """Without a pitch gain the cascade's ratios are undefined: a plain error, not inf."""
    with pytest.raises(AnalysisError, match="pitch gain"):
        suggest_gains(np.array([[-1.0, -1.0, 0.0, -1.0]]))


# ------------------------------------------------------------------ weights, rate, analyze


def test_bryson_weights():
    """Bryson's rule (Bryson & Ho, Applied Optimal Control, 1969 [memory]): Q_ii = 1/max²."""
    Q, R = default_weights(x_max=0.5, v_max=0.25, pitch_max=0.1, pitch_rate_max=2.0, duty_max=0.5)
    np.testing.assert_allclose(np.diag(Q), [4.0, 16.0, 100.0, 0.25], rtol=1e-12, err_msg="Q")
    np.testing.assert_allclose(R, [[4.0]], rtol=1e-12, err_msg="R")
    np.testing.assert_array_equal(Q - np.diag(np.diag(Q)), 0.0)


def test_rate_warning_threshold():
    """[common practice] sample at ≥ 10× the fastest closed-loop natural frequency |p|/2π:
    a pole at 10 Hz needs 100 Hz."""
    poles = np.array([-2 * math.pi * 10.0, -1.0 + 2.0j, -1.0 - 2.0j])
    message = rate_warning(poles, 99.0)
    assert message is not None and "10x" in message and "100 Hz" in message, message
    assert rate_warning(poles, 101.0) is None, "101 Hz is enough for a 10 Hz pole"
    with pytest.raises(AnalysisError):
        rate_warning(poles, 0.0)


def test_analyze_report_for_every_robot(every_robot):
    """`upright analyze --json` contract (DESIGN.md): keys present, strict JSON, shapes;
    the gain equals control.lqr's for the reported A, B, Q, R (python-control)."""
    result = analyze(every_robot)
    text = json.dumps(result, allow_nan=False)
    result = json.loads(text)
    for key in ("state", "A", "B", "open_loop_poles", "lqr_q", "lqr_r", "lqr_gain",
                "closed_loop_poles", "fall_time_constant_s", "controllable",
                "suggested_config", "rate_warning", "params"):
        assert key in result, f"missing key {key}"
    assert result["state"] == list(STATE_NAMES) == ["x_m", "v_m_s", "pitch_rad",
                                                     "pitch_rate_rad_s"]
    A, B = np.array(result["A"]), np.array(result["B"])
    assert A.shape == (4, 4) and B.shape == (4, 1) and np.array(result["lqr_gain"]).shape == (1, 4)
    assert all(len(pair) == 2 for pair in result["open_loop_poles"] + result["closed_loop_poles"])
    assert result["controllable"] is True
    assert all(re < 0 for re, _ in result["closed_loop_poles"]), "closed loop unstable"
    assert result["fall_time_constant_s"] > 0
    K_ref, _, _ = control.lqr(A, B, np.array(result["lqr_q"]), np.array(result["lqr_r"]))
    np.testing.assert_allclose(result["lqr_gain"], K_ref, rtol=1e-6, err_msg="K vs control.lqr")
    assert set(result["suggested_config"]) == {"pid_tilt", "cascade"}


def test_analyze_options(shelf_runner):
    """User weights replace Bryson's; a slow controller rate is flagged ([common practice]
    10× rule); a wrong number of weights is a plain error."""
    result = analyze(shelf_runner, q_diag=[1.0, 0.0, 10.0, 0.0], r=100.0, rate_hz=5.0)
    np.testing.assert_allclose(result["lqr_q"], np.diag([1.0, 0, 10, 0]), err_msg="Q used")
    assert result["lqr_r"] == [[100.0]]
    assert result["rate_warning"] is not None and "5 Hz" in result["rate_warning"]
    assert analyze(shelf_runner, rate_hz=10_000.0)["rate_warning"] is None
    with pytest.raises(AnalysisError, match="4 weights"):
        analyze(shelf_runner, q_diag=[1.0, 2.0])


def test_params_from_spec_and_validation(shelf_runner):
    """PlanarParams.from_spec copies the robot's derived figures (sandbox.robot); bad
    figures raise AnalysisError naming the field."""
    params = PlanarParams.from_spec(shelf_runner)
    figures = shelf_runner.figures
    assert params.body_pitch_inertia == figures.body.inertia[1, 1]
    assert params.reflected_inertia == pytest.approx(1.0e-7 * 48**2, rel=1e-12)
    assert params.drive_voltage == pytest.approx(6 * 1.2 - 1.8, rel=1e-12), "drive voltage (V)"
    with pytest.raises(AnalysisError, match="body_mass"):
        replace(WORKED, body_mass=0.0)
    with pytest.raises(AnalysisError, match="wheel_inertia"):
        replace(WORKED, wheel_inertia=-1.0)


# ------------------------------------------------------------------ discrete design


def test_analyze_discrete_design_keys(every_robot):
    """DESIGN.md contract kept: ``lqr_gain`` is the continuous design (equal to
    control.lqr); ``lqr_gain_discrete`` equals control.dlqr on the ZOH model at the rate
    (python-control, rel 1e-6) and ``suggested_config`` comes from it."""
    result = json.loads(json.dumps(analyze(every_robot, rate_hz=200.0), allow_nan=False))
    A, B = np.array(result["A"]), np.array(result["B"])
    Q, R = np.array(result["lqr_q"]), np.array(result["lqr_r"])
    K_cont, _, _ = control.lqr(A, B, Q, R)
    np.testing.assert_allclose(result["lqr_gain"], K_cont, rtol=1e-6, err_msg="continuous K")
    Ad, Bd = np.array(result["A_discrete"]), np.array(result["B_discrete"])
    K_ref, _, E_ref = control.dlqr(Ad, Bd, Q, R)
    np.testing.assert_allclose(result["lqr_gain_discrete"], K_ref, rtol=1e-6,
                               err_msg="discrete K vs control.dlqr")
    z = np.array([complex(re, im) for re, im in result["closed_loop_poles_discrete"]])
    np.testing.assert_allclose(np.sort_complex(z), np.sort_complex(E_ref), rtol=1e-6, atol=1e-9,
                               err_msg="discrete closed-loop eigenvalues")
    assert result["sample_period_s"] == pytest.approx(0.005, rel=1e-12)
    assert result["suggested_config"] == suggest_gains(np.array(result["lqr_gain_discrete"]),
                                                       result["fall_time_constant_s"])
    assert result["suggested_config_source"] == "lqr_gain_discrete"


@pytest.mark.parametrize("rate_hz", [50.0, 200.0, 1000.0])
def test_zoh_matches_scipy(every_robot, rate_hz):
    """Zero-order hold against scipy.signal.cont2discrete(method='zoh') (reference
    library), rel 1e-10, for the duty model of every robot."""
    A, B = duty_input_model(PlanarParams.from_spec(every_robot))
    Ad, Bd = zoh_discretise(A, B, 1.0 / rate_hz)
    Ad_ref, Bd_ref, *_ = scipy.signal.cont2discrete((A, B, np.eye(4), np.zeros((4, 1))),
                                                    1.0 / rate_hz, method="zoh")
    np.testing.assert_allclose(Ad, Ad_ref, rtol=1e-10, atol=1e-14, err_msg="Ad")
    np.testing.assert_allclose(Bd, Bd_ref, rtol=1e-10, atol=1e-14, err_msg="Bd")


def test_zoh_double_integrator_closed_form():
    """Double integrator held over T: Ad = [[1, T], [0, 1]], Bd = [T²/2, T] (exact
    integration of a constant input, any digital-control text, e.g. Franklin, Powell &
    Workman, Digital Control of Dynamic Systems [memory])."""
    period = 0.005
    Ad, Bd = zoh_discretise(np.array([[0.0, 1], [0, 0]]), np.array([[0.0], [1]]), period)
    np.testing.assert_allclose(Ad, [[1, period], [0, 1]], rtol=1e-14, atol=1e-16, err_msg="Ad")
    np.testing.assert_allclose(Bd.ravel(), [period**2 / 2, period], rtol=1e-12, err_msg="Bd")
    with pytest.raises(AnalysisError, match="sample period"):
        zoh_discretise(np.eye(2), np.ones((2, 1)), 0.0)


def test_dlqr_scalar_golden_ratio():
    """Scalar DARE with a = b = q = r = 1: p = p − p²/(1 + p) + 1 → p² − p − 1 = 0,
    p = (1 + √5)/2, k = p/(1 + p) = 0.618034 [derived]."""
    K, P, closed = dlqr([[1.0]], [[1.0]], [[1.0]], [[1.0]])
    golden = (1 + math.sqrt(5)) / 2
    assert P[0, 0] == pytest.approx(golden, rel=1e-12), "P"
    assert K[0, 0] == pytest.approx(golden / (1 + golden), rel=1e-12), "K"
    assert abs(closed[0]) == pytest.approx(1 - golden / (1 + golden), rel=1e-12), "closed loop z"


@pytest.mark.parametrize("model", ["worked-torque", "desk-mite", "shelf-runner", "tall-mast"])
def test_dlqr_agrees_with_python_control(model):
    """control.dlqr (python-control, reference library) -> (K, S, E); ours agrees to
    rel 1e-6 on the ZOH models at 200 Hz, and P satisfies the DARE."""
    if model == "worked-torque":
        A, B = torque_input_model(WORKED)
    else:
        A, B = duty_input_model(PlanarParams.from_spec(load_robot(REPO / f"robots/{model}.yaml")))
    Q, R = default_weights()
    Ad, Bd = zoh_discretise(A, B, 1 / 200.0)
    K, P, closed = dlqr(Ad, Bd, Q, R)
    K_ref, S_ref, E_ref = control.dlqr(Ad, Bd, Q, R)
    np.testing.assert_allclose(K, K_ref, rtol=1e-6, err_msg="K vs control.dlqr")
    np.testing.assert_allclose(P, S_ref, rtol=1e-6, atol=1e-9, err_msg="P vs control.dlqr S")
    np.testing.assert_allclose(np.sort_complex(closed), np.sort_complex(E_ref), rtol=1e-6,
                               atol=1e-9, err_msg="closed-loop eigenvalues vs control.dlqr E")
    gain_part = Ad.T @ P @ Bd @ np.linalg.solve(R + Bd.T @ P @ Bd, Bd.T @ P @ Ad)
    residual = Ad.T @ P @ Ad - gain_part + Q - P
    assert np.abs(residual).max() < 1e-8 * np.abs(P).max(), "DARE residual"


def test_discrete_gain_tends_to_continuous(every_robot):
    """As T → 0 the sampled LQR tends to the continuous one, error O(T) [derived: the
    per-tick cost is the continuous cost over T to first order, and the weights' common
    factor T does not change K]: within 0.5 % at 100 kHz, ~10× closer per decade."""
    A, B = duty_input_model(PlanarParams.from_spec(every_robot))
    Q, R = default_weights()
    K_cont, _, _ = lqr(A, B, Q, R)
    errors = []
    for rate in (1e3, 1e4, 1e5):
        K, _, _ = dlqr(*zoh_discretise(A, B, 1 / rate), Q, R)
        errors.append(np.abs(K / K_cont - 1).max())
    assert errors[-1] < 5e-3, f"relative gain difference at 100 kHz: {errors[-1]:.2e}"
    assert 5 < errors[0] / errors[1] < 20 and 5 < errors[1] / errors[2] < 20, f"{errors}"


def test_dlqr_rejects_bad_weights_and_no_input():
    """DARE needs Q ⪰ 0, R ≻ 0 and a stabilisable pair (any LQR text)."""
    Ad, Bd = zoh_discretise(*torque_input_model(WORKED), 0.005)
    with pytest.raises(AnalysisError, match="R must be"):
        dlqr(Ad, Bd, np.eye(4), [[0.0]])
    with pytest.raises(AnalysisError, match="Q 4x4"):
        dlqr(Ad, Bd, np.eye(3), [[1.0]])
    with pytest.raises(AnalysisError):
        dlqr(Ad, np.zeros((4, 1)), np.eye(4), [[1.0]])


def test_delayed_spectral_radius_scalar():
    """x⁺ = a x + b u with u_k = −k x_(k−1): z² − a z + b k = 0 [derived]; no delay: |a − b k|."""
    a, b, k = 1.2, 0.5, 1.0
    expected = max(abs(np.roots([1.0, -a, b * k])))
    assert delayed_spectral_radius([[a]], [[b]], [[k]], ticks=1) == pytest.approx(expected,
                                                                                   rel=1e-12)
    assert delayed_spectral_radius([[a]], [[b]], [[k]], ticks=0) == pytest.approx(abs(a - b * k))
    two = max(abs(np.roots([1.0, -a, 0.0, b * k])))  # z³ − a z² + b k = 0
    assert delayed_spectral_radius([[a]], [[b]], [[k]], ticks=2) == pytest.approx(two, rel=1e-12)


def test_continuous_gain_cannot_take_a_tick_of_delay_on_desk_mite():
    """Why desk-mite fell with the continuous gains at 200 Hz: applied one tick late
    (what a filtered estimate costs) they are unstable (|z| > 1); the discrete design's
    gains are not [derived from the ZOH model]."""
    result = analyze(load_robot(REPO / "robots/desk-mite.yaml"), rate_hz=200.0)
    Ad, Bd = np.array(result["A_discrete"]), np.array(result["B_discrete"])
    assert delayed_spectral_radius(Ad, Bd, np.array(result["lqr_gain"])) > 1.0
    assert result["one_tick_delay_spectral_radius"] < 1.0
    assert result["rate_warning"] is not None and "lqr_gain" in result["rate_warning"]


def test_no_delay_warning_for_the_demo_robots(every_robot):
    """The demo robots' suggested gains at 200 Hz survive one tick of delay [derived]."""
    result = analyze(every_robot)
    assert result["one_tick_delay_spectral_radius"] < 1.0
    assert not any("late" in w for w in result["warnings"]), result["warnings"]


def test_equivalent_poles_invert_sampling():
    """s = ln(z)/T inverts z = e^(sT) (definition) for poles within the Nyquist band."""
    poles = np.array([-3.0 + 2.0j, -3.0 - 2.0j, -250.0, 1.5])
    period = 0.005
    np.testing.assert_allclose(equivalent_poles(np.exp(poles * period), period), poles,
                               rtol=1e-12, err_msg="equivalent poles (1/s)")
    assert np.isfinite(equivalent_poles(np.array([0.0]), period)).all(), "dead-beat pole"


# ------------------------------------------------------------------ emitted configs


@pytest.mark.parametrize("controller", ["pid_tilt", "cascade"])
def test_emitted_config_is_what_the_controller_reads(shelf_runner, controller):
    """The emitted mapping is the suggested config; the example controller built with it
    (sandbox.control, no engine) holds exactly those gains, and its YAML text reads back
    equal (PyYAML safe_load)."""
    result = analyze(shelf_runner)
    path = REPO / "controllers" / f"{controller}.py"
    config = emit_config(result, str(path))
    assert config == result["suggested_config"][controller]
    assert emit_config(result, f"{path}:Controller") == config, "path with a class name"
    assert yaml.safe_load(config_yaml(result, str(path))) == config, "YAML round trip"
    built = make_controller(load_controller_class(str(path)), config,
                            RobotFacts.from_spec(shelf_runner, 200.0, 1e-3))
    if controller == "pid_tilt":
        held = {"kp": built.kp, "ki": built.ki, "kd": built.kd, "speed_kd": built.speed_kd,
                "filter_time_constant": built.tilt.time_constant}
    else:
        held = {"tilt_kp": built.tilt_kp, "tilt_kd": built.tilt_kd, "speed_kp": built.speed_kp,
                "position_kp": built.position_kp,
                "filter_time_constant": built.tilt.time_constant}
    assert held == pytest.approx(config, rel=1e-15), f"{controller} gains as held"


def test_unknown_controller_gets_raw_gains(shelf_runner):
    """Any other controller gets k_position, k_speed, k_pitch, k_pitch_rate = the discrete
    K, so u = −(k·s) is the discrete LQR law (definition)."""
    result = analyze(shelf_runner)
    config = emit_config(result, "my_robot/balance_v2.py:Balancer")
    assert list(config) == list(RAW_GAIN_KEYS)
    np.testing.assert_allclose([config[k] for k in RAW_GAIN_KEYS],
                               np.ravel(result["lqr_gain_discrete"]), rtol=1e-15)
    text = config_yaml(result, "balance_v2.py")
    assert "duty = -(k_position*x" in text and yaml.safe_load(text) == config
    assert controller_stem("a/b/pid_tilt.py:Other") == "pid_tilt"
    assert controller_stem("cascade") == "cascade"


def test_analysis_table_shows_what_a_builder_needs():
    """The text report names poles, fall time, both gains with units, closed-loop poles,
    both suggested configs and the warnings (values as in the JSON result)."""
    result = analyze(load_robot(REPO / "robots/desk-mite.yaml"))
    text = analysis_table(result)
    for needle in ("desk-mite", "open-loop poles", "fall time constant", "duty/rad",
                   "duty/(rad/s)", "continuous", "discrete 200 Hz", "closed-loop poles",
                   "pid_tilt: kp", "speed_kd", "cascade: tilt_kp", "warnings:",
                   f"{result['lqr_gain_discrete'][0][2]:.4g}", "9.624"):
        assert needle in text, f"missing {needle!r} in:\n{text}"
    assert result["rate_warning"] in text
    calm = analysis_table(analyze(load_robot(REPO / "robots/tall-mast.yaml")))
    assert "warnings: none" in calm
