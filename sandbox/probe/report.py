"""``upright analyze --controller``: a script's identified law on the robot's linear model.

Puts :mod:`.response` (what the script does) and :mod:`.loop` (what the robot does
with it) together: closed-loop poles, margins of the loop broken at the duty, the
largest added latency the sampled linear loop stands, findings in plain words,
and a Bode and Nyquist plot.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np

from ..analysis import PlanarParams, analyze, duty_input_model, equivalent_poles
from ..contract import RobotFacts
from ..scripts import controller_rate, load_controller_class
from ..tables import fmt, table
from .loop import (
    POLE_AT_ONE,
    SENSOR_NAMES,
    SensorGeometry,
    Timing,
    closed_loop_poles,
    is_stable,
    loop_response,
    sampled_plant,
    stability_margins,
)
from .response import (
    INPUT_UNITS,
    ProbeSizes,
    identify,
    low_frequency_gains,
    state_feedback_equivalent,
)

STATE_LABELS = {"x_m": ("position", "duty/m"), "v_m_s": ("wheel speed", "duty/(m/s)"),
                "pitch_rad": ("tilt", "duty/rad"),
                "pitch_rate_rad_s": ("tilt rate", "duty/(rad/s)")}
NEGLIGIBLE = 1e-2  # an equivalent gain below 1 % of the LQR's counts as none (rule of thumb)
MAX_LATENCY_SCAN_S = 1.0


def steps_per_tick(physics_dt: float, rate_hz: float) -> int:
    """Physics steps per controller period (as the runner rounds them)."""
    ratio = 1.0 / (rate_hz * physics_dt)
    steps = round(ratio)
    if steps < 1 or abs(ratio - steps) > 1e-9 * max(1.0, ratio):
        raise ValueError(f"the physics step ({physics_dt * 1000:g} ms) must divide the "
                         f"controller period ({1000 / rate_hz:g} ms at {rate_hz:g} Hz)")
    return steps


def sample_delay_steps(spec: Any, physics_dt: float, spt: int) -> int:
    """How many physics steps old the IMU sample is at a tick (the runner's rule, tick 1000).

    The newest sample at or before the tick less imu.latency, samples at multiples
    of 1/imu.rate (sandbox.runner.sample_step).
    """
    tick_step = 1000 * spt
    t = (tick_step - spec.imu.latency / physics_dt) * physics_dt
    n = math.floor(t * spec.imu.rate + 1e-9)
    return tick_step - min(tick_step, round(n / spec.imu.rate / physics_dt))


def duty_delay_steps(spec: Any, latency: float, physics_dt: float) -> int:
    """Physics steps from a tick to its duty at the bridge: latency plus board compute time."""
    board = getattr(spec, "board", None)
    compute = float(getattr(board, "compute_time", 0.0) or 0.0) if board is not None else 0.0
    return int(round((latency + compute) / physics_dt))


def geometry_of(spec: Any, facts: RobotFacts) -> SensorGeometry:
    per_rev = float(facts.counts_per_wheel_rev)
    return SensorGeometry(wheel_radius=float(spec.wheels.radius),
                          counts_per_radian=per_rev / (2.0 * math.pi),
                          imu_height=float(spec.imu.at[2]))


def latency_margin(A: np.ndarray, B: np.ndarray, geometry: SensorGeometry, timing: Timing,
                   model: Any) -> float | None:
    """Largest added duty delay (s, physics-step resolution) the sampled linear loop stands.

    The first added delay (whole physics steps) at which a closed-loop pole leaves the
    unit circle, less one step. None when the loop is unstable as it is;
    MAX_LATENCY_SCAN_S when it stands that much.
    """
    def stable_with(extra: int) -> bool:
        t = Timing(timing.physics_dt, timing.steps_per_tick, timing.duty_delay_steps + extra,
                   timing.sample_delay_steps)
        return is_stable(closed_loop_poles(sampled_plant(A, B, geometry, t), model))

    if not stable_with(0):
        return None
    # a linear scan: with an unstable robot the loop can lose stability at one delay
    # and regain it at a longer one, so the first loss is the margin
    for extra in range(1, int(round(MAX_LATENCY_SCAN_S / timing.physics_dt)) + 1):
        if not stable_with(extra):
            return (extra - 1) * timing.physics_dt
    return MAX_LATENCY_SCAN_S


def analyze_controller(spec: Any, controller: str, config: dict | None = None, *,
                       rate_hz: float | None = None, latency: float = 0.0,
                       physics_dt: float = 1e-3, sizes: ProbeSizes | None = None,
                       accel_feels_motion: bool = True,
                       plot: Path | None = None) -> dict[str, Any]:
    """Everything ``analyze --controller`` reports, JSON-ready (see DESIGN.md's keys).

    ``latency`` (s) is added to the duty's way to the bridge as ``run --latency`` adds
    it; ``plot``: also write Bode and Nyquist plots of the loop there (PNG).
    """
    cls = load_controller_class(controller)
    rate = controller_rate(cls, rate_hz)
    spt = steps_per_tick(physics_dt, rate)
    facts = RobotFacts.from_spec(spec, rate, physics_dt)
    found = identify(cls, config, facts, sizes or ProbeSizes())
    A, B = duty_input_model(PlanarParams.from_spec(spec))
    geometry = geometry_of(spec, facts)
    geometry = SensorGeometry(geometry.wheel_radius, geometry.counts_per_radian,
                              geometry.imu_height, accel_feels_motion=accel_feels_motion)
    timing = Timing(physics_dt, spt, duty_delay_steps(spec, latency, physics_dt),
                    sample_delay_steps(spec, physics_dt, spt))
    plant = sampled_plant(A, B, geometry, timing)
    poles = closed_loop_poles(plant, found.model)
    stable = is_stable(poles)
    margins = stability_margins(loop_response(plant, found.model), plant.period, stable)
    gains = low_frequency_gains(found.model, plant.period)
    equivalent = state_feedback_equivalent(gains, geometry.counts_per_radian,
                                           geometry.wheel_radius)
    reference = -np.asarray(analyze(spec, rate_hz=rate)["lqr_gain_discrete"]).reshape(-1)
    result = {
        "controller": controller,
        "controller_rate_hz": rate,
        "latency_s": timing.duty_delay_steps * physics_dt,
        "imu_sample_age_s": timing.sample_delay_steps * physics_dt,
        "controller_gains": _gains_json(found, gains),
        "controller_model": {
            "kind": found.kind,
            "description": (f"FIR of {found.model.order + 1} taps" if found.kind == "fir"
                            else f"ARX of order {found.model.order} (common denominator)"),
            "fit_error": found.fit_error,
            "denominator": found.model.den.tolist(),
            "linearity_checks": found.checks,
        },
        "state_feedback_equivalent": equivalent,
        "lqr_state_feedback": dict(zip(STATE_LABELS, reference.tolist())),
        "stable": stable,
        "closed_loop_poles": [[float(z.real), float(z.imag)] for z in poles],
        "gain_margin_db": margins.gain_margin_db,
        "gain_margin_crossover_hz": margins.phase_crossover_hz,
        "phase_margin_deg": margins.phase_margin_deg,
        "delay_margin_s": margins.delay_margin_s,
        "crossover_hz": margins.crossover_hz,
        "gain_margins_db_all": [20 * math.log10(g) if 0 < g < math.inf else None
                                for g in margins.gain_margins_all],
        "phase_margins_deg_all": list(margins.phase_margins_all),
        "gain_crossovers_hz_all": list(margins.gain_crossovers_hz),
        "latency_margin_s": latency_margin(A, B, geometry, timing, found.model),
        "warnings": list(found.warnings) + _unmodelled(spec),
    }
    result["findings"] = findings(result, poles, plant.period, gains)
    if plot is not None:
        plot_loop(loop_response(plant, found.model), plant.period, plot,
                  title=f"{spec.name}, {Path(controller.split('.py:')[0]).name}",
                  crossover_hz=margins.crossover_hz)
    return result


def _unmodelled(spec: Any) -> list[str]:
    """Warnings for parts of the run the sampled linear loop leaves out."""
    if getattr(spec.imu, "filtering", False):
        return ["the IMU's own low-pass filter (imu.gyro/accel.bandwidth) is not in the linear "
                "loop: its delay costs phase, so expect less margin than stated; check with "
                "`upright margins`"]
    return []


def _gains_json(found: Any, gains: dict) -> dict[str, Any]:
    out = {}
    for j, name in enumerate(SENSOR_NAMES):
        h = found.pulse[name]
        used = bool(np.max(np.abs(h)) > 0)
        g0, g1 = gains[name]
        out[name] = {
            "unit": INPUT_UNITS[name],
            "used": used,
            "numerator": found.model.num[j].tolist(),
            "impulse_response": h[:8].tolist(),
            "static_gain": g0 if math.isfinite(g0) else None,
            "integrates": bool(math.isinf(g0)),
            "rate_gain": g1 if math.isfinite(g1) else None,
        }
    return out


def _z_text(z: complex) -> str:
    return fmt(z.real, 5) if abs(z.imag) < 1e-12 else f"{fmt(z.real, 5)}±{fmt(abs(z.imag), 4)}j"


def findings(result: dict, poles: np.ndarray, period: float, gains: dict) -> list[dict]:
    """What the structure lacks, in plain words: ``{"code", "text", "figures"}`` each."""
    out: list[dict] = []
    eq, lqr = result["state_feedback_equivalent"], result["lqr_state_feedback"]
    at_one = [z for z in poles if abs(z - 1.0) < POLE_AT_ONE]
    outside = [z for z in poles if abs(z) >= 1.0 and abs(z - 1.0) >= POLE_AT_ONE
               and z.imag >= 0]
    if outside:
        words = []
        for z in outside:
            s = complex(equivalent_poles(np.array([z]), period)[0])
            grow = f"grows e-fold in {fmt(1 / s.real, 3)} s" if s.real > 0 else "does not decay"
            osc = f", oscillating at {fmt(abs(s.imag) / (2 * math.pi), 3)} Hz" if z.imag else ""
            words.append(f"z = {_z_text(z)} ({grow}{osc})")
        out.append({"code": "unstable", "text": "the closed loop is unstable: "
                    + "; ".join(words), "figures": {"poles": [[z.real, z.imag]
                                                              for z in outside]}})
    encoders_used = result["controller_gains"]["ticks_left"]["used"] or \
        result["controller_gains"]["ticks_right"]["used"]
    if not encoders_used:
        out.append({"code": "no_wheel_feedback", "text": (
            "the loop lacks wheel-speed feedback (no response to the encoders): nothing holds "
            "the wheel speed or the position, so "
            "the robot creeps away and speeds up until the motors reach their top speed "
            f"(closed-loop poles at z = 1 and beyond); add a wheel-speed term, e.g. "
            f"{fmt(lqr['v_m_s'], 3)} duty per m/s as the LQR design has, and a position "
            "term to hold its spot"), "figures": {"poles_at_one": len(at_one)}})
    else:
        k_v = eq["v_m_s"]
        if k_v is not None and abs(k_v) < NEGLIGIBLE * abs(lqr["v_m_s"]):
            out.append({"code": "no_speed_feedback", "text": (
                f"the loop lacks wheel-speed feedback ({fmt(k_v, 3)} duty per m/s, under "
                f"{100 * NEGLIGIBLE:g} % of a working design's): the wheels speed up until the "
                "motors reach their top speed, a slow runaway (a closed-loop pole at or right "
                f"of z = 1); add a speed term (the LQR design has {fmt(lqr['v_m_s'], 3)} duty "
                "per m/s)"),
                "figures": {"k_v": k_v}})
        k_x = eq["x_m"]
        if k_x is not None and abs(k_x) < NEGLIGIBLE * abs(lqr["x_m"]):
            out.append({"code": "no_position_feedback", "text": (
                "no feedback from the wheel position: the robot keeps a closed-loop pole at "
                f"z = 1 and drifts from its spot; add a position term (the LQR design has "
                f"{fmt(lqr['x_m'], 3)} duty per m) to hold it"), "figures": {"k_x": k_x}})
    for key, (label, unit) in STATE_LABELS.items():
        k, ref = eq[key], lqr[key]
        if k is None or abs(k) < NEGLIGIBLE * abs(ref) or k * ref >= 0:
            continue
        out.append({"code": "wrong_sign", "text": (
            f"the {label} feedback has the destabilising sign: {fmt(k, 3)} {unit}, where a "
            f"stabilising law for this robot has the other sign (the LQR design: "
            f"{fmt(ref, 3)} {unit}); flip it"), "figures": {"state": key, "gain": k,
                                                             "lqr_gain": ref}})
    for name, (g0, _) in gains.items():
        if math.isinf(g0):
            out.append({"code": "integral", "text": (
                f"the {name} input is integrated (an integral term): the linear figures hold "
                "while the integral stays small; an integral of the tilt winds up on "
                "accelerometer bias"), "figures": {"input": name}})
    return out


def controller_table(result: dict) -> str:
    """The ``analyze --controller`` part of the text output."""
    model = result["controller_model"]
    rows = []
    for name, g in result["controller_gains"].items():
        if not g["used"]:
            rows.append((name, "not used", "", g["unit"]))
            continue
        static = "integrates" if g["integrates"] else fmt(g["static_gain"], 4)
        rate = "-" if g["rate_gain"] is None else fmt(g["rate_gain"], 4)
        rows.append((name, static, rate, g["unit"]))
    eq, lqr = result["state_feedback_equivalent"], result["lqr_state_feedback"]
    sf = [(label, "-" if eq[k] is None else fmt(eq[k], 4), fmt(lqr[k], 4), unit)
          for k, (label, unit) in STATE_LABELS.items()]
    poles = [complex(*p) for p in result["closed_loop_poles"]]
    shown = ", ".join(_z_text(z) for z in poles[:8] if z.imag >= 0 and abs(z) > 1e-6)
    nul = lambda v, f: "none" if v is None else f(v)  # noqa: E731
    lines = [
        f"controller {result['controller']} at {result['controller_rate_hz']:g} Hz: "
        f"{model['description']}, fit error {model['fit_error']:.2g}",
        table(rows, ("input", "static gain", "rate gain (x s)", "unit")),
        "",
        "as state feedback (duty = k . state, low frequency) beside the LQR design:",
        table(sf, ("state", "this script", "LQR", "unit")),
        "",
        table([
            ("closed loop", "stable" if result["stable"] else "UNSTABLE"),
            ("largest poles (z)", shown or "-"),
            ("gain margin", nul(result["gain_margin_db"], lambda v: f"{v:+.2f} dB at "
                                + fmt(result["gain_margin_crossover_hz"] or 0.0, 3) + " Hz")),
            ("phase margin", nul(result["phase_margin_deg"], lambda v: f"{v:.1f} deg")),
            ("crossover", nul(result["crossover_hz"], lambda v: f"{fmt(v, 3)} Hz")),
            ("delay margin", nul(result["delay_margin_s"], lambda v: f"{v * 1000:.1f} ms "
                                 "(phase margin / crossover)")),
            ("latency margin", nul(result["latency_margin_s"], lambda v: f"{v * 1000:.0f} ms "
                                   "(sampled linear loop, 1 ms steps)")),
        ]),
    ]
    if result["findings"]:
        lines += ["", "findings:"] + [f"  - {f['text']}" for f in result["findings"]]
    if result["warnings"]:
        lines += ["", "warnings:"] + [f"  - {w}" for w in result["warnings"]]
    return "\n".join(lines)


def plot_loop(loop: Any, period: float, path: Path, *, title: str = "",
              crossover_hz: float | None = None) -> Path:
    """Bode (|L| dB, arg L deg) and Nyquist plots of ``loop`` (L(ω), ω rad/s) as a PNG."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    nyquist = math.pi / period
    w = np.geomspace(1e-2, nyquist * (1 - 1e-6), 2000)
    values = loop(w)
    hz = w / (2 * math.pi)
    fig = plt.figure(figsize=(11, 6.5))
    mag = fig.add_subplot(2, 2, 1)
    phase = fig.add_subplot(2, 2, 3, sharex=mag)
    nyq = fig.add_subplot(1, 2, 2)
    mag.semilogx(hz, 20 * np.log10(np.abs(values)))
    mag.axhline(0.0, color="grey", lw=0.8)
    mag.set_ylabel("|L| (dB)")
    mag.set_title(f"{title}: loop broken at the duty")
    phase.semilogx(hz, np.degrees(np.unwrap(np.angle(values))))
    for level in (-180.0, 180.0):
        phase.axhline(level, color="grey", lw=0.8)
    phase.set_ylabel("arg L (deg)")
    phase.set_xlabel("frequency (Hz)")
    if crossover_hz:
        for ax in (mag, phase):
            ax.axvline(crossover_hz, color="tab:red", lw=0.8, ls="--")
    shown = values / np.maximum(1.0, np.abs(values) / 10.0)  # keep far points on the page
    nyq.plot(shown.real, shown.imag, label="L(e^{jwT}), 0 to Nyquist (|L| > 10 drawn at 10)")
    nyq.plot(shown.real, -shown.imag, color="tab:blue", alpha=0.35, label="mirror")
    nyq.plot([-1], [0], "r+", markersize=12, label="-1")
    nyq.set_aspect("equal", adjustable="datalim")
    nyq.set_xlabel("Re L")
    nyq.set_ylabel("Im L")
    nyq.set_title("Nyquist")
    nyq.legend(loc="best", fontsize=8)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path
