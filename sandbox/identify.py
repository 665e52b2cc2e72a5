"""The linear model against the simulation: identification and closed-loop checks.

``identify`` fits a continuous linear model ``s' = A s + B u`` (state s = [x, v, pitch,
pitch_rate] in m, m/s, rad, rad/s; input u = one duty on both motors) to short,
small-perturbation runs of the pybullet model, so the hand-derived model of
:mod:`sandbox.analysis` can be checked against the engine. ``compare`` puts the two
side by side. ``check_suggested`` runs the example controllers with the suggested
configs and reports whether the robot stays up.

Identification conditions (what the linear model assumes, so like is compared with like):
motor Coulomb friction 0, no breakaway friction, no gearbox play and rolling resistance 0
(the linear model has no Coulomb friction or dead zone), PWM at 16 bits with no
deadband (no quantisation), a driven bridge (duty is never exactly 0, so ``off_state``
never acts). The battery is left as described; each
step's duty is rescaled to the nominal drive voltage by the terminal voltage the bridge
sees in that step, since B is defined at the nominal voltage.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from .actuators import DriveTrain
from .analysis import (
    EXAMPLE_CONTROLLERS,
    PlanarParams,
    analyze,
    duty_input_model,
    emit_config,
    open_loop_poles,
)
from .robot import RobotSpec, robot_from_dict
from .tables import fmt, table
from .world import World

# The entries of (A, B) that carry the physics (the others are kinematics or zero):
# gravity and back-EMF columns of the two acceleration rows, and B's acceleration rows.
KEY_ENTRIES: tuple[tuple[str, str, int, int], ...] = (
    ("A[v_dot, v]", "A", 1, 1),
    ("A[v_dot, pitch]", "A", 1, 2),
    ("A[v_dot, pitch_rate]", "A", 1, 3),
    ("A[pitch_acc, v]", "A", 3, 1),
    ("A[pitch_acc, pitch]", "A", 3, 2),
    ("A[pitch_acc, pitch_rate]", "A", 3, 3),
    ("B[v_dot]", "B", 1, 0),
    ("B[pitch_acc]", "B", 3, 0),
)

EXAMPLE_CONTROLLER_DIR = Path(__file__).resolve().parents[1] / "controllers"


@dataclass(frozen=True)
class Excitation:
    """How the identification runs perturb the robot (our choice; SI units).

    runs: number of runs, each from a fresh world; duration (s): longest run;
    start_tilt (rad): largest starting tilt off balance, drawn uniformly ±;
    duty_tilt (rad): the duty amplitude is the duty whose pitch acceleration equals
    gravity's at this tilt (so both act on the same scale for any robot);
    hold (s): shortest and longest time a pseudo-random ± duty level is held;
    tilt_limit (rad): a run stops once the tilt off balance exceeds it, to stay where
    the linearisation holds; physics_dt (s): the engine step, also the sample period.
    """

    runs: int = 10
    duration: float = 0.4
    start_tilt: float = math.radians(1.0)
    duty_tilt: float = math.radians(1.5)
    hold: tuple[float, float] = (0.005, 0.04)
    tilt_limit: float = math.radians(4.0)
    physics_dt: float = 1e-3


def identification_spec(spec: RobotSpec) -> RobotSpec:
    """The robot with the effects the linear model leaves out turned off (see module doc)."""
    data = spec.to_si_dict()
    # the gearbox's play and the motors' breakaway friction: dead zones a small
    # perturbation lives inside, which no linear model holds (on either side)
    for motor in (data["motors"], data["motors"].get("left") or {},
                  data["motors"].get("right") or {}):
        for key in ("backlash", "static_friction_torque", "friction_torque"):
            motor.pop(key, None)
    data["motors"]["friction_torque"] = 0.0
    data["wheels"]["rolling_resistance"] = 0.0
    data["driver"].update(pwm_bits=16, deadband=0.0, off_state="brake")
    return robot_from_dict(data, f"{spec.name} (identification)")


def balance_pitch(spec: RobotSpec) -> float:
    """Pitch (rad) at which the body's centre of mass is straight above the axle."""
    com = spec.figures.body.com
    return -math.atan2(float(com[0]), float(com[2]))


