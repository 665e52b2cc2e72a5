"""Unit strings at the file boundary: conversion factors, gravity vs grams, refusals."""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sandbox.units import KINDS, MAX_NUMBER_TEXT, STANDARD_GRAVITY, UnitError, to_si

# Exact factors: SI Brochure (BIPM, 9th ed., 2019) and NIST SP 811 (2008), Appendix B [published].
G_N = 9.80665  # m/s², standard acceleration of gravity, exact (3rd CGPM, 1901)
KGF = 9.80665  # N per kilogram-force, exact (NIST SP 811, B.8)
DEGREE = math.pi / 180  # rad per degree, exact (SI Brochure, Table 8)
RPM = 2 * math.pi / 60  # rad/s per revolution per minute, exact by definition
AMPERE_HOUR = 3600.0  # C per A·h, exact (NIST SP 811, B.8)

SETTINGS = settings(max_examples=150, deadline=None, derandomize=True)


def test_standard_gravity_constant():
    """g_n = 9.80665 m/s², exact by definition (3rd CGPM, 1901; SI Brochure) [published]."""
    assert STANDARD_GRAVITY == G_N


@pytest.mark.parametrize(
    ("text", "kind", "expected"),
    [
        ("35 mm", "length", 0.035),
        ("200 rpm", "angular_speed", 200 * RPM),
        ("250 deg/s", "angular_speed", 250 * DEGREE),
        ("1.5 kgf*cm", "torque", 1.5 * KGF * 0.01),
        ("0.005 deg/s/sqrt(Hz)", "gyro_density", 0.005 * DEGREE),
        ("0.0001 deg/s^2/sqrt(Hz)", "gyro_walk", 0.0001 * DEGREE),
        ("0.0002 g/√Hz", "accel_density", 0.0002 * G_N),
        ("0.0002 g/sqrt(Hz)", "accel_density", 0.0002 * G_N),
        ("2 g", "acceleration", 2 * G_N),
        ("0.02 m/s^2", "acceleration", 0.02),
        ("80 g", "mass", 0.080),
        ("2000 mAh", "charge", 2000e-3 * AMPERE_HOUR),
        ("80 %", "fraction", 0.8),
        ("5 deg", "angle", 5 * DEGREE),
        ("1000 Hz", "frequency", 1000.0),
        ("5 ms", "time", 0.005),
        ("6 V", "voltage", 6.0),
        ("1.6 A", "current", 1.6),
        ("0.03 ohm", "resistance", 0.03),
        ("1 g*cm^2", "inertia", 1e-3 * 1e-4),
        ("0.5 m/s", "speed", 0.5),
        ("5 kgf", "force", 5 * KGF),
        ("0.3 N*s", "impulse", 0.3),
    ],
)
def test_conversion_factors(text, kind, expected):
    """Unit strings convert by the exact SI / NIST SP 811 factors [published], rtol 1e-12."""
    assert to_si(text, kind) == pytest.approx(expected, rel=1e-12), f"{text} as {kind}"


def test_named_examples_exact_values():
    """The brief's worked values: 2000 mAh = 7200 C, 80 % = 0.8, 1.5 kgf·cm = 0.14709975 N·m
    (kgf = 9.80665 N exactly, NIST SP 811) [published]."""
    assert to_si("2000 mAh", "charge") == pytest.approx(7200.0, rel=1e-12), "charge"
    assert to_si("80 %", "fraction") == pytest.approx(0.8, rel=1e-12), "fraction"
    assert to_si("1.5 kgf*cm", "torque") == pytest.approx(0.14709975, rel=1e-12), "torque"


def test_lone_g_is_gravity_only_where_an_acceleration_is_expected():
    """'2 g' is 2 g_n = 19.6133 m/s² for an acceleration, 2 grams for a mass (CGPM 1901)."""
    assert to_si("2 g", "acceleration") == pytest.approx(19.6133, rel=1e-12), "acceleration"
    assert to_si("2 g", "mass") == pytest.approx(0.002, rel=1e-12), "mass"
    assert to_si("2g", "acceleration") == pytest.approx(2 * G_N, rel=1e-12), "no space"
    # 'kg' is never turned into gravity: a mass where an acceleration is expected is refused.
    with pytest.raises(UnitError, match="an acceleration"):
        to_si("2 kg", "acceleration")


