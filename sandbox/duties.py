"""Checking what a controller's ``step`` returned: two duties, finite real numbers.

:func:`check_duties` (clipped to [-1, 1]) for a controller run in the simulation's
process, :func:`duty_floats` (unclipped) for the numbers an isolated controller sends
back. Callers import these from :mod:`sandbox.control`.
"""

from __future__ import annotations

import math
import numbers
from typing import Any

import numpy as np

from .contract import ControllerError

__all__ = ["check_duties", "duty_floats"]


_SIDES = ("left", "right")


def check_duties(out: Any) -> tuple[float, float, bool]:
    """Validate what ``step`` returned: ``(left, right, clipped)``.

    ``out`` must be two finite real numbers; each is clipped to [-1, 1] and
    ``clipped`` says whether either was outside. Raises :class:`ControllerError`.
    """
    try:
        left, right = out
    except (TypeError, ValueError):
        raise ControllerError(_shape_problem(out)) from None
    if type(left) is not float:
        left = _duty_number(left, 0, out)
    if type(right) is not float:
        right = _duty_number(right, 1, out)
    clipped = False
    if not -1.0 <= left <= 1.0:
        if left != left or left in (math.inf, -math.inf):
            raise ControllerError(f"step() returned {_special(left)} for the left duty")
        left = 1.0 if left > 0.0 else -1.0
        clipped = True
    if not -1.0 <= right <= 1.0:
        if right != right or right in (math.inf, -math.inf):
            raise ControllerError(f"step() returned {_special(right)} for the right duty")
        right = 1.0 if right > 0.0 else -1.0
        clipped = True
    return left, right, clipped


def _special(value: float) -> str:
    return "NaN" if value != value else ("inf" if value > 0 else "-inf")


def _shape_problem(out: Any) -> str:
    expected = "expected (left, right) duties"
    if out is None:
        return f"step() returned None, {expected} (is a return statement missing?)"
    try:
        count = len(out)
    except TypeError:
        return f"step() returned a {type(out).__name__}, {expected}"
    shape = getattr(out, "shape", None)
    if shape is not None and len(shape) != 1:
        return f"step() returned an array of shape {tuple(shape)}, {expected}"
    return f"step() returned {count} values, {expected}"


def duty_floats(out: Any) -> tuple[float, float]:
    """What ``step`` returned as two floats, unclipped (NaN and inf kept); the checks of
    :func:`check_duties` short of the range. Raises :class:`ControllerError`."""
    try:
        left, right = out
    except (TypeError, ValueError):
        raise ControllerError(_shape_problem(out)) from None
    return _duty_number(left, 0, out), _duty_number(right, 1, out)


def _duty_number(value: Any, index: int, out: Any) -> float:
    try:
        return _duty_float(value, index, out)
    except OverflowError:
        digits = (f" (about {int(value.bit_length() * 0.30103) + 1} digits)"
                  if isinstance(value, int) else "")
        raise ControllerError(f"step() returned a number too large for a float{digits} for "
                              f"the {_SIDES[index]} duty") from None


def _duty_float(value: Any, index: int, out: Any) -> float:
    if isinstance(value, (float, int)) and not isinstance(value, bool):  # incl. numpy float64
        return float(value)
    if len(getattr(out, "shape", (2,))) != 1:  # a 2×N array unpacks into rows
        raise ControllerError(_shape_problem(out))
    side = _SIDES[index]
    if isinstance(value, (bool, np.bool_)):
        raise ControllerError(f"step() returned a bool ({value}) for the {side} duty")
    if isinstance(value, numbers.Real) or (isinstance(value, np.ndarray) and value.ndim == 0
                                           and value.dtype.kind in "iuf"):
        return float(value)
    shown = (f"an array of shape {value.shape}" if isinstance(value, np.ndarray)
             else f"a {type(value).__name__}")
    raise ControllerError(f"step() returned {shown} for the {side} duty, expected a number")