def record_run(spec: RobotSpec, start_tilt: float, duties: np.ndarray,
               excitation: Excitation) -> tuple[np.ndarray, np.ndarray]:
    """One open-loop run: (states n×4 at every physics step, inputs (n−1) of duty).

    ``duties`` holds one duty per physics step; the run stops early once the tilt off
    balance passes ``excitation.tilt_limit``. The input recorded is the applied duty
    scaled to the nominal drive voltage (see module doc). x integrates the forward
    speed by the trapezoid rule.
    """
    dt = excitation.physics_dt
    drop = spec.driver.voltage_drop
    nominal_drive = spec.figures.drive_voltage
    level = balance_pitch(spec)
    states, inputs = [], []
    with World(spec, physics_dt=dt, tilt=level + start_tilt) as world:
        drive = DriveTrain(spec)
        body = world.body_state()
        x, speed = 0.0, world.forward_speed(body)
        states.append((x, speed, body.pitch, body.pitch_rate))
        for duty in duties:
            drive.set_duty(duty, duty)
            supply = max(drive.battery_voltage - drop, 0.0)  # what the bridge drives with
            inputs.append(drive.duty_left * supply / nominal_drive)
            world.advance(1, drive)
            body = world.body_state()
            new_speed = world.forward_speed(body)
            x += 0.5 * (speed + new_speed) * dt
            speed = new_speed
            states.append((x, speed, body.pitch, body.pitch_rate))
            if abs(body.pitch - level) > excitation.tilt_limit:
                break
    return np.array(states), np.array(inputs)


def pseudo_random_duties(rng: np.random.Generator, amplitude: float,
                         excitation: Excitation) -> np.ndarray:
    """± amplitude levels held for random times within ``excitation.hold``, one per step."""
    steps = int(round(excitation.duration / excitation.physics_dt))
    shortest, longest = (max(1, int(round(h / excitation.physics_dt))) for h in excitation.hold)
    duties = np.empty(steps)
    filled, sign = 0, rng.choice((-1.0, 1.0))
    while filled < steps:
        length = int(rng.integers(shortest, longest + 1))
        duties[filled:filled + length] = sign * amplitude
        filled += length
        sign = -sign if rng.random() < 0.7 else sign  # mostly alternate, sometimes repeat
    return duties


