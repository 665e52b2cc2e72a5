"""Numbers with units at the file boundary, converted to SI floats.

A value may be a bare number (taken as SI already) or a string such as
"35 mm", "200 rpm", "1.5 kgf*cm", "0.005 deg/s/sqrt(Hz)" or "2 g". Where an
acceleration is expected a lone ``g`` means standard gravity (9.80665 m/s²),
not grams. ``Nm``, ``N.m``, ``N m`` and ``N·m`` are newton-metres; ``kgfcm``,
``kgf.cm`` and ``kgf cm`` are kilogram-force centimetres.

Strings are checked before the unit library sees them: at most
``MAX_UNIT_TEXT`` characters, a number of at most ``MAX_NUMBER_TEXT``
characters, exponents only small plain numbers (``m/s^2``, ``sqrt(Hz)``), no
decimal comma, no ``gr`` (grains, not grams).

The usual spellings (``sandbox.unitspellings``: '35 mm', '0.55 kgf*cm', '420 rpm', '2 g',
'600 mAh', '0.006 deg/s/sqrt(Hz)'...) are read from a table of pint's own conversion factors
(``sandbox.unitfactors``, generated with pint and checked against it bit for bit by
``tests/test_unit_factors.py``): the number times pint's factor is exactly the float pint
returns. Any other spelling goes to pint, which is imported and its registry built once,
the first time such a string is met: plain numbers and the table's spellings never touch it.
"""

from __future__ import annotations

import math
import re
from functools import lru_cache
from typing import Any

STANDARD_GRAVITY = 9.80665  # m/s², exact by definition (CGPM 1901)

MAX_UNIT_TEXT = 64  # characters in one value with its unit ('0.005 deg/s/sqrt(Hz)' is 20)
MAX_NUMBER_TEXT = 40  # characters in the number of a value (a double has 17 significant digits)
MAX_EXPONENT = 4  # largest power a unit needs (m^2, s^-3, Hz^0.5)

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
_PLAIN_NUMBER = re.compile(r"^[-+]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][-+]?[0-9]+)?$")
_LEADING_NUMBER = re.compile(r"^\s*[-+]?[0-9.]*(?:[eE][-+]?[0-9]+)?")
_DECIMAL_COMMA = re.compile(r"[0-9],[0-9]")
_POWER = re.compile(r"(\*\*|\^)\s*(\(?)\s*([-+]?[0-9]*\.?[0-9]*)\s*(\)?)")
# A number as the table reads it (no leading zeros: pint reads '007' as 0) and a unit.
_TABLE_VALUE = re.compile(r"^([-+]?(?:(?:0|[1-9][0-9]*)(?:\.[0-9]*)?|\.[0-9]+)"
                          r"(?:[eE][-+]?[0-9]+)?)\s*(\S.*)$")
_INTEGER = re.compile(r"^[-+]?[0-9]+$")
_GRAINS = re.compile(r"(?<![A-Za-z_])gr(?![A-Za-z_])")
_WORD = r"(?<![A-Za-z_])"
_END = r"(?![A-Za-z_0-9])"
# Spellings that mean one thing only, rewritten before pint reads them.
_NEWTON_METRE = re.compile(_WORD + r"([mk]?)N\s*[.·-]?\s*m" + _END)
_FORCE_LENGTH = re.compile(_WORD + r"(kgf|gf|ozf|lbf)\s*[.·-]?\s*(cm|mm|m|in|ft)" + _END)
# A mass times a length where a torque is meant ('5 kg cm', 'kgcm', '5 oz in', 'ozin').
_MASS_LENGTH = re.compile(_WORD + r"(kg|g|oz|lb)\s*[.·*x-]?\s*(cm|mm|m|in|ft)" + _END)


class UnitError(ValueError):
    """A value that is not a number of the expected kind."""


@lru_cache(maxsize=1)
def registry() -> Any:
    """The shared pint unit registry, built on first use (building it takes ~0.2 s)."""
    import sys

    # pint's compatibility layer imports dask and scipy when they are installed (~0.25 s)
    # though upright never hands it their arrays: hide the ones not yet loaded meanwhile.
    hidden = [name for name in ("dask", "scipy") if name not in sys.modules]
    for name in hidden:
        sys.modules[name] = None  # type: ignore[assignment]  # makes `import name` fail
    try:
        import pint
    finally:
        for name in hidden:
            if sys.modules.get(name, 0) is None:
                del sys.modules[name]
    try:  # pint's own cache of its parsed definitions (user cache folder): 0.5 s -> 0.07 s
        return pint.UnitRegistry(autoconvert_offset_to_baseunit=True, cache_folder=":auto:")
    except OSError:  # no writable cache folder: build from the definitions every time
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


def any_to_si(value: object) -> float:
    """A number, or a unit string converted to SI base units ('5 deg' -> 0.0873, '35 mm' ->
    0.035), for values whose kind is not known (controller config values)."""
    if isinstance(value, bool):
        raise UnitError(f"expected a number, got {value!r}")
    if isinstance(value, (int, float)):
        return to_si(value, "fraction")
    if not isinstance(value, str):
        raise UnitError(f"expected a number, got {value!r}")
    text = check_unit_text(value, "a number or a value with a unit")
    if _PLAIN_NUMBER.match(text):
        return to_si(text, "fraction")
    if not re.match(r"[-+]?\.?[0-9]", text):  # pint would read a lone 'a' as a year
        raise UnitError(f"cannot read {value!r} as a number or a value with a unit")
    try:
        quantity = registry().Quantity(_rewrite(text, "a number"))
        number = float(quantity.to_base_units().magnitude)
    except UnitError:
        raise
    except Exception as err:
        raise UnitError(f"cannot read {value!r} as a number or a value with a unit") from err
    if not math.isfinite(number):
        raise UnitError(f"expected a finite number, got {value!r}")
    return number


