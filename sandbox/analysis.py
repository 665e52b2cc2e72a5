"""Linear model of a described robot: poles, LQR gains and suggested starting gains.

Planar model, linearised about upright. State ``s = [x, v, pitch, pitch_rate]`` in
m, m/s, rad, rad/s; pitch positive = top leans forward. Coordinates ``q = [x, pitch]``
with x the axle's forward travel. Lagrange's equations, linearised, read

    M q'' + D q' = S q + b u

M the mass matrix (SOURCES §1: Franklin, Powell & Emami-Naeini, Example 2.7 class),
D the back-EMF damping, S the gravity stiffness, b how the input enters. A torque
tau between body and wheels does work on the wheel's angle relative to the body,
x/r - pitch, so it enters as ``tau * [1/r, -1]``. A reflected rotor inertia J per
motor turns with that relative angle: it adds ``J * [1/r, -1][1/r, -1]^T`` to M.

Left out on purpose (not linear, or not planar): Coulomb friction in the gearbox,
rolling resistance, PWM quantisation and deadband, battery sag, turning.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
import scipy.linalg

from .units import STANDARD_GRAVITY

STATE_NAMES = ("x_m", "v_m_s", "pitch_rad", "pitch_rate_rad_s")
GAIN_UNITS = ("duty/m", "duty/(m/s)", "duty/rad", "duty/(rad/s)")

# Bryson's rule maxima (our choice for a small robot on a desk or floor): the
# deviations we are willing to see before the controller should push hard.
BRYSON_MAXIMA = {
    "x_m": 0.5,
    "v_m_s": 0.5,
    "pitch_rad": math.radians(5.0),
    "pitch_rate_rad_s": math.radians(50.0),
    "duty": 1.0,
}

# Sample at least this many times the fastest closed-loop natural frequency
# [common practice: 10-20x for a digital controller to track its continuous design].
RATE_FACTOR = 10.0


class AnalysisError(ValueError):
    """Parameters or weights for which the linear analysis has no meaning."""


@dataclass(frozen=True)
class PlanarParams:
    """Figures of the planar model, SI units.

    body_mass (kg, no wheels), body_pitch_inertia (kg·m², about the body's own centre
    of mass), com_height (m, body centre of mass above the axle), wheel_mass (kg, one
    wheel), wheel_inertia (kg·m², one wheel about its axle), wheel_radius (m),
    reflected_inertia (kg·m², per motor, rotor inertia × gear ratio²), torque_constant
    (N·m/A), back_emf_constant (V·s/rad) and resistance (ohm) per motor at the output
    shaft, drive_voltage (V, what full duty puts across a motor), gravity (m/s²).
    """

    body_mass: float
    body_pitch_inertia: float
    com_height: float
    wheel_mass: float
    wheel_inertia: float
    wheel_radius: float
    reflected_inertia: float = 0.0
    torque_constant: float = 0.0
    back_emf_constant: float = 0.0
    resistance: float = math.inf
    drive_voltage: float = 0.0
    gravity: float = STANDARD_GRAVITY

    def __post_init__(self) -> None:
        positive = ("body_mass", "wheel_radius", "resistance")
        for name, value in asdict(self).items():
            if math.isnan(value) or (name != "resistance" and math.isinf(value)):
                raise AnalysisError(f"{name} must be a finite number, got {value!r}")
            if name in positive and value <= 0:
                raise AnalysisError(f"{name} must be positive, got {value!r}")
            if value < 0:
                raise AnalysisError(f"{name} must not be negative, got {value!r}")

    @classmethod
    def from_spec(cls, spec: Any) -> PlanarParams:
        """The planar figures of a RobotSpec (battery at its nominal voltage)."""
        fig = spec.figures
        return cls(
            body_mass=float(fig.body.mass),
            body_pitch_inertia=float(fig.body.inertia[1, 1]),
            com_height=float(fig.com_height),
            wheel_mass=float(fig.wheel_mass),
            wheel_inertia=float(fig.wheel_inertia_axle),
            wheel_radius=float(spec.wheels.radius),
            reflected_inertia=float(fig.reflected_inertia),
            torque_constant=float(fig.torque_constant),
            back_emf_constant=float(fig.back_emf_constant),
            resistance=float(fig.resistance),
            drive_voltage=float(fig.drive_voltage),
            gravity=STANDARD_GRAVITY,
        )


# ------------------------------------------------------------------ models


def second_order_to_state_space(
    mass: np.ndarray, damping: np.ndarray, stiffness: np.ndarray, input_vector: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    """``M q'' + D q' = S q + b u``, q = [q1, q2], as ``s' = A s + B u``, s = [q1, q1', q2, q2']."""
    mass = np.asarray(mass, dtype=float)
    accel_per_q = np.linalg.solve(mass, np.asarray(stiffness, dtype=float))
    accel_per_rate = -np.linalg.solve(mass, np.asarray(damping, dtype=float))
    accel_per_u = np.linalg.solve(mass, np.asarray(input_vector, dtype=float))
    A = np.zeros((4, 4))
    A[0, 1] = A[2, 3] = 1.0
    A[np.ix_([1, 3], [0, 2])] = accel_per_q
    A[np.ix_([1, 3], [1, 3])] = accel_per_rate
    B = np.zeros((4, 1))
    B[[1, 3], 0] = accel_per_u
    return A, B


def wheel_relative_angle(p: PlanarParams) -> np.ndarray:
    """d(wheel angle relative to body)/dq for q = [x, pitch]: [1/r, -1] (rad per m, rad per rad)."""
    return np.array([1.0 / p.wheel_radius, -1.0])


def mass_matrix(p: PlanarParams) -> np.ndarray:
    """2×2 mass matrix for q = [x, pitch] (kg, kg·m, kg·m²), two wheels and two motors."""
    ml = p.body_mass * p.com_height
    body_and_wheels = np.array([
        [p.body_mass + 2 * p.wheel_mass + 2 * p.wheel_inertia / p.wheel_radius**2, ml],
        [ml, p.body_pitch_inertia + p.body_mass * p.com_height**2],
    ])
    relative = wheel_relative_angle(p)
    return body_and_wheels + 2 * p.reflected_inertia * np.outer(relative, relative)


def gravity_stiffness(p: PlanarParams) -> np.ndarray:
    """Gravity's restoring (here destabilising) stiffness for q = [x, pitch]: m_b g l on pitch."""
    return np.array([[0.0, 0.0], [0.0, p.body_mass * p.gravity * p.com_height]])