def fit_accelerations(states: list[np.ndarray], inputs: list[np.ndarray],
                      dt: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Least squares of the acceleration rows on finite differences, over all runs.

    (v_(k+1) − v_k)/dt and (ω_(k+1) − ω_k)/dt (ω the pitch rate) against
    [v_k, pitch_k, ω_k, u_k, 1]: the engine integrates semi-implicitly (new velocities
    from the forces at the start of the step, then positions from the new velocities),
    so the forward difference is the acceleration at the start of the step, with no
    differencing lag. Returns (rows 2×3 on [v, pitch, ω], input column 2, constant 2).
    x is left out: on a uniform floor nothing depends on where the robot is
    (translation invariance). The constant absorbs a balance point slightly off zero.
    """
    now = np.vstack([s[:len(u), 1:] for s, u in zip(states, inputs)])
    after = np.vstack([s[1:len(u) + 1, 1:] for s, u in zip(states, inputs)])
    duty = np.concatenate(inputs)
    accelerations = (after[:, [0, 2]] - now[:, [0, 2]]) / dt
    regressors = np.column_stack([now, duty, np.ones(len(duty))])
    # scale to unit RMS so that m/s, rad and duty weigh alike in the solver
    scale = np.sqrt(np.mean(regressors**2, axis=0))
    scale[scale == 0] = 1.0
    solution, *_ = np.linalg.lstsq(regressors / scale, accelerations, rcond=None)
    coefficients = (solution / scale[:, None]).T  # 2 × 5
    return coefficients[:, :3], coefficients[:, 3], coefficients[:, 4]


def identify(spec: RobotSpec, seed: int = 0,
             excitation: Excitation | None = None) -> tuple[np.ndarray, np.ndarray]:
    """(A 4×4, B 4×1), continuous time, fitted to small-perturbation runs of the engine.

    Each run starts from a seeded random tilt within ±start_tilt of balance, drives a
    pseudo-random ± duty and stops before the tilt leaves ±tilt_limit; the true state is
    recorded at every physics step. Same spec and seed give the same numbers.
    """
    excitation = excitation or Excitation()
    if excitation.runs < 1:
        raise ValueError(f"identification needs at least one run, got {excitation.runs}")
    rng = np.random.default_rng(seed)
    plain = identification_spec(spec)
    A_model, B_model = duty_input_model(PlanarParams.from_spec(plain))
    # duty whose pitch acceleration matches gravity's at duty_tilt (from the model's scale)
    amplitude = min(0.5, abs(A_model[3, 2]) * excitation.duty_tilt / abs(B_model[3, 0]))
    states, inputs = [], []
    for _ in range(excitation.runs):
        start = float(rng.uniform(-1.0, 1.0)) * excitation.start_tilt
        s, u = record_run(plain, start, pseudo_random_duties(rng, amplitude, excitation),
                          excitation)
        if len(u) >= 10:
            states.append(s)
            inputs.append(u)
    if not states:
        raise RuntimeError(f"{spec.name}: every identification run left the linear range "
                           "within 10 steps; lower the excitation")
    rows, input_column, _ = fit_accelerations(states, inputs, excitation.physics_dt)
    A = np.zeros((4, 4))
    A[0, 1] = A[2, 3] = 1.0  # kinematics: x' = v, pitch' = pitch rate
    A[np.ix_([1, 3], [1, 2, 3])] = rows
    B = np.zeros((4, 1))
    B[[1, 3], 0] = input_column
    return A, B


def relative_difference(identified: float, model: float) -> float:
    """|identified − model| / |model| (inf when the model's entry is 0 and they differ)."""
    if model == 0.0:
        return 0.0 if identified == 0.0 else math.inf
    return abs(identified - model) / abs(model)


def compare(spec: RobotSpec, seed: int = 0,
            excitation: Excitation | None = None) -> dict[str, Any]:
    """The hand-derived duty model next to the identified one, as JSON-ready types.

    Keys: ``robot``, ``model`` and ``identified`` ({"A", "B"}), ``entries`` (name, model,
    identified, relative_difference for each of KEY_ENTRIES), ``unstable_pole``
    (1/s, both, and their relative difference), ``max_relative_difference``.
    """
    A_id, B_id = identify(spec, seed=seed, excitation=excitation)
    A_model, B_model = duty_input_model(PlanarParams.from_spec(identification_spec(spec)))
    models = {"A": A_model, "B": B_model}
    found = {"A": A_id, "B": B_id}
    entries = []
    for name, which, row, column in KEY_ENTRIES:
        expected, measured = float(models[which][row, column]), float(found[which][row, column])
        entries.append({"name": name, "model": expected, "identified": measured,
                        "relative_difference": relative_difference(measured, expected)})
    pole_model = float(max(z.real for z in open_loop_poles(A_model)))
    pole_found = float(max(z.real for z in open_loop_poles(A_id)))
    return {
        "robot": spec.name,
        "seed": seed,
        "model": {"A": A_model.tolist(), "B": B_model.tolist()},
        "identified": {"A": A_id.tolist(), "B": B_id.tolist()},
        "entries": entries,
        "unstable_pole": {"model": pole_model, "identified": pole_found,
                          "relative_difference": relative_difference(pole_found, pole_model)},
        "max_relative_difference": max(e["relative_difference"] for e in entries),
    }


def compare_table(result: dict[str, Any]) -> str:
    """A :func:`compare` result as text: each key entry, both values, the difference."""
    rows = [(e["name"], fmt(e["model"]), fmt(e["identified"]),
             f"{100 * e['relative_difference']:.2f} %") for e in result["entries"]]
    pole = result["unstable_pole"]
    rows.append(("unstable pole (1/s)", fmt(pole["model"]), fmt(pole["identified"]),
                 f"{100 * pole['relative_difference']:.2f} %"))
    return (f"{result['robot']}: linear model against the engine (small perturbations)\n"
            + table(rows, header=["entry (SI units)", "model", "identified", "difference"]))


# ------------------------------------------------------------------ closed-loop check


def check_suggested(
    spec: RobotSpec,
    result: dict[str, Any] | None = None,
    controllers: list[str | Path] | None = None,
    duration: float = 20.0,
    tilt: float = math.radians(5.0),
    seed: int = 0,
) -> list[dict[str, Any]]:
    """Run each controller with the config ``--emit-config`` would write; one row each.

    ``result`` is an :func:`sandbox.analysis.analyze` result (computed with defaults when
    None); ``controllers`` are script paths (default: the example controllers). Each run
    lasts ``duration`` s from a starting pitch of ``tilt`` rad at the design's rate.
    Rows: controller, config, status, fell_at_s, max_abs_pitch_deg, rms_pitch_deg,
    drift_m, saturation_fraction, rate_hz.
    """
    from .runner import RunSettings, run  # the loop sits above this module's models

    result = result if result is not None else analyze(spec)
    if controllers is None:
        controllers = [EXAMPLE_CONTROLLER_DIR / f"{name}.py" for name in EXAMPLE_CONTROLLERS]
    rows = []
    for controller in controllers:
        config = emit_config(result, str(controller))
        outcome = run(spec, RunSettings(controller=str(controller), config=config,
                                        duration=duration, tilt=tilt, seed=seed,
                                        rate_hz=result["rate_hz"]))
        summary = outcome.summary
        rows.append({
            "controller": Path(str(controller).split(".py:")[0]).stem,
            "config": config,
            "status": outcome.status,
            "fell_at_s": summary["fell_at_s"],
            "max_abs_pitch_deg": summary["max_abs_pitch_deg"],
            "rms_pitch_deg": summary["rms_pitch_deg"],
            "drift_m": summary["drift_m"],
            "saturation_fraction": summary["saturation_fraction"],
            "rate_hz": result["rate_hz"],
            "duration_s": duration,
            "tilt_deg": math.degrees(tilt),
        })
    return rows


def check_table(rows: list[dict[str, Any]]) -> str:
    """:func:`check_suggested` rows as text: one line per controller, then a verdict."""
    if not rows:
        return "no controllers checked"
    body = []
    for row in rows:
        stayed_up = row["status"] == "completed"
        body.append((
            row["controller"],
            "stayed up" if stayed_up else f"{row['status']} at {fmt(row['fell_at_s'] or 0.0)} s",
            fmt(row["max_abs_pitch_deg"]) if row["max_abs_pitch_deg"] is not None else "-",
            fmt(row["rms_pitch_deg"]) if row["rms_pitch_deg"] is not None else "-",
            fmt(row["drift_m"]) if row["drift_m"] is not None else "-",
            f"{100 * (row['saturation_fraction'] or 0.0):.1f} %",
        ))
    first = rows[0]
    every = all(row["status"] == "completed" for row in rows)
    return "\n".join([
        f"suggested configs in simulation: {fmt(first['duration_s'])} s from "
        f"{fmt(first['tilt_deg'])} deg at {fmt(first['rate_hz'])} Hz",
        table(body, header=["controller", "result", "max |pitch| deg", "rms pitch deg",
                            "drift m", "saturated"]),
        "every controller stayed up" if every else "NOT every controller stayed up",
    ])