def check_unit_text(text: str, example: str) -> str:
    """The stripped text, or UnitError when it is longer, or its number or powers larger,
    than any value with a unit needs, or it uses a spelling that misleads."""
    if len(text) > MAX_UNIT_TEXT:
        raise UnitError(f"a value of {len(text)} characters: a number with its unit takes at "
                        f"most {MAX_UNIT_TEXT} (expected {example})")
    stripped = text.strip()
    number = _LEADING_NUMBER.match(stripped)
    if number and len(number.group(0).strip()) > MAX_NUMBER_TEXT:
        raise UnitError(f"a number of {len(number.group(0).strip())} characters: at most "
                        f"{MAX_NUMBER_TEXT} (expected {example})")
    if _DECIMAL_COMMA.search(stripped):
        fixed = re.sub(r"([0-9]),([0-9])", r"\1.\2", stripped)
        raise UnitError(f"{text!r} has a decimal comma: write {fixed!r} (decimal point)")
    if "," in stripped:  # pint drops commas: '1, 5 mm' would silently read as 15 mm
        raise UnitError(f"{text!r} holds a comma: give one value, with a decimal point "
                        f"(expected {example})")
    if ":" in stripped:  # pint reads '1:2:3' as 6
        raise UnitError(f"{text!r} holds a colon: give one value (expected {example})")
    powers = list(_POWER.finditer(stripped))
    for match in powers:
        exponent, rest = match.group(3), stripped[match.end():].lstrip()
        try:
            size = abs(float(exponent))
        except ValueError:
            size = math.inf
        if size > MAX_EXPONENT or rest.startswith(("**", "^")) or (match.group(2) and not
                                                                   match.group(4)):
            raise UnitError(f"{text!r}: a unit's power must be a plain number from "
                            f"-{MAX_EXPONENT} to {MAX_EXPONENT} (as in m/s^2), expected "
                            f"{example}")
    if _GRAINS.search(stripped):
        raise UnitError(f"{text!r}: gr is grains in pint; for grams write g")
    return stripped


def _rewrite(text: str, kind: str) -> str:
    """Unambiguous spellings into pint's: 'Nm' -> 'N*m', 'kgfcm' -> 'kgf*cm', sqrt()."""
    source = _NEWTON_METRE.sub(r"\1N*m", text)
    source = _FORCE_LENGTH.sub(r"\1*\2", source)
    source = _SQRT_BARE.sub(r"(\1)**0.5", _SQRT.sub(r"(\1)**0.5", source))
    if kind in _GRAVITY_KINDS:
        source = _LONE_G.sub("g0", source)
    return source


def _from_table(source: str, kind: str) -> float | None:
    """The value of ``source`` (text as pint would read it) from pint's factor for its
    unit, or None when the number or the unit is not one the table reads exactly as pint.

    pint keeps an integer's magnitude an int (2 min -> 120, exact), so this does too.
    """
    match = _TABLE_VALUE.match(source)
    if not match:
        return None
    from .unitfactors import FACTORS

    factor = FACTORS.get(kind, {}).get(match.group(2))
    if factor is None:
        return None
    number = match.group(1)
    magnitude = int(number) if _INTEGER.match(number) else float(number)
    return float(magnitude * factor)


@lru_cache(maxsize=4096)
def _parse_string(text: str, kind: str, unit: str, example: str) -> float:
    stripped = check_unit_text(text, example)
    if _PLAIN_NUMBER.match(stripped):  # a number in a string: SI already, no pint needed
        return float(stripped)
    if kind == "torque":
        wrong = _MASS_LENGTH.search(stripped)
        if wrong:
            mass, length = wrong.group(1), wrong.group(2)
            fixed = (stripped[:wrong.start()] + f"{mass}f*{length}" + stripped[wrong.end():])
            raise UnitError(f"{text!r} is a mass times a length; for a torque write {fixed!r}")
    source = _rewrite(stripped, kind)
    known = _from_table(source, kind)
    if known is not None:
        return known
    return pint_value(text, source, kind, unit, example)


def pint_value(text: str, source: str, kind: str, unit: str, example: str) -> float:
    """``source`` (``text`` checked and rewritten for pint) read by pint, in ``unit``,
    checked for its kind (angle or none); UnitError naming ``text`` otherwise."""
    reg = registry()
    try:
        quantity = reg.Quantity(source)
    except Exception as err:  # pint raises many types for unparsable text
        raise UnitError(f"cannot read {text!r} as {example}") from err
    if not isinstance(quantity, reg.Quantity):  # the string held only a number
        return float(quantity)
    if str(quantity.units) == "dimensionless":  # no unit at all: SI already
        return float(quantity.magnitude)
    from pint import DimensionalityError

    try:
        number = float(quantity.to(unit).magnitude)
    except DimensionalityError as err:
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


def _describe(quantity: Any) -> str:
    dims = str(quantity.dimensionality)
    names = {
        "[length]": "a length",
        "[mass]": "a mass",
        "[time]": "a time",
        "[mass] * [length]": "a mass times a length",
        "[length] * [mass]": "a mass times a length",
        "dimensionless": "a plain number",
    }
    return names.get(dims, f"of dimension {dims}")