@pytest.mark.parametrize(
    ("value", "kind"),
    [(0.035, "length"), (7, "mass"), (0, "length"), (-0.01, "length"), (26.18, "angular_speed")],
)
def test_bare_numbers_are_si(value, kind):
    """A bare number is taken as SI already: returned unchanged, as a float."""
    result = to_si(value, kind)
    assert isinstance(result, float)
    assert result == float(value)


def test_number_in_a_string_is_si():
    """'0.035' (text holding only a number) is SI, like the bare number."""
    assert to_si("0.035", "length") == 0.035
    assert to_si("1e-3", "length") == 0.001


@pytest.mark.parametrize(
    ("text", "kind", "named"),
    [
        ("80 mm", "mass", "a mass"),
        ("35 g", "length", "a length"),
        ("6 A", "voltage", "a voltage"),
        ("2 kg", "acceleration", "an acceleration"),
        ("1 N", "torque", "a torque"),
        ("35 mm", "fraction", "a fraction"),
        ("1 g", "gyro_density", "a noise density"),
    ],
)
def test_wrong_dimension_names_expected_kind(text, kind, named):
    """A quantity of the wrong dimension raises UnitError naming the text and the kind wanted."""
    with pytest.raises(UnitError) as info:
        to_si(text, kind)
    message = str(info.value)
    assert named in message, message
    assert repr(text) in message, message


@pytest.mark.parametrize("text", ["abc", "", "three mm", "35 mmm", "1 /", "sqrt(", "1j"])
def test_unparsable_text_names_expected_kind(text):
    """Text pint cannot read raises UnitError naming the kind expected."""
    with pytest.raises(UnitError, match="a length"):
        to_si(text, "length")


@pytest.mark.parametrize(
    "value", [math.nan, math.inf, -math.inf, "nan", "inf", "-inf", "inf mm", "1e308 km"]
)
def test_non_finite_refused(value):
    """NaN and infinities (also one reached by converting) raise UnitError."""
    with pytest.raises(UnitError, match="finite"):
        to_si(value, "length")


@pytest.mark.parametrize("value", [True, False, None, [1, 2], {"a": 1}, b"35"])
def test_other_types_refused(value):
    """Booleans, None, lists, mappings and bytes are not numbers: UnitError naming the kind."""
    with pytest.raises(UnitError, match="a length"):
        to_si(value, "length")


def test_integer_too_large_for_a_float_refused():
    """YAML reads a long digit run as an int; one beyond float range is a UnitError."""
    with pytest.raises(UnitError, match="a mass"):
        to_si(10**400, "mass")


def test_decimal_comma_refused():
    """'1,5 mm' would read as 15 mm in pint (commas are dropped); it must be refused."""
    with pytest.raises(UnitError, match="point"):
        to_si("1,5 mm", "length")


def test_angle_units_only_where_angles_are_expected():
    """pint treats rad as dimensionless; without a check '5 Hz' would pass as 5 rad/s (2π short),
    and '6000 rpm' as a rate of 628 Hz. Both are refused; rad/s and rpm still convert."""
    with pytest.raises(UnitError, match="an angular speed"):
        to_si("5 Hz", "angular_speed")
    with pytest.raises(UnitError, match="a frequency"):
        to_si("6000 rpm", "frequency")
    with pytest.raises(UnitError, match="a fraction"):
        to_si("5 deg", "fraction")
    assert to_si("1 rad/s", "angular_speed") == 1.0
    assert to_si("60 rpm", "angular_speed") == pytest.approx(2 * math.pi, rel=1e-12)


def test_unit_error_is_a_value_error():
    """Core errors subclass built-ins (project rule): UnitError is a ValueError."""
    assert issubclass(UnitError, ValueError)


@SETTINGS
@given(st.floats(min_value=-1e12, max_value=1e12, allow_nan=False, allow_infinity=False))
def test_millimetres_scale_by_one_thousandth(millimetres):
    """'x mm' = x/1000 m for any finite x (SI prefix milli = 1e-3, SI Brochure) [published]."""
    text = f"{millimetres!r} mm"
    assert to_si(text, "length") == pytest.approx(millimetres / 1000, rel=1e-12, abs=1e-300), text


