"""Numbers with units at the file boundary, converted to SI floats.

A value may be a bare number (taken as SI already) or a string such as
"35 mm", "200 rpm", "1.5 kgf*cm", "0.005 deg/s/sqrt(Hz)" or "2 g". Where an
acceleration is expected a lone ``g`` means standard gravity (9.80665 m/s²),
not grams.
"""

from __future__ import annotations

import math
import re
from functools import lru_cache

import pint

STANDARD_GRAVITY = 9.80665  # m/s², exact by definition (CGPM 1901)

# Each kind of quantity the robot file uses: its SI unit and a plain name for errors.
KINDS: dict[str, tuple[str, str]] = {
    "length": ("m", "a length such as '35 mm'"),
    "mass": ("kg", "a mass such as '80 g'"),
    "voltage": ("V", "a voltage such as '6 V'"),
    "current": ("A", "a current such as '1.6 A'"),
    "resistance": ("ohm", "a resistance such as '0.03 ohm'"),
    "torque": ("N*m", "a torque such as '1.5 kgf*cm'"),
    "angular_speed": ("rad/s", "an angular speed such as '250 rpm' or '250 deg/s'"),
    "angle": ("rad", "an angle such as '5 deg'"),
    "frequency": ("Hz", "a frequency such as '1000 Hz'"),
    "time": ("s", "a time such as '5 ms'"),
    "acceleration": ("m/s^2", "an acceleration such as '2 g' or '0.02 m/s^2'"),
    "inertia": ("kg*m^2", "a moment of inertia such as '1e-7 kg*m^2'"),
    "charge": ("C", "a charge such as '2000 mAh'"),
    "speed": ("m/s", "a speed such as '0.5 m/s'"),
    "force": ("N", "a force such as '5 N'"),
    "impulse": ("N*s", "an impulse such as '0.3 N*s'"),
    "gyro_density": ("rad/s/Hz^0.5", "a noise density such as '0.005 deg/s/sqrt(Hz)'"),
    "accel_density": ("m/s^2/Hz^0.5", "a noise density such as '0.0002 g/sqrt(Hz)'"),
    "gyro_walk": ("rad/s^2/Hz^0.5", "a rate random walk such as '0.0001 deg/s^2/sqrt(Hz)'"),
    "accel_walk": ("m/s^3/Hz^0.5", "a random walk such as '1e-5 m/s^3/sqrt(Hz)'"),
    "fraction": ("", "a fraction such as 0.8 or '80 %'"),
}

_GRAVITY_KINDS = {"acceleration", "accel_density", "accel_walk"}
# Kinds measured per angle. pint treats the radian as dimensionless, so without this
# check '5 Hz' would pass as 5 rad/s (not 2π·5) and '6000 rpm' as a 628 Hz rate.
_ANGULAR_KINDS = {"angle", "angular_speed", "gyro_density", "gyro_walk"}
_LONE_G = re.compile(r"(?<![A-Za-z_])g(?![A-Za-z_0-9])")
_SQRT = re.compile(r"(?:sqrt|√)\s*\(([^()]*)\)")
_SQRT_BARE = re.compile(r"√\s*([A-Za-z]+)")


class UnitError(ValueError):
    """A value that is not a number of the expected kind."""


@lru_cache(maxsize=1)
def registry() -> pint.UnitRegistry:
    """The shared unit registry (built once; building it takes ~0.2 s)."""
    return pint.UnitRegistry(autoconvert_offset_to_baseunit=True)


def to_si(value: object, kind: str) -> float:
    """Convert ``value`` (number or unit string) to a float in the SI unit of ``kind``.

    Raises UnitError with a plain message when the value is not a finite
    number of that kind.
    """
    unit, example = KINDS[kind]
    if isinstance(value, bool):
        raise UnitError(f"expected {example}, got {value!r}")
    if isinstance(value, (int, float)):
        try:
            number = float(value)
        except OverflowError:  # an int too large for a float (YAML reads long digit runs as int)
            raise UnitError(f"expected {example}, got an integer too large for a float") from None
    elif isinstance(value, str):
        number = _parse_string(value, kind, unit, example)
    else:
        raise UnitError(f"expected {example}, got {value!r}")
    if not math.isfinite(number):
        raise UnitError(f"expected a finite number, got {value!r}")
    return number


@lru_cache(maxsize=4096)
def _parse_string(text: str, kind: str, unit: str, example: str) -> float:
    reg = registry()
    if "," in text:  # pint drops commas: '1,5 mm' would silently read as 15 mm
        raise UnitError(f"cannot read {text!r} as {example}: write decimals with a point, "
                        "one value only")
    source = _SQRT_BARE.sub(r"(\1)**0.5", _SQRT.sub(r"(\1)**0.5", text.strip()))
    if kind in _GRAVITY_KINDS:
        source = _LONE_G.sub("g0", source)
    try:
        quantity = reg.Quantity(source)
    except Exception as err:  # pint raises many types for unparsable text
        raise UnitError(f"cannot read {text!r} as {example}") from err
    if not isinstance(quantity, pint.Quantity):  # the string held only a number
        return float(quantity)
    if str(quantity.units) == "dimensionless":  # no unit at all: SI already
        return float(quantity.magnitude)
    try:
        number = float(quantity.to(unit).magnitude)
    except pint.DimensionalityError as err:
        raise UnitError(
            f"{text!r} is {_describe(quantity)}, expected {example}"
        ) from err
    except Exception as err:
        raise UnitError(f"cannot read {text!r} as {example}") from err
    has_angle = dict(quantity.to_root_units().unit_items()).get("radian", 0) != 0
    if kind in _ANGULAR_KINDS and not has_angle:
        raise UnitError(f"{text!r} has no angle unit (rad, deg, rpm...), expected {example}")
    if kind not in _ANGULAR_KINDS and has_angle:
        raise UnitError(f"{text!r} has an angle unit, expected {example}")
    return number


def _describe(quantity: pint.Quantity) -> str:
    dims = str(quantity.dimensionality)
    names = {
        "[length]": "a length",
        "[mass]": "a mass",
        "[time]": "a time",
        "dimensionless": "a plain number",
    }
    return names.get(dims, f"of dimension {dims}")
