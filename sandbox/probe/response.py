"""A controller script as a black box: its linear response from each sensor input to the duty.

A fresh instance gets the readings of a robot standing still and upright (accel
``(0, 0, g)``, gyro 0, encoder counts 0, battery nominal) for a warm-up, then a
small step or one-tick pulse in one input: the accelerometer's tilt (the
specific force rotated by the probe angle), the gyro's pitch rate, or the
counts of one encoder. The forward duty ``(left + right)/2`` less that of an
unprobed instance is the response. The estimate is the step response of a
positive and a negative step, differenced (even-order terms cancel), whose
first difference is the pulse response: its sum is then the settled step, so a
static gain of zero stays zero even where a one-tick kick of a whole encoder
count drives a script's speed estimate out of its linear range. Linearity is
checked by a step ``ratio`` times larger, by the sign symmetry and by the
one-tick pulse against the step. The four pulse responses get one
model with a common denominator: a finite impulse response when they die out
within the record, else the lowest-order ARX (Prony's method) that fits them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import scipy.signal

from ..contract import ControllerError, Reading, RobotFacts
from ..duties import check_duties
from ..scripts import failure_error, make_controller
from ..units import STANDARD_GRAVITY
from .loop import SENSOR_NAMES, ControllerModel

INPUT_UNITS = {"tilt": "duty/rad", "gyro": "duty/(rad/s)", "ticks_left": "duty/count",
               "ticks_right": "duty/count"}
NONLINEAR_TOLERANCE = 0.02  # a check differing by more than 2 % of the response: nonlinear
FIT_TOLERANCE = 1e-4  # relative RMS error below which an ARX counts as a fit
MAX_ORDER = 12
MAX_FIR_TAPS = 40
ZERO = 1e-12  # relative size below which a response counts as none
EXACT = 1e-10  # relative error of an ARX that reproduces a response to rounding
STATIC_ZERO = 1e-4  # a static gain below this fraction of the step's peak is none


class ProbeError(ValueError):
    """Probe settings that cannot work (a record shorter than a tick and the like)."""


@dataclass(frozen=True)
class ProbeSizes:
    """Probe sizes (rad, rad/s, counts), their ratio for the size test, and times (s)."""

    tilt: float = 1e-3
    gyro: float = 1e-2
    ticks: int = 1
    ratio: int = 4
    warmup_s: float = 2.0
    record_s: float = 3.0

    def of(self, name: str) -> float:
        return float(self.ticks) if name.startswith("ticks") else getattr(self, name)


def baseline_reading(facts: RobotFacts, t: float = 0.0) -> Reading:
    """What the controller reads standing still and upright: accel (0, 0, g), battery nominal."""
    return Reading(t=t, dt=1.0 / facts.rate_hz, gyro=(0.0, 0.0, 0.0),
                   accel=(0.0, 0.0, STANDARD_GRAVITY), ticks=(0, 0),
                   battery_v=facts.battery_voltage)


def fresh_controller(cls: type, config: dict | None, facts: RobotFacts) -> Any:
    """A new instance through :func:`make_controller`, reset if it has ``reset``."""
    controller = make_controller(cls, config, facts)
    if hasattr(controller, "reset"):
        try:
            controller.reset()
        except Exception as err:
            raise _failure(err, "reset", cls, "building it") from err
    return controller


def _failure(err: Exception, method: str, cls: type, when: str) -> ControllerError:
    return failure_error(err, method + "()", cls, f"while {when}")


def drive(cls: type, config: dict | None, facts: RobotFacts, ticks: int,
          probe: tuple[str, float, int, bool] | None = None) -> tuple[np.ndarray, bool]:
    """Duties (ticks × 2, unclipped) of a fresh instance; whether any was outside [-1, 1].

    ``probe``: (input name, size, first tick, step?) — a step holds from the first
    tick on, a pulse lasts that one tick.
    """
    controller = fresh_controller(cls, config, facts)
    reading = baseline_reading(facts)
    period = 1.0 / facts.rate_hz
    still = reading.accel
    out = np.zeros((ticks, 2))
    clipped = False
    when = "probing at rest" if probe is None else f"probing {probe[0]}"
    step = controller.step
    for k in range(ticks):
        reading.t = k * period
        reading.gyro, reading.accel, reading.ticks = (0.0, 0.0, 0.0), still, (0, 0)
        if probe is not None and (k == probe[2] or (probe[3] and k > probe[2])):
            name, size = probe[0], probe[1]
            if name == "tilt":
                reading.accel = (-STANDARD_GRAVITY * math.sin(size), 0.0,
                                 STANDARD_GRAVITY * math.cos(size))
            elif name == "gyro":
                reading.gyro = (0.0, size, 0.0)
            elif name == "ticks_left":
                reading.ticks = (int(size), 0)
            else:
                reading.ticks = (0, int(size))
        try:
            duty = step(reading)
        except Exception as err:
            raise _failure(err, "step", cls, f"{when} at t = {reading.t:.3f} s") from err
        try:
            _, _, was_clipped = check_duties(duty)
        except ControllerError as err:
            raise ControllerError(f"while {when} at t = {reading.t:.3f} s: step {err}") from None
        clipped |= was_clipped
        out[k] = float(duty[0]), float(duty[1])
        reading.take_logs()
    return out, clipped


@dataclass
class Identified:
    """What the probes found: the model, per-input figures, and warnings."""

    model: ControllerModel
    kind: str  # "fir" or "arx"
    fit_error: float
    pulse: dict[str, np.ndarray]
    checks: dict[str, dict[str, float]]
    warnings: list[str] = field(default_factory=list)
    period: float = 0.005


def identify(cls: type, config: dict | None, facts: RobotFacts,
             sizes: ProbeSizes = ProbeSizes()) -> Identified:
    """Probe a controller class (fresh instances, ``config``, ``facts``) and fit its model."""
    period = 1.0 / facts.rate_hz
    warm = max(1, int(round(sizes.warmup_s / period)))
    record = int(round(sizes.record_s / period))
    if record < 8:
        raise ProbeError(f"the probe record ({sizes.record_s:g} s) must hold at least 8 ticks")
    total = warm + record
    warnings: list[str] = []
    base, clipped = drive(cls, config, facts, total)
    again, _ = drive(cls, config, facts, total)
    if not np.array_equal(base, again):
        warnings.append("two fresh instances at rest gave different duties (the script is "
                        "random or keeps state between instances): the response below is "
                        "unreliable")
    if clipped:
        warnings.append("the duty is outside [-1, 1] at rest: the response below is the "
                        "script's, but the robot's bridge would clip it")
    base = base[warm:].mean(axis=1)

    def response(name: str, size: float, step: bool) -> np.ndarray:
        duties, hit = drive(cls, config, facts, total, (name, size, warm, step))
        if hit and not any("saturates" in w for w in warnings):
            warnings.append(f"the duty saturates while probing {name}: the probe sizes "
                            "exceed the script's linear range")
        return duties[warm:].mean(axis=1) - base

    pulse: dict[str, np.ndarray] = {}
    checks: dict[str, dict[str, float]] = {}
    for name in SENSOR_NAMES:
        size = sizes.of(name)
        up, down = response(name, size, True), response(name, -size, True)
        big = (response(name, sizes.ratio * size, True)
               - response(name, -sizes.ratio * size, True)) / (2.0 * sizes.ratio * size)
        kick = response(name, size, False) / size
        stepped = (up - down) / (2.0 * size)
        h = np.diff(stepped, prepend=0.0)  # the pulse response that sums to the step's
        scale = float(np.max(np.abs(stepped)))
        pulse[name] = h
        if scale <= 0.0:
            checks[name] = {"size": 0.0, "sign": 0.0, "superposition": 0.0}
            continue
        checks[name] = {
            "size": float(np.max(np.abs(big - stepped)) / scale),
            "sign": float(np.max(np.abs(up + down)) / (2.0 * size * scale)),
            "superposition": float(np.max(np.abs(np.cumsum(kick) - stepped)) / scale),
        }
        unit = "count" if name.startswith("ticks") else ("rad" if name == "tilt" else "rad/s")
        described = {
            "size": f"the response to a {sizes.ratio * size:g} {unit} step is not "
                    f"{sizes.ratio}x that to {size:g} {unit}",
            "sign": f"the responses to +{size:g} and -{size:g} {unit} steps are not mirror "
                    "images",
            "superposition": f"the response to a {size:g} {unit} step is not the sum of "
                             "one-tick pulse responses (time-varying, or nonlinear in the "
                             "input's rate of change)",
        }
        for test, value in checks[name].items():
            if value > NONLINEAR_TOLERANCE:
                warnings.append(f"{name}: nonlinear ({test} test): {described[test]} "
                                f"(differs by {100 * value:.1f} % of the response); the "
                                "figures below hold only for smaller deviations")
    model, kind, error = fit_model(np.array([pulse[n] for n in SENSOR_NAMES]))
    model = _settled_zeros(model, [float(np.max(np.abs(np.cumsum(pulse[n]))))
                                   for n in SENSOR_NAMES])
    if error > 1e-3:
        warnings.append(f"the response fits no low-order model well (relative error "
                        f"{100 * error:.2g} %): the loop figures are approximate")
    return Identified(model=model, kind=kind, fit_error=error, pulse=pulse, checks=checks,
                      warnings=warnings, period=period)


def _settled_zeros(model: ControllerModel, peaks: list[float]) -> ControllerModel:
    """The model with static gains below STATIC_ZERO of the step's peak set to exactly 0.

    A script that differences its encoder counts into a speed has no static gain from
    them; the fitted one is a rounding-sized remainder, which would leave the robot's
    free position mode a hair off z = 1. Subtracting gain × denominator from the
    numerator changes only the first tap, by that remainder.
    """
    P = np.polynomial.polynomial
    a1 = P.polyval(1.0, model.den)
    if abs(a1) < 1e-9 * float(np.sum(np.abs(model.den))):
        return model
    num = model.num.copy()
    for j, peak in enumerate(peaks):
        gain = P.polyval(1.0, num[j]) / a1
        if peak > 0 and abs(gain) <= STATIC_ZERO * peak:
            num[j, :len(model.den)] -= gain * model.den
    return ControllerModel(den=model.den, num=num)


def _errors(h: np.ndarray, model: ControllerModel) -> float:
    impulse = np.zeros(h.shape[1])
    impulse[0] = 1.0
    worst = 0.0
    for row, b in zip(h, model.num):
        norm = float(np.linalg.norm(row))
        if norm > 0:
            fitted = scipy.signal.lfilter(b, model.den, impulse)
            worst = max(worst, float(np.linalg.norm(fitted - row)) / norm)
    return worst


def fit_model(h: np.ndarray, max_order: int = MAX_ORDER,
              tolerance: float = FIT_TOLERANCE) -> tuple[ControllerModel, str, float]:
    """One model for the pulse responses ``h`` (inputs × ticks): (model, kind, error).

    FIR when every response is zero (below 1e-12 of its peak) after some tap within
    MAX_FIR_TAPS, unless an ARX of lower order reproduces them within EXACT (a
    recursive law whose response dies out geometrically); otherwise the common
    denominator by least squares on
    ``h_k + Σ a_i h_{k−i} = 0`` (k > n, each input scaled to its peak), numerators from
    the first n + 1 taps, order n the lowest whose relative RMS error is within 10x of
    the best order's and below ``tolerance`` (else the best found; the whole record as
    an FIR when no order comes within 1e-3).
    """
    inputs, length = h.shape
    peaks = np.max(np.abs(h), axis=1)
    used = peaks > 0
    if not used.any():
        return ControllerModel(den=np.array([1.0]), num=np.zeros((inputs, 1))), "fir", 0.0
    alive = np.abs(h) > ZERO * np.where(used, peaks, 1.0)[:, None]
    taps = int(np.max(np.nonzero(alive.any(axis=0))[0])) + 1
    if taps <= MAX_FIR_TAPS and taps < length // 2:
        den = np.zeros(taps)
        den[0] = 1.0
        fir = ControllerModel(den=den, num=h[:, :taps].copy())
        # A response that dies out geometrically (a recursive law) reaches the 1e-12 floor
        # after many taps; truncated, it leaves that many spurious loop poles near the
        # origin (|z| ~ 1e-12^(1/taps)), which nudge the real ones. An exact ARX of lower
        # order is the law itself.
        exact = _arx_fits(h, used, peaks, min(max_order, taps - 3), stop=EXACT)
        if exact and exact[-1][1] <= EXACT:
            return exact[-1][0], "arx", exact[-1][1]
        return fir, "fir", 0.0
    fits = _arx_fits(h, used, peaks, max_order)
    # The error falls sharply at the true order, then stays at the floor set by
    # rounding and by the script's own slight nonlinearity: the lowest order near it.
    floor = min(error for _, error in fits)
    for model, error in fits:
        if error <= max(10.0 * floor, 1e-12) and error < tolerance:
            return model, "arx", error
    model, error = min(fits, key=lambda f: f[1])
    if error > 1e-3:  # no low order fits: the record itself, truncated
        den = np.zeros(length)
        den[0] = 1.0
        return ControllerModel(den=den, num=h.copy()), "fir", error
    return model, "arx", error


def _arx_fits(h: np.ndarray, used: np.ndarray, peaks: np.ndarray, max_order: int,
              stop: float = 1e-12) -> list[tuple[ControllerModel, float]]:
    """ARX fits of orders 1.. up to ``max_order`` (Prony), stopping at one within ``stop``."""
    inputs, length = h.shape
    scaled = h[used] / peaks[used][:, None]
    fits: list[tuple[ControllerModel, float]] = []
    for n in range(1, max_order + 1):
        rows = [np.array([g[k - n:k][::-1] for k in range(n + 1, length)]) for g in scaled]
        rhs = np.concatenate([-g[n + 1:] for g in scaled])
        a, *_ = np.linalg.lstsq(np.vstack(rows), rhs, rcond=None)
        den = np.concatenate([[1.0], a])
        num = np.zeros((inputs, n + 1))
        for j in range(inputs):
            for k in range(n + 1):
                num[j, k] = h[j, k] + sum(a[i - 1] * h[j, k - i] for i in range(1, k + 1))
        model = ControllerModel(den=den, num=num)
        fits.append((model, _errors(h, model)))
        if fits[-1][1] < stop:
            break  # exact
    return fits


def low_frequency_gains(model: ControllerModel, period: float) -> dict[str, tuple[float, float]]:
    """Per input, (G0, G1) of G(e^{sT}) ≈ G0 + G1·s: the static gain and the rate gain.

    G0 = B(1)/A(1); G1 = −T·(B′A − BA′)/A² at q = 1. (inf, nan) for an input whose
    response integrates (A(1) = 0 and B(1) ≠ 0).
    """
    P = np.polynomial.polynomial
    a = model.den
    a1, da1 = P.polyval(1.0, a), P.polyval(1.0, P.polyder(a)) if len(a) > 1 else 0.0
    out = {}
    for name, b in zip(SENSOR_NAMES, model.num):
        b1 = P.polyval(1.0, b)
        db1 = P.polyval(1.0, P.polyder(b)) if len(b) > 1 else 0.0
        if abs(a1) < 1e-9 * float(np.sum(np.abs(a))):
            out[name] = (0.0, 0.0) if abs(b1) < 1e-12 else (math.inf, math.nan)
            continue
        out[name] = (float(b1 / a1), float(-period * (db1 * a1 - b1 * da1) / a1**2))
    return out


def state_feedback_equivalent(gains: dict[str, tuple[float, float]], counts_per_radian: float,
                              wheel_radius: float) -> dict[str, float | None]:
    """The identified law at low frequency as duty = k·[x, v, pitch, pitch_rate] (SI).

    With tilt ≈ pitch, gyro = pitch rate and each encoder = c·(x/r − pitch):
    k_x = G0_n·c/r, k_v = G1_n·c/r, k_pitch = G0_tilt − G0_n·c,
    k_rate = G1_tilt + G0_gyro − G1_n·c, with G_n the two encoders' sum.
    """
    c, r = counts_per_radian, wheel_radius
    g0n = gains["ticks_left"][0] + gains["ticks_right"][0]
    g1n = gains["ticks_left"][1] + gains["ticks_right"][1]
    g0t, g1t = gains["tilt"]
    g0g = gains["gyro"][0]

    def ok(value: float) -> float | None:
        return float(value) if math.isfinite(value) else None

    return {"x_m": ok(g0n * c / r), "v_m_s": ok(g1n * c / r),
            "pitch_rad": ok(g0t - g0n * c), "pitch_rate_rad_s": ok(g1t + g0g - g1n * c)}