def torque_input_model(p: PlanarParams) -> tuple[np.ndarray, np.ndarray]:
    """(A, B) with input = total wheel torque of both motors (N·m); no motor terms."""
    return second_order_to_state_space(
        mass_matrix(p), np.zeros((2, 2)), gravity_stiffness(p), wheel_relative_angle(p)
    )


def duty_input_model(p: PlanarParams) -> tuple[np.ndarray, np.ndarray]:
    """(A, B) with input = one duty on both motors (driven bridge, averaged model).

    Total torque tau = 2 (kt/R) (duty·V_drive − ke·w), w = v/r − pitch_rate the wheel's
    rate relative to the body (DC motor, SOURCES §5, inductance neglected). The
    back-EMF part is a damper on the relative angle: D = 2 kt ke / R · a aᵀ, a = [1/r, −1].
    """
    relative = wheel_relative_angle(p)
    conductance = 2.0 * p.torque_constant / p.resistance  # N·m per V, both motors
    damping = conductance * p.back_emf_constant * np.outer(relative, relative)
    return second_order_to_state_space(
        mass_matrix(p), damping, gravity_stiffness(p), conductance * p.drive_voltage * relative
    )


def cart_pendulum_model(
    cart_mass: float, pendulum_mass: float, cart_friction: float, pendulum_inertia: float,
    pivot_to_com: float, gravity: float,
) -> tuple[np.ndarray, np.ndarray]:
    """(A, B) of a pendulum on a cart pushed by a force (N), in OUR convention.

    State [x, v, pitch, pitch_rate], pitch positive = pendulum top ahead of the cart
    (+x). Same Lagrangian as the wheeled model with the wheels replaced by a cart of
    viscous friction b (N·s/m). Messner & Tilbury's tutorial measures their angle
    deviation the other way (their phi = −pitch), so their (A, B) is (T A T, T B)
    with T = diag(1, 1, −1, −1).
    """
    ml = pendulum_mass * pivot_to_com
    mass = np.array([[cart_mass + pendulum_mass, ml], [ml, pendulum_inertia + ml * pivot_to_com]])
    damping = np.diag([cart_friction, 0.0])
    stiffness = np.array([[0.0, 0.0], [0.0, ml * gravity]])
    return second_order_to_state_space(mass, damping, stiffness, np.array([1.0, 0.0]))


# ------------------------------------------------------------------ analysis


def _sorted_eigenvalues(A: np.ndarray) -> np.ndarray:
    values = np.linalg.eigvals(np.asarray(A, dtype=float))
    return np.array(sorted(values, key=lambda z: (-z.real, -z.imag)))


def open_loop_poles(A: np.ndarray) -> np.ndarray:
    """Eigenvalues of A (1/s), sorted by real part then imaginary part, largest first."""
    return _sorted_eigenvalues(A)


