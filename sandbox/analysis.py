"""Linear model of a described robot: poles, LQR gains and suggested starting gains.

The model itself (figures and equations) is :mod:`sandbox.planar`, re-exported here.
Two LQR designs on the same weights: the continuous one (``lqr_gain``, the DESIGN.md
contract) and a discrete one for a controller that holds its duty over each period at
its rate (zero-order hold, ``lqr_gain_discrete``). The suggested and emitted configs come
from the discrete one: the continuous gain can ask for a closed-loop pole faster than
the sample period supports (desk-mite at 200 Hz: −293 1/s; with one tick of delay that
loop is unstable and the robot falls). ``sandbox.identify`` checks the model against
the engine and the suggested configs in closed loop.
"""

from __future__ import annotations

import math
from dataclasses import asdict
from pathlib import Path
from typing import Any

import numpy as np
import yaml

# the model, re-exported: callers import it from here with the analysis
from .planar import (  # noqa: F401
    AnalysisError,
    PlanarParams,
    cart_pendulum_model,
    duty_input_model,
    gravity_stiffness,
    mass_matrix,
    second_order_to_state_space,
    torque_input_model,
    wheel_relative_angle,
)
from .tables import fmt, table

STATE_NAMES = ("x_m", "v_m_s", "pitch_rad", "pitch_rate_rad_s")
GAIN_UNITS = ("duty/m", "duty/(m/s)", "duty/rad", "duty/(rad/s)")

# Bryson's rule maxima (our choice for a small robot on a desk or floor): the
# deviations we are willing to see before the controller should push hard. With these,
# the discrete design's configs keep both example controllers up for 20 s from a 5°
# start on every demo robot at 200 Hz (tests/test_identify.py), so they stay as they are.
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


