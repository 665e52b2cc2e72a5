"""What physics forbids and what no robot upright serves: checks beyond types and ranges.

Errors (the file is refused): an implied gearbox efficiency above 100 %, a part
or the IMU further outside the robot than its own size, figures beyond the
limits below. Warnings (the run goes on; the CLI prints them): a bare number
that is implausible in SI but plausible in the usual hobby unit (a 200 kg part
that was meant as 200 g), an implied gearbox efficiency below 15 %, a body
centre of mass outside the frame.

Gearbox efficiency from catalogue figures at the output shaft:
η = K_t,out / K_e,out with K_t = stall_torque / stall_current and
K_e = rated_voltage / no_load_speed (SI). In SI K_t and K_e are the same
constant for an ideal (lossless) motor and gearbox, so η > 1 is impossible;
small plastic spur gearboxes give 0.3–0.8 [common practice].
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from typing import Any

import numpy as np

# Beyond any robot upright serves: a person-carrying balancer with its rider is about
# 150 kg, 1.8 m tall, on 0.25 m wheels, 2-4 kW motors at 36-72 V (common practice). Each
# limit leaves a few times that headroom; past it, a value is a typo (1e300 kg) or the
# wrong unit, and the physics engine would not be meaningful either.
MAX_MASS = 500.0  # kg, one frame, part or wheel
MAX_TOTAL_MASS = 1000.0  # kg, the whole robot
MAX_LENGTH = 5.0  # m, any size, position or track
MAX_STALL_TORQUE = 1000.0  # N·m per motor at the output shaft
MAX_VOLTAGE = 100.0  # V, a motor's rated voltage and the battery's nominal voltage
MAX_CURRENT = 1000.0  # A, a motor's stall current
MAX_NO_LOAD_SPEED = 1000.0  # rad/s at the gearbox output (about 9,500 rpm)
MAX_ROTOR_INERTIA = 1.0  # kg·m² at the motor shaft
MAX_GEAR_RATIO = 10_000.0
MIN_EFFICIENCY_WARNING = 0.15  # below this the figures are probably inconsistent
IMU_SIZE = 0.025  # m, a typical IMU breakout board's side [common practice]

# Bare numbers that are implausible in SI but plausible in a hobby unit: above this SI
# value a warning suggests the unit that was probably meant.
BARE_HINTS: dict[str, tuple[float, str, str]] = {
    # kind: (SI value above which a bare number looks wrong, hobby unit, its name)
    "mass": (20.0, "g", "grams"),
    "length": (1.5, "mm", "millimetres"),
    "no_load_speed": (100.0, "rpm", "rpm"),
    "current": (50.0, "mA", "milliamps"),
    "gyro": (70.0, "deg/s", "deg/s"),
    "gyro_bias": (0.5, "deg/s", "deg/s"),
    "inertia": (1e-3, "g*cm^2", "g·cm²"),
}


def _get(data: Any, path: tuple) -> Any:
    node = data
    for key in path:
        try:
            node = node[key]
        except (KeyError, IndexError, TypeError):
            return None
    return node


def _bare(data: Any, path: tuple) -> float | None:
    """The value at ``path`` if it was written as a bare number (or a string of one)."""
    value = _get(data, path)
    if isinstance(value, bool):
        return None
    if isinstance(value, (int, float)):
        return float(value)
    if isinstance(value, str):
        try:
            return float(value)
        except ValueError:
            return None
    return None


def _key(path: tuple) -> str:
    out = ""
    for part in path:
        out += f"[{part}]" if isinstance(part, int) else ("." if out else "") + str(part)
    return out


def _hint(data: Any, path: tuple, kind: str) -> str:
    """' (a bare number is SI: if you meant 200 g, write '200 g')' where it applies."""
    value = _bare(data, path)
    if value is None or kind not in BARE_HINTS or value > 1e7:  # no hobby unit fits 1e300
        return ""
    return f"; a bare number is SI: if you meant {BARE_HINTS[kind][2]}, write " \
           f"'{value:g} {BARE_HINTS[kind][1]}'"


def efficiency(spec: Any) -> float:
    """Implied gearbox efficiency K_t / K_e at the output shaft (SI), see module docstring."""
    m = spec.motors
    return (m.stall_torque / m.stall_current) / (m.rated_voltage / m.no_load_speed)


def _body_boxes(spec: Any) -> list[tuple[float, np.ndarray]]:
    frame = spec.body.frame
    boxes = [(frame.mass, np.array([0.0, 0.0, frame.bottom + frame.height / 2]))]
    return boxes + [(p.mass, np.array(p.at, dtype=float)) for p in spec.body.parts]


def body_com(spec: Any) -> np.ndarray:
    """The body's centre of mass (m, body frame): the boxes' mass-weighted centres.
    (Computed here rather than from ``spec.figures`` so that validating a description
    leaves its cached figures untouched.)"""
    boxes = _body_boxes(spec)
    return sum(m * at for m, at in boxes) / sum(m for m, _ in boxes)


def _limits(spec: Any) -> Iterator[tuple[tuple, float, float, str, str]]:
    """(path, SI value, limit, unit shown, kind for a hint) of every bounded figure."""
    frame = spec.body.frame
    yield ("body", "frame", "mass"), frame.mass, MAX_MASS, "kg", "mass"
    for name in ("depth", "width", "height"):
        yield ("body", "frame", name), getattr(frame, name), MAX_LENGTH, "m", "length"
    yield ("body", "frame", "bottom"), abs(frame.bottom), MAX_LENGTH, "m", "length"
    for i, part in enumerate(spec.body.parts):
        yield ("body", "parts", i, "mass"), part.mass, MAX_MASS, "kg", "mass"
        for j in range(3):
            yield ("body", "parts", i, "size", j), part.size[j], MAX_LENGTH, "m", "length"
            yield ("body", "parts", i, "at", j), abs(part.at[j]), MAX_LENGTH, "m", "length"
    w = spec.wheels
    yield ("wheels", "mass"), w.mass, MAX_MASS, "kg", "mass"
    yield ("wheels", "width"), w.width, MAX_LENGTH, "m", "length"
    yield ("wheels", "track"), w.track, MAX_LENGTH, "m", "length"
    m = spec.motors
    yield ("motors", "stall_torque"), m.stall_torque, MAX_STALL_TORQUE, "N·m", "torque"
    yield ("motors", "rated_voltage"), m.rated_voltage, MAX_VOLTAGE, "V", "voltage"
    yield ("motors", "stall_current"), m.stall_current, MAX_CURRENT, "A", "current"
    yield ("motors", "no_load_speed"), m.no_load_speed, MAX_NO_LOAD_SPEED, "rad/s", \
        "no_load_speed"
    yield ("motors", "rotor_inertia"), m.rotor_inertia, MAX_ROTOR_INERTIA, "kg·m²", "inertia"
    yield ("motors", "gear_ratio"), m.gear_ratio, MAX_GEAR_RATIO, "", ""
    yield ("motors", "friction_torque"), m.friction_torque, MAX_STALL_TORQUE, "N·m", "torque"
    yield ("battery",), spec.battery_voltage, MAX_VOLTAGE, "V nominal (cells × cell_voltage)", ""
    for j in range(3):
        yield ("imu", "at", j), abs(spec.imu.at[j]), MAX_LENGTH, "m", "length"


def plausibility_errors(spec: Any, data: Any = None) -> list[str]:
    """Problems that make the description impossible or beyond the tool, one line each."""
    problems = []
    for path, value, limit, unit, kind in _limits(spec):
        if value > limit:
            problems.append(f"{_key(path)}: {value:g} {unit} is beyond any robot upright "
                            f"models (at most {limit:g} {unit}, see DEVELOPERS.md)"
                            f"{_hint(data, path, kind)}")
    if problems:
        return problems  # the figures below would be meaningless
    total = sum(m for m, _ in _body_boxes(spec)) + 2 * spec.wheels.mass
    if total > MAX_TOTAL_MASS:
        problems.append(f"body: the whole robot weighs {total:g} kg: at most "
                        f"{MAX_TOTAL_MASS:g} kg (see DEVELOPERS.md)")
    problems += _efficiency_errors(spec, data)
    problems += _envelope_errors(spec)
    return problems


def _efficiency_errors(spec: Any, data: Any) -> list[str]:
    eta = efficiency(spec)
    if eta <= 1.0 + 1e-9:
        return []
    m = spec.motors
    torque_constant = m.stall_torque / m.stall_current
    back_emf_constant = m.rated_voltage / m.no_load_speed
    hints = []
    torque = _bare(data, ("motors", "stall_torque"))
    if torque is not None and eta * 0.0980665 <= 1.0:  # the same figure read as kgf·cm
        hints.append(f"stall_torque {torque:g} looks like kgf·cm: write '{torque:g} kgf*cm'")
    speed = _bare(data, ("motors", "no_load_speed"))
    if speed is not None and eta * 2 * math.pi / 60 <= 1.0:  # read as rpm
        hints.append(f"no_load_speed {speed:g} looks like rpm: write '{speed:g} rpm'")
    key = "motors.no_load_speed" if hints and hints[0].startswith("no_load") else \
        "motors.stall_torque"
    advice = "; ".join(hints) if hints else ("check stall_torque, stall_current, "
                                               "rated_voltage and no_load_speed")
    return [f"{key}: implied gearbox efficiency {100 * eta:.0f} % (torque constant "
            f"{torque_constant:.4g} N·m/A above the back-EMF constant "
            f"{back_emf_constant:.4g} V·s/rad, stall torque {m.stall_torque:.4g} N·m at "
            f"{m.stall_current:g} A): no gearbox gives more than 100 %; {advice}"]


def envelope(spec: Any, with_parts: bool) -> tuple[np.ndarray, np.ndarray]:
    """Low and high corners (m, body frame) of the box holding the frame and both wheels
    (and, with ``with_parts``, every part)."""
    frame = spec.body.frame
    w = spec.wheels
    side = w.track / 2 + w.width / 2
    low = np.array([min(-frame.depth / 2, -w.radius), min(-frame.width / 2, -side),
                    min(frame.bottom, -w.radius)])
    high = np.array([max(frame.depth / 2, w.radius), max(frame.width / 2, side),
                     max(frame.bottom + frame.height, w.radius)])
    if with_parts:
        for part in spec.body.parts:
            at, half = np.array(part.at), np.array(part.size) / 2
            low, high = np.minimum(low, at - half), np.maximum(high, at + half)
    return low, high


def _gap(at: np.ndarray, half: np.ndarray, low: np.ndarray, high: np.ndarray) -> np.ndarray:
    """Per axis, how far the box at ``at`` (half sizes ``half``) lies outside [low, high]."""
    return np.maximum(np.maximum(low - (at + half), (at - half) - high), 0.0)


def _envelope_errors(spec: Any) -> list[str]:
    problems = []
    axes = "xyz"
    low, high = envelope(spec, with_parts=False)
    for i, part in enumerate(spec.body.parts):
        size = np.array(part.size)
        gap = _gap(np.array(part.at), size / 2, low, high)
        for a in range(3):
            if gap[a] > size[a]:
                problems.append(
                    f"body.parts[{i}].at: {part.name} sits {1000 * gap[a]:.0f} mm outside the "
                    f"robot along {axes[a]} (frame and wheels span {1000 * low[a]:.0f} to "
                    f"{1000 * high[a]:.0f} mm), more than its own size "
                    f"({1000 * size[a]:.0f} mm): check the position and its unit")
                break
    low, high = envelope(spec, with_parts=True)
    gap = _gap(np.array(spec.imu.at), np.zeros(3), low, high)
    for a in range(3):
        if gap[a] > IMU_SIZE:
            problems.append(
                f"imu.at: the IMU sits {1000 * gap[a]:.0f} mm outside the robot along "
                f"{axes[a]} (frame, wheels and parts span {1000 * low[a]:.0f} to "
                f"{1000 * high[a]:.0f} mm), more than a board's size ({1000 * IMU_SIZE:.0f} "
                "mm): check the position and its unit")
            break
    return problems


_BARE_KEYS: tuple[tuple[tuple, str], ...] = (
    (("body", "frame", "mass"), "mass"),
    (("wheels", "mass"), "mass"),
    (("body", "frame", "depth"), "length"),
    (("body", "frame", "width"), "length"),
    (("body", "frame", "height"), "length"),
    (("wheels", "width"), "length"),
    (("wheels", "track"), "length"),
    (("motors", "no_load_speed"), "no_load_speed"),
    (("motors", "stall_current"), "current"),
    (("motors", "rotor_inertia"), "inertia"),
    (("imu", "gyro", "range"), "gyro"),
    (("imu", "gyro", "bias"), "gyro_bias"),
)


def _bare_paths(spec: Any) -> Iterator[tuple[tuple, str]]:
    yield from _BARE_KEYS
    for i in range(len(spec.body.parts)):
        yield ("body", "parts", i, "mass"), "mass"
        for j in range(3):
            yield ("body", "parts", i, "size", j), "length"


def plausibility_warnings(spec: Any, data: Any = None) -> list[str]:
    """Warnings, one line each naming the key: bare numbers that look like a hobby unit,
    a gearbox efficiency below 15 %, a body centre of mass outside the frame."""
    out = []
    if data is not None:
        for path, kind in _bare_paths(spec):
            value = _bare(data, path)
            above, unit, name = BARE_HINTS[kind]
            if value is not None and value > above:
                out.append(f"{_key(path)}: {value:g} is read in SI, which is implausible "
                           f"here; it looks like {name}: write '{value:g} {unit}'")
        capacity = _bare(data, ("battery", "capacity"))
        if capacity is not None and capacity >= 100:
            out.append(f"battery.capacity: a bare {capacity:g} is coulombs ({capacity / 3.6:g} "
                       f"mAh); for milliamp-hours write '{capacity:g} mAh'")
        accel = _bare(data, ("imu", "accel", "range"))
        if accel is not None and accel < 9.80665:
            out.append(f"imu.accel.range: a bare {accel:g} is m/s², less than gravity; it "
                       f"looks like g: write '{accel:g} g'")
    eta = efficiency(spec)
    if eta < MIN_EFFICIENCY_WARNING:
        out.append(f"motors: implied gearbox efficiency {100 * eta:.1f} % (torque constant / "
                   f"back-EMF constant), below {100 * MIN_EFFICIENCY_WARNING:.0f} %: check "
                   "stall_torque and no_load_speed and their units (plastic spur gearboxes "
                   "give 30-80 %)")
    frame = spec.body.frame
    com = body_com(spec)
    low = np.array([-frame.depth / 2, -frame.width / 2, frame.bottom])
    high = np.array([frame.depth / 2, frame.width / 2, frame.bottom + frame.height])
    if np.any(com < low - 1e-12) or np.any(com > high + 1e-12):
        shown = ", ".join(f"{1000 * v:.0f}" for v in com)
        out.append(f"body: the body's centre of mass ({shown}) mm lies outside the frame: "
                   "check the parts' positions")
    return out