def fall_time_constant(A: np.ndarray) -> float:
    """1 / (largest real part of the poles), s: how fast a small tilt grows e-fold.

    math.inf when no pole has a positive real part (nothing falls).
    """
    fastest_growth = max(z.real for z in np.linalg.eigvals(np.asarray(A, dtype=float)))
    return 1.0 / fastest_growth if fastest_growth > 0 else math.inf


def controllability_rank(A: np.ndarray, B: np.ndarray) -> int:
    """Rank of [B, AB, A²B, ...] (Kalman's test); full rank n means controllable.

    Columns are scaled to unit length first: they grow like |A|^k, and the rank
    tolerance must not mistake a small but real column for zero.
    """
    A = np.asarray(A, dtype=float)
    B = np.asarray(B, dtype=float).reshape(A.shape[0], -1)
    blocks = [B]
    for _ in range(A.shape[0] - 1):
        blocks.append(A @ blocks[-1])
    ctrb = np.hstack(blocks)
    norms = np.linalg.norm(ctrb, axis=0)
    ctrb = ctrb[:, norms > 0] / norms[norms > 0]
    return int(np.linalg.matrix_rank(ctrb)) if ctrb.size else 0


def lqr(
    A: np.ndarray, B: np.ndarray, Q: np.ndarray, R: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Continuous LQR: (K, P, closed-loop poles) for u = −K s.

    P solves AᵀP + PA − PBR⁻¹BᵀP + Q = 0 (scipy.linalg.solve_continuous_are);
    K = R⁻¹BᵀP. Raises AnalysisError for bad weights or when no stabilising gain exists.
    """
    A = np.asarray(A, dtype=float)
    n = A.shape[0]
    B = np.asarray(B, dtype=float).reshape(n, -1)
    Q = np.atleast_2d(np.asarray(Q, dtype=float))
    R = np.atleast_2d(np.asarray(R, dtype=float))
    if Q.shape != (n, n) or R.shape != (B.shape[1], B.shape[1]):
        raise AnalysisError(f"weights must be Q {n}x{n} and R {B.shape[1]}x{B.shape[1]}, "
                            f"got Q {Q.shape[0]}x{Q.shape[1]} and R {R.shape[0]}x{R.shape[1]}")
    tolerance = 1e-12 * max(1.0, float(np.abs(Q).max()))
    if not (np.allclose(Q, Q.T) and np.min(np.linalg.eigvalsh(Q)) >= -tolerance):
        raise AnalysisError("Q must be symmetric with no negative eigenvalue")
    if not (np.allclose(R, R.T) and np.min(np.linalg.eigvalsh(R)) > 0):
        raise AnalysisError("R must be symmetric and positive definite")
    try:
        P = scipy.linalg.solve_continuous_are(A, B, Q, R)
    except (np.linalg.LinAlgError, ValueError) as err:
        raise AnalysisError(f"no LQR solution (is the model controllable?): {err}") from None
    K = np.linalg.solve(R, B.T @ P)
    closed = _sorted_eigenvalues(A - B @ K)
    if not np.all(np.isfinite(K)) or max(z.real for z in closed) >= 0:
        raise AnalysisError("no stabilising LQR gain: the model cannot be balanced by this input")
    return K, P, closed


def default_weights(
    x_max: float = BRYSON_MAXIMA["x_m"],
    v_max: float = BRYSON_MAXIMA["v_m_s"],
    pitch_max: float = BRYSON_MAXIMA["pitch_rad"],
    pitch_rate_max: float = BRYSON_MAXIMA["pitch_rate_rad_s"],
    duty_max: float = BRYSON_MAXIMA["duty"],
) -> tuple[np.ndarray, np.ndarray]:
    """Bryson's rule weights (Q 4×4, R 1×1): 1/max² for each state and the duty.

    Maxima in m, m/s, rad, rad/s and duty (defaults: 0.5 m, 0.5 m/s, 5°, 50°/s, 1 —
    our choice, see BRYSON_MAXIMA).
    """
    maxima = np.array([x_max, v_max, pitch_max, pitch_rate_max, duty_max], dtype=float)
    if not np.all(np.isfinite(maxima)) or np.any(maxima <= 0):
        raise AnalysisError("Bryson maxima must be positive and finite")
    weights = 1.0 / maxima**2
    return np.diag(weights[:4]), np.array([[weights[4]]])


def suggest_gains(K: np.ndarray, fall_time_constant_s: float | None = None) -> dict[str, dict]:
    """Map an LQR gain (u = −K s, duty per SI state unit) onto the example controllers.

    pid_tilt: duty = kp·pitch + ki·∫pitch + kd·pitch_rate → kp = −K[2], kd = −K[3]. ki = 0:
    the LQR law has no integral, and a pitch-only loop cannot stop drift anyway; an
    integral of the tilt estimate winds up on accelerometer bias and centre-of-mass offset.
    cascade: duty = tilt_kp·(pitch − target) + tilt_kd·pitch_rate,
    target = −(speed_kp·v + position_kp·x) → expanded equals −K s with
    tilt_kp = −K[2], tilt_kd = −K[3], speed_kp = K[1]/K[2], position_kp = K[0]/K[2].
    filter_time_constant (s, complementary filter): 5 fall time constants, kept within
    0.2–2 s (0.5 s when unknown) — our choice: long enough to average out the
    accelerometer's reading of balancing accelerations, which happen on the fall time
    scale, short enough that a gyro bias b leaves only a small tilt error τ·b.
    """
    gain = np.asarray(K, dtype=float).reshape(-1)
    if gain.shape != (4,) or not np.all(np.isfinite(gain)):
        raise AnalysisError("K must hold 4 finite gains [x, v, pitch, pitch_rate]")
    if gain[2] == 0:
        raise AnalysisError("K has no pitch gain, so the cascade's inner loop would be open")
    if fall_time_constant_s is None or not math.isfinite(fall_time_constant_s):
        filter_tc = 0.5
    else:
        filter_tc = min(2.0, max(0.2, 5.0 * fall_time_constant_s))
    kp, kd = -gain[2], -gain[3]
    return {
        "pid_tilt": {"kp": float(kp), "ki": 0.0, "kd": float(kd),
                     "filter_time_constant": float(filter_tc)},
        "cascade": {
            "tilt_kp": float(kp),
            "tilt_kd": float(kd),
            "speed_kp": float(gain[1] / gain[2]),
            "position_kp": float(gain[0] / gain[2]),
            "filter_time_constant": float(filter_tc),
        },
    }


def rate_warning(closed_loop_poles: np.ndarray, rate_hz: float) -> str | None:
    """A warning when the controller rate is under RATE_FACTOR × the fastest pole (Hz = |p|/2π)."""
    if not (rate_hz > 0 and math.isfinite(rate_hz)):
        raise AnalysisError(f"controller rate must be a positive number of Hz, got {rate_hz!r}")
    fastest_hz = max(abs(complex(z)) for z in closed_loop_poles) / (2 * math.pi)
    needed_hz = RATE_FACTOR * fastest_hz
    if rate_hz >= needed_hz:
        return None
    return (
        f"controller rate {rate_hz:g} Hz is below {RATE_FACTOR:g}x the fastest closed-loop "
        f"pole ({fastest_hz:.3g} Hz): run the controller at {needed_hz:.0f} Hz or more, "
        f"or choose softer weights"
    )


def _pairs(values: np.ndarray) -> list[list[float]]:
    return [[float(complex(z).real), float(complex(z).imag)] for z in values]


def analyze(
    spec: Any, q_diag: list[float] | None = None, r: float | None = None, rate_hz: float = 200.0
) -> dict[str, Any]:
    """Everything ``upright analyze --json`` reports, as plain JSON-ready types.

    Duty-input model at nominal battery voltage; LQR weights from Bryson's rule
    unless q_diag (4 values) or r (duty weight) are given.
    """
    params = PlanarParams.from_spec(spec)
    A, B = duty_input_model(params)
    Q, R = default_weights()
    if q_diag is not None:
        if len(q_diag) != 4:
            raise AnalysisError(
                f"q_diag needs 4 weights (x, v, pitch, pitch_rate), got {len(q_diag)}"
            )
        Q = np.diag(np.asarray(q_diag, dtype=float))
    if r is not None:
        R = np.array([[float(r)]])
    rank = controllability_rank(A, B)
    K, _, closed = lqr(A, B, Q, R)
    tau_fall = fall_time_constant(A)
    return {
        "robot": spec.name,
        "state": list(STATE_NAMES),
        "input": "duty on both motors (battery nominal, driven bridge)",
        "A": A.tolist(),
        "B": B.tolist(),
        "open_loop_poles": _pairs(open_loop_poles(A)),
        "fall_time_constant_s": tau_fall if math.isfinite(tau_fall) else None,
        "controllable": rank == A.shape[0],
        "controllability_rank": rank,
        "lqr_q": Q.tolist(),
        "lqr_r": R.tolist(),
        "lqr_gain": K.tolist(),
        "lqr_gain_units": list(GAIN_UNITS),
        "closed_loop_poles": _pairs(closed),
        "suggested_config": suggest_gains(K, tau_fall),
        "rate_hz": float(rate_hz),
        "rate_warning": rate_warning(closed, rate_hz),
        "params": asdict(params),
    }