@SETTINGS
@given(st.text(max_size=20), st.sampled_from(sorted(KINDS)))
def test_random_text_is_a_finite_float_or_unit_error(text, kind):
    """Any text gives a finite float or a UnitError, never another exception."""
    try:
        value = to_si(text, kind)
    except UnitError as err:
        assert str(err), "empty error message"
    else:
        assert math.isfinite(value), f"{text!r} as {kind} gave {value}"


# ------------------------------------------------------------------ bounded strings

UNITISH = st.text(alphabet="0123456789 .e-+*^()/:,mgkNVAsHzrpd√", max_size=40)
BOUNDED = settings(max_examples=200, deadline=2000, derandomize=True)


@BOUNDED
@given(UNITISH, st.sampled_from(sorted(KINDS)))
def test_unit_like_text_is_a_finite_float_or_unit_error_quickly(text, kind):
    """Text made of digits, operators and unit letters never hangs (2 s deadline per
    example) and gives a finite float or a UnitError."""
    try:
        value = to_si(text, kind)
    except UnitError as err:
        assert str(err)
    else:
        assert math.isfinite(value)


@BOUNDED
@given(st.lists(st.integers(0, 99), min_size=3, max_size=6), st.sampled_from(["**", "^"]))
def test_exponent_towers_refused_before_pint(numbers, power):
    """'10**10**10 mm' and the like are refused by the text check (pint would try to
    compute them)."""
    text = power.join(str(n) for n in numbers) + " mm"
    with pytest.raises(UnitError, match="power"):
        to_si(text, "length")


@BOUNDED
@given(st.integers(MAX_NUMBER_TEXT + 1, 200_000))
def test_long_numbers_refused(digits):
    """A number written with more characters than any double needs is refused at once."""
    with pytest.raises(UnitError, match="at most"):
        to_si("9" * digits + " mm", "length")


@pytest.mark.parametrize(("text", "kind", "expected"), [
    ("0.078 Nm", "torque", 0.078), ("0.078 N.m", "torque", 0.078),
    ("0.078 N m", "torque", 0.078), ("0.078 N·m", "torque", 0.078),
    ("78 mNm", "torque", 0.078), ("2 kgfcm", "torque", 2 * KGF * 0.01),
    ("2 kgf.cm", "torque", 2 * KGF * 0.01), ("2 kgf cm", "torque", 2 * KGF * 0.01),
    ("10 ozf*in", "torque", 10 * 0.028349523125 * G_N * 0.0254),
])
def test_torque_spellings(text, kind, expected):
    """Unambiguous torque spellings: N·m, and kgf·cm = 9.80665e-2 N·m, ozf·in with the
    avoirdupois ounce 0.028349523125 kg and the inch 0.0254 m (NIST SP 811, B.8)
    [published]."""
    assert to_si(text, kind) == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize(("text", "message"), [
    ("5 kg cm", "'5 kg cm' is a mass times a length; for a torque write '5 kgf*cm'"),
    ("5 kgcm", "for a torque write '5 kgf*cm'"),
    ("5 kg*cm", "for a torque write '5 kgf*cm'"),
    ("5 g cm", "for a torque write '5 gf*cm'"),
    ("5 oz in", "for a torque write '5 ozf*in'"),
    ("5 ozin", "for a torque write '5 ozf*in'"),
])
def test_mass_times_length_refused_for_a_torque(text, message):
    with pytest.raises(UnitError) as info:
        to_si(text, "torque")
    assert message in str(info.value)


def test_grains_and_commas_and_colons_get_their_own_messages():
    with pytest.raises(UnitError, match="gr is grains in pint; for grams write g"):
        to_si("200 gr", "mass")
    assert to_si("200 grain", "mass") == pytest.approx(200 * 64.79891e-6, rel=1e-12)  # NIST
    with pytest.raises(UnitError, match="decimal comma: write '32.5 mm'"):
        to_si("32,5 mm", "length")
    with pytest.raises(UnitError, match="colon"):
        to_si("1:2:3", "fraction")


def test_plain_numbers_never_import_pint():
    """to_si on numbers and numeric strings does not need the unit registry (issue: pint
    is built only when a unit string is met)."""
    import subprocess
    import sys

    code = ("import sys; from sandbox.units import to_si; "
            "assert to_si('0.25', 'length') == 0.25 and to_si(3, 'mass') == 3.0; "
            "assert 'pint' not in sys.modules")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=60)
    assert done.returncode == 0, done.stderr