def _checked_weights(n: int, m: int, Q: np.ndarray, R: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Q (n×n, symmetric, no negative eigenvalue) and R (m×m, symmetric positive definite)."""
    Q = np.atleast_2d(np.asarray(Q, dtype=float))
    R = np.atleast_2d(np.asarray(R, dtype=float))
    if Q.shape != (n, n) or R.shape != (m, m):
        raise AnalysisError(f"weights must be Q {n}x{n} and R {m}x{m}, "
                            f"got Q {Q.shape[0]}x{Q.shape[1]} and R {R.shape[0]}x{R.shape[1]}")
    tolerance = 1e-12 * max(1.0, float(np.abs(Q).max()))
    if not (np.allclose(Q, Q.T) and np.min(np.linalg.eigvalsh(Q)) >= -tolerance):
        raise AnalysisError("Q must be symmetric with no negative eigenvalue")
    if not (np.allclose(R, R.T) and np.min(np.linalg.eigvalsh(R)) > 0):
        raise AnalysisError("R must be symmetric and positive definite")
    return Q, R


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
    Q, R = _checked_weights(n, B.shape[1], Q, R)
    import scipy.linalg  # here, not at the top: a run imports this module (0.17 s)

    try:
        P = scipy.linalg.solve_continuous_are(A, B, Q, R)
    except (np.linalg.LinAlgError, ValueError) as err:
        raise AnalysisError(f"no LQR solution (is the model controllable?): {err}") from None
    K = np.linalg.solve(R, B.T @ P)
    closed = _sorted_eigenvalues(A - B @ K)
    if not np.all(np.isfinite(K)) or max(z.real for z in closed) >= 0:
        raise AnalysisError("no stabilising LQR gain: the model cannot be balanced by this input")
    return K, P, closed


def zoh_discretise(A: np.ndarray, B: np.ndarray, period: float) -> tuple[np.ndarray, np.ndarray]:
    """(Ad, Bd) of ``s' = A s + B u`` with u held over each period (s): zero-order hold.

    Ad = e^(A T), Bd = ∫₀ᵀ e^(A τ) dτ B, both read off one matrix exponential of the
    block matrix [[A, B], [0, 0]]·T (Van Loan's method; same as
    scipy.signal.cont2discrete(..., method='zoh')).
    """
    if not (period > 0 and math.isfinite(period)):
        raise AnalysisError(f"sample period must be a positive number of seconds, got {period!r}")
    A = np.asarray(A, dtype=float)
    n = A.shape[0]
    B = np.asarray(B, dtype=float).reshape(n, -1)
    m = B.shape[1]
    block = np.zeros((n + m, n + m))
    block[:n, :n] = A
    block[:n, n:] = B
    import scipy.linalg

    held = scipy.linalg.expm(block * period)
    return held[:n, :n], held[:n, n:]


def dlqr(
    Ad: np.ndarray, Bd: np.ndarray, Q: np.ndarray, R: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Discrete LQR: (K, P, closed-loop eigenvalues z) for u_k = −K s_k.

    Minimises Σ s_kᵀ Q s_k + u_kᵀ R u_k. P solves the DARE
    P = AdᵀPAd − AdᵀPBd (R + BdᵀPBd)⁻¹ BdᵀPAd + Q (scipy.linalg.solve_discrete_are);
    K = (R + BdᵀPBd)⁻¹ BdᵀPAd. Eigenvalues sorted by magnitude, largest first.
    Raises AnalysisError for bad weights or when no stabilising gain exists.
    """
    Ad = np.asarray(Ad, dtype=float)
    n = Ad.shape[0]
    Bd = np.asarray(Bd, dtype=float).reshape(n, -1)
    Q, R = _checked_weights(n, Bd.shape[1], Q, R)
    import scipy.linalg

    try:
        P = scipy.linalg.solve_discrete_are(Ad, Bd, Q, R)
    except (np.linalg.LinAlgError, ValueError) as err:
        raise AnalysisError(f"no discrete LQR solution (is the model controllable?): {err}"
                            ) from None
    K = np.linalg.solve(R + Bd.T @ P @ Bd, Bd.T @ P @ Ad)
    closed = np.linalg.eigvals(Ad - Bd @ K)
    closed = np.array(sorted(closed, key=lambda z: (-abs(z), -z.imag)))
    if not np.all(np.isfinite(K)) or max(abs(z) for z in closed) >= 1.0:
        raise AnalysisError("no stabilising discrete LQR gain at this rate")
    return K, P, closed


def delayed_spectral_radius(Ad: np.ndarray, Bd: np.ndarray, K: np.ndarray, ticks: int = 1) -> float:
    """Largest |z| of the loop u_k = −K s_(k−ticks): the gain applied ``ticks`` periods late.

    The state is augmented with the duties still in the pipeline; below 1 means the
    loop stays stable with that much computation or sensor delay.
    """
    Ad = np.asarray(Ad, dtype=float)
    n = Ad.shape[0]
    Bd = np.asarray(Bd, dtype=float).reshape(n, 1)
    K = np.asarray(K, dtype=float).reshape(1, n)
    if ticks < 0:
        raise AnalysisError(f"delay must be zero or more ticks, got {ticks}")
    if ticks == 0:
        return float(max(abs(np.linalg.eigvals(Ad - Bd @ K))))
    size = n + ticks
    loop = np.zeros((size, size))
    loop[:n, :n] = Ad
    loop[:n, n:n + 1] = Bd  # the oldest duty in the pipeline acts now
    loop[n:size - 1, n + 1:] = np.eye(ticks - 1)  # pipeline shifts one place per tick
    loop[size - 1, :n] = -K.ravel()  # the newest duty is computed from the present state
    return float(max(abs(np.linalg.eigvals(loop))))


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
    """Map a state-feedback gain (u = −K s, duty per SI state unit) onto the example controllers.

    Expanding each controller's law and matching it term by term with
    −K s = −K[0]·x − K[1]·v − K[2]·pitch − K[3]·pitch_rate:

    pid_tilt: duty = kp·pitch + ki·∫pitch + kd·pitch_rate + speed_kd·v
    → kp = −K[2], kd = −K[3], speed_kd = −K[1]. It has no position term (−K[0]·x is
    dropped: the robot drifts). ki = 0: the LQR law has no integral, and an integral of
    the tilt estimate winds up on accelerometer bias and centre-of-mass offset.
    cascade: duty = tilt_kp·(pitch − target) + tilt_kd·pitch_rate,
    target = −(speed_kp·v + position_kp·x) → equals −K s exactly with
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
        "pid_tilt": {"kp": float(kp), "ki": 0.0, "kd": float(kd), "speed_kd": float(-gain[1]),
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
    """A warning when the controller rate is under RATE_FACTOR × the fastest pole (Hz = |p|/2π).

    It concerns a continuous design (``lqr_gain``) run on a sampled controller; the
    suggested configs come from the discrete design at the rate and do not need it.
    """
    if not (rate_hz > 0 and math.isfinite(rate_hz)):
        raise AnalysisError(f"controller rate must be a positive number of Hz, got {rate_hz!r}")
    fastest_hz = max(abs(complex(z)) for z in closed_loop_poles) / (2 * math.pi)
    needed_hz = RATE_FACTOR * fastest_hz
    if rate_hz >= needed_hz:
        return None
    return (
        f"controller rate {rate_hz:g} Hz is below {RATE_FACTOR:g}x the fastest closed-loop "
        f"pole of the continuous design ({fastest_hz:.3g} Hz): its gain lqr_gain needs "
        f"{needed_hz:.0f} Hz or more; the suggested configs use the discrete design at "
        f"{rate_hz:g} Hz instead"
    )


def delay_warning(Ad: np.ndarray, Bd: np.ndarray, K: np.ndarray, rate_hz: float) -> str | None:
    """A warning when the discrete design goes unstable if its duty comes one tick late.

    One tick is what a controller that reads, computes and writes at the next tick, or a
    sensor filter's lag, costs; a design with no room for it is fragile in practice.
    """
    radius = delayed_spectral_radius(Ad, Bd, K, ticks=1)
    if radius < 1.0:
        return None
    return (
        f"the suggested gains lose stability if the duty comes one tick "
        f"({1000.0 / rate_hz:.3g} ms) late (|z| = {radius:.3f}): raise the controller rate "
        f"or choose softer weights (larger --r)"
    )


def equivalent_poles(z_poles: np.ndarray, period: float) -> np.ndarray:
    """s = ln(z) / T (1/s): the continuous poles that sampling at period T maps onto z.

    A pole at z = 0 (dead-beat) is reported at |z| = 1e-300, a finite very fast pole.
    """
    z = np.asarray(z_poles, dtype=complex)
    z = np.where(np.abs(z) < 1e-300, 1e-300, z)
    return np.log(z) / period


def _pairs(values: np.ndarray) -> list[list[float]]:
    return [[float(complex(z).real), float(complex(z).imag)] for z in values]


def analyze(
    spec: Any, q_diag: list[float] | None = None, r: float | None = None, rate_hz: float = 200.0
) -> dict[str, Any]:
    """Everything ``upright analyze --json`` reports, as plain JSON-ready types.

    Duty-input model at nominal battery voltage; LQR weights from Bryson's rule
    unless q_diag (4 values) or r (duty weight) are given. ``lqr_gain`` is the
    continuous design; ``lqr_gain_discrete`` the discrete design for a controller that
    holds its duty over each period of ``rate_hz`` (zero-order hold), the same weights
    applied per tick. ``suggested_config`` comes from the discrete gain: the continuous
    one can ask for a closed-loop pole faster than the controller's rate supports.
    """
    if not (rate_hz > 0 and math.isfinite(rate_hz)):
        raise AnalysisError(f"controller rate must be a positive number of Hz, got {rate_hz!r}")
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
    period = 1.0 / rate_hz
    Ad, Bd = zoh_discretise(A, B, period)
    K_discrete, _, closed_z = dlqr(Ad, Bd, Q, R)
    tau_fall = fall_time_constant(A)
    continuous_warning = rate_warning(closed, rate_hz)
    warnings = [w for w in (continuous_warning, delay_warning(Ad, Bd, K_discrete, rate_hz)) if w]
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
        "rate_hz": float(rate_hz),
        "sample_period_s": period,
        "A_discrete": Ad.tolist(),
        "B_discrete": Bd.tolist(),
        "lqr_gain_discrete": K_discrete.tolist(),
        "closed_loop_poles_discrete": _pairs(closed_z),
        "closed_loop_poles_discrete_equivalent": _pairs(equivalent_poles(closed_z, period)),
        "one_tick_delay_spectral_radius": delayed_spectral_radius(Ad, Bd, K_discrete, 1),
        "suggested_config": suggest_gains(K_discrete, tau_fall),
        "suggested_config_source": "lqr_gain_discrete",
        "rate_warning": continuous_warning,
        "warnings": warnings,
        "params": asdict(params),
    }


# ------------------------------------------------------------------ configs and text

EXAMPLE_CONTROLLERS = ("pid_tilt", "cascade")
RAW_GAIN_KEYS = ("k_position", "k_speed", "k_pitch", "k_pitch_rate")


def controller_stem(controller: str) -> str:
    """The stem of a controller argument: 'controllers/pid_tilt.py:Controller' -> 'pid_tilt'."""
    return Path(str(controller).split(".py:")[0]).stem


def emit_config(result: dict[str, Any], controller: str) -> dict[str, float]:
    """The config mapping (``--config FILE``) for a controller, from an :func:`analyze` result.

    Chosen by the controller file's stem: ``pid_tilt`` and ``cascade`` get their
    suggested configs; any other controller gets the discrete design's raw
    state-feedback gains k_position (duty/m), k_speed (duty/(m/s)), k_pitch (duty/rad)
    and k_pitch_rate (duty/(rad/s)), for the law u = −(k·s).
    """
    stem = controller_stem(controller)
    if stem in result["suggested_config"]:
        return dict(result["suggested_config"][stem])
    gain = np.asarray(result["lqr_gain_discrete"], dtype=float).reshape(-1)
    return {key: float(k) for key, k in zip(RAW_GAIN_KEYS, gain)}


def config_yaml(result: dict[str, Any], controller: str) -> str:
    """:func:`emit_config` as YAML text with a comment header saying where it came from."""
    config = emit_config(result, controller)
    stem = controller_stem(controller)
    weights = ", ".join(fmt(w) for w in np.diag(np.asarray(result["lqr_q"])))
    lines = [
        f"# {stem} config for {result['robot']}, written by `upright analyze`:",
        f"# discrete LQR at {result['rate_hz']:g} Hz, Q diag [{weights}], "
        f"R {fmt(result['lqr_r'][0][0])} (SI units, duty).",
    ]
    if stem not in result["suggested_config"]:
        lines.append("# Raw state feedback: duty = -(k_position*x + k_speed*v + k_pitch*pitch"
                     " + k_pitch_rate*pitch_rate), SI units.")
    return "\n".join(lines) + "\n" + yaml.safe_dump(config, sort_keys=False)


def _pole_text(pairs: list[list[float]]) -> str:
    """Poles as '9.624, -1.012±0.4047j' (conjugate pairs written once)."""
    words = []
    for re_part, im_part in pairs:
        if im_part < 0 and [re_part, -im_part] in pairs:
            continue
        words.append(fmt(re_part) if im_part == 0 else f"{fmt(re_part)}±{fmt(abs(im_part))}j")
    return ", ".join(words)


def analysis_table(result: dict[str, Any]) -> str:
    """The :func:`analyze` result as text for a robot builder (what ``upright analyze`` prints)."""
    rate = result["rate_hz"]
    tau = result["fall_time_constant_s"]
    header = [
        f"{result['robot']}: linear model about upright, input {result['input']}",
        "",
        table([
            ("open-loop poles", _pole_text(result["open_loop_poles"]) + "  (1/s)"),
            ("fall time constant",
             "none (no unstable pole)" if tau is None
             else f"{fmt(tau, 3)} s  (a small tilt grows e-fold in this time)"),
            ("controllable", "yes" if result["controllable"] else
             f"no (rank {result['controllability_rank']} of 4)"),
            ("LQR weights", "Q diag [" + ", ".join(fmt(w) for w in np.diag(result["lqr_q"]))
             + f"], R {fmt(result['lqr_r'][0][0])}"),
        ]),
        "",
        "LQR gain K, duty = -K s:",
        table([
            ["continuous", *(fmt(k) for k in result["lqr_gain"][0])],
            [f"discrete {rate:g} Hz", *(fmt(k) for k in result["lqr_gain_discrete"][0])],
        ], header=["", *(f"{n} [{u}]" for n, u in zip(
            ("x", "v", "pitch", "pitch_rate"), result["lqr_gain_units"]))]),
        "",
        "closed-loop poles (1/s):",
        table([
            ("continuous", _pole_text(result["closed_loop_poles"])),
            (f"discrete {rate:g} Hz", _pole_text(result["closed_loop_poles_discrete_equivalent"])
             + "  (as ln z / T)"),
        ]),
        "",
        f"suggested configs (from the discrete gain at {rate:g} Hz; "
        "write one with --emit-config FILE):",
    ]
    for name, config in result["suggested_config"].items():
        header.append(f"  {name}: " + ", ".join(f"{k} {fmt(v)}" for k, v in config.items()))
    header.append("")
    if result["warnings"]:
        header.append("warnings:")
        header.extend(f"  - {w}" for w in result["warnings"])
    else:
        header.append("warnings: none")
    return "\n".join(header)
