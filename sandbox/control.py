"""The controller contract, loading user controller scripts, and helpers scripts may import.

A controller script defines a class (``Controller`` by default) with
``__init__(self, config, robot)`` and ``step(self, r) -> (left_duty, right_duty)``;
``r`` is a :class:`Reading`. Scripts may use :class:`Pid`, :class:`ComplementaryTilt`
and :class:`KalmanTilt` from here. Everything is SI; pitch is the rotation about
body +y, positive when the top leans forward. Never touches the physics engine.
"""

from __future__ import annotations

import hashlib
import importlib.machinery
import importlib.util
import inspect
import math
import numbers
import os
import sys
import traceback
import warnings
import weakref
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

__all__ = [
    "ComplementaryTilt",
    "ControllerError",
    "WheelOdometry",
    "accel_tilt",
    "pendulum_gains",
    "ControllerLoadError",
    "KalmanTilt",
    "Pid",
    "Reading",
    "RobotFacts",
    "Setpoint",
    "TrackedConfig",
    "check_duties",
    "duty_floats",
    "controller_rate",
    "load_controller_class",
    "make_controller",
    "script_location",
    "tracked_config",
    "unread_key_text",
    "unread_keys",
]

DEFAULT_CLASS_NAME = "Controller"
DEFAULT_RATE_HZ = 200.0
MAX_LOG_NAME_LENGTH = 64


class ControllerError(RuntimeError):
    """The controller script failed while running (raised, or returned something unusable)."""


class ControllerLoadError(ValueError):
    """The controller script could not be loaded (bad path, syntax, missing class...)."""


# --------------------------------------------------------------------- values


@dataclass(frozen=True, slots=True)
class Setpoint:
    """What the test timeline asks for: forward speed (m/s) and turn rate (rad/s, left positive)."""

    speed: float = 0.0
    turn: float = 0.0


_STILL = Setpoint()


class Reading:
    """What a controller's ``step(r)`` receives each tick.

    ``t``, ``dt`` (s); ``gyro`` (rad/s) and ``accel`` (specific force, m/s²) as
    3-tuples in the sensor frame; ``ticks`` (left, right) encoder counts, ints;
    ``battery_v`` (V); ``setpoint`` (:class:`Setpoint`). ``log(name, value)``
    adds a float channel to this tick's trace row. The runner keeps one
    instance, sets its fields each tick and collects ``logs`` with
    :meth:`take_logs`.
    """

    __slots__ = ("t", "dt", "gyro", "accel", "ticks", "battery_v", "setpoint", "logs")

    def __init__(
        self,
        t: float = 0.0,
        dt: float = 0.0,
        gyro: tuple[float, float, float] = (0.0, 0.0, 0.0),
        accel: tuple[float, float, float] = (0.0, 0.0, 0.0),
        ticks: tuple[int, int] = (0, 0),
        battery_v: float = 0.0,
        setpoint: Setpoint = _STILL,
    ):
        self.t = t
        self.dt = dt
        self.gyro = gyro
        self.accel = accel
        self.ticks = ticks
        self.battery_v = battery_v
        self.setpoint = setpoint
        self.logs: dict[str, float] = {}

    def log(self, name: str, value: float) -> None:
        """Record ``value`` as channel ``log.<name>`` of this tick's trace row.

        ``name``: ASCII letters, digits and underscores, not starting with a digit,
        at most 64 characters. ``value``: anything ``float()`` takes except text.
        Logging a name twice in one tick keeps the last value.
        """
        if type(name) is not str or name not in _GOOD_LOG_NAMES:
            _check_log_name(name)
        if type(value) is not float:
            value = _log_value(name, value)
        self.logs[name] = value

    def take_logs(self) -> dict[str, float]:
        """This tick's logged channels; starts an empty set for the next tick."""
        logs = self.logs
        self.logs = {}
        return logs

    def __repr__(self) -> str:
        return (
            f"Reading(t={self.t!r}, dt={self.dt!r}, gyro={self.gyro!r}, accel={self.accel!r}, "
            f"ticks={self.ticks!r}, battery_v={self.battery_v!r}, setpoint={self.setpoint!r})"
        )


# Channel names already found good: a controller logs the same few names every tick.
_GOOD_LOG_NAMES: set[str] = set()


def _check_log_name(name: Any) -> None:
    if type(name) is not str or not (
        name.isidentifier() and name.isascii() and len(name) <= MAX_LOG_NAME_LENGTH
    ):
        raise ControllerError(
            f"r.log: channel name {name!r} is not allowed (use letters, digits and "
            f"underscores, not starting with a digit, at most {MAX_LOG_NAME_LENGTH} characters)"
        )
    if len(_GOOD_LOG_NAMES) < 10_000:  # bounded, whatever a script does with names
        _GOOD_LOG_NAMES.add(name)


def _log_value(name: str, value: Any) -> float:
    if isinstance(value, (str, bytes)) or getattr(value, "ndim", 0) != 0:
        kind = f"an array of shape {value.shape}" if hasattr(value, "shape") else repr(value)
        raise ControllerError(f"r.log({name!r}, ...): the value must be one number, got {kind}")
    try:
        return float(value)
    except (TypeError, ValueError):
        raise ControllerError(
            f"r.log({name!r}, ...): the value must be a number, got {type(value).__name__}"
        ) from None


@dataclass(frozen=True)
class RobotFacts:
    """Static facts a controller may read (its ``robot`` argument), SI units.

    wheel_radius (m), track (m, between wheel centres), counts_per_wheel_rev (encoder
    counts of one wheel turn relative to the body, whether the encoder sits on the motor
    shaft or the wheel's; ``counts_per_rev`` is its old name, deprecated), mass (kg, whole robot),
    com_height (m, body centre of mass from the axle), battery_voltage (V,
    nominal), drive_voltage (V, nominal battery less the driver's drop),
    max_wheel_speed (rad/s, no-load at drive_voltage), imu_at (m, body frame),
    physics_dt (s), rate_hz (controller rate, Hz), pitch_inertia (kg·m², body
    without wheels about the axle line), body_mass (kg, without wheels),
    stall_torque (N·m per wheel at drive_voltage, at the wheel).
    """

    wheel_radius: float
    track: float
    counts_per_wheel_rev: float
    mass: float
    com_height: float
    battery_voltage: float
    drive_voltage: float
    max_wheel_speed: float
    imu_at: tuple[float, float, float]
    physics_dt: float
    rate_hz: float
    pitch_inertia: float
    body_mass: float = 0.0
    stall_torque: float = 0.0

    @property
    def counts_per_rev(self) -> float:
        """Deprecated name of :attr:`counts_per_wheel_rev` (kept for one release)."""
        warnings.warn("robot.counts_per_rev is deprecated: read robot.counts_per_wheel_rev "
                      "(counts of one wheel turn) instead", DeprecationWarning, stacklevel=2)
        return self.counts_per_wheel_rev

    @classmethod
    def from_spec(cls, spec: Any, rate_hz: float, physics_dt: float) -> RobotFacts:
        """Facts of a validated :class:`sandbox.robot.RobotSpec` run at ``rate_hz`` (Hz)."""
        for label, value in (("rate_hz", rate_hz), ("physics_dt", physics_dt)):
            if not (math.isfinite(value) and value > 0):
                raise ValueError(f"{label} must be a positive number, got {value!r}")
        fig = spec.figures
        body = fig.body
        offset_sq = float(body.com[0] ** 2 + body.com[2] ** 2)  # distance² from the axle line (y)
        return cls(
            wheel_radius=float(spec.wheels.radius),
            track=float(spec.wheels.track),
            counts_per_wheel_rev=float(
                spec.encoders.counts_per_rev
                * (1.0 if getattr(spec.encoders, "shaft", "motor") == "wheel"
                   else spec.motors.gear_ratio)),
            mass=float(fig.mass),
            com_height=float(fig.com_height),
            battery_voltage=float(fig.battery_voltage),
            drive_voltage=float(fig.drive_voltage),
            max_wheel_speed=float(fig.drive_voltage / fig.back_emf_constant),
            imu_at=tuple(float(c) for c in spec.imu.at),
            physics_dt=float(physics_dt),
            rate_hz=float(rate_hz),
            pitch_inertia=float(body.inertia[1, 1] + body.mass * offset_sq),  # parallel axis
            body_mass=float(body.mass),
            stall_torque=float(fig.available_stall_torque),
        )


# --------------------------------------------------------------------- loading scripts


def load_controller_class(spec: str | os.PathLike) -> type:
    """Import a controller script and return its class.

    ``spec`` is ``"path/file.py"`` (class ``Controller``) or ``"path/file.py:ClassName"``.
    The file is imported as a fresh module with its folder on ``sys.path`` for the
    import, so it can import sibling modules (those are dropped from
    ``sys.modules`` afterwards, so another script's siblings of the same name do
    not collide). Raises :class:`ControllerLoadError`.
    """
    path, class_name = _split_spec(spec)
    if not path.is_file():
        raise ControllerLoadError(f"{path}: no such controller file")
    if path.suffix != ".py":
        raise ControllerLoadError(f"{path}: a controller must be a Python file ending in .py")
    try:
        source = path.read_bytes()
    except OSError as err:
        raise ControllerLoadError(f"{path}: cannot read the file: {err.strerror}") from None
    digest = hashlib.sha256(str(path.resolve()).encode() + b"\0" + source).hexdigest()[:16]
    module = _import_fresh(path, f"upright_controller_{digest}")
    cls = getattr(module, class_name, None)
    if cls is None:
        found = sorted(n for n, v in vars(module).items()
                       if inspect.isclass(v) and v.__module__ == module.__name__)
        listed = ", ".join(found) if found else "none"
        raise ControllerLoadError(
            f"{path}: no class named '{class_name}' (classes defined there: {listed})"
        )
    if not inspect.isclass(cls):
        raise ControllerLoadError(f"{path}: '{class_name}' is a {type(cls).__name__}, not a class")
    if not callable(getattr(cls, "step", None)):
        raise ControllerLoadError(
            f"{path}: class '{class_name}' has no step(self, r) method returning (left, right) duty"
        )
    return cls


def _split_spec(spec: str | os.PathLike) -> tuple[Path, str]:
    if not isinstance(spec, str):
        return Path(spec), DEFAULT_CLASS_NAME
    path_text, colon, class_name = spec.rpartition(":")
    if not colon or not path_text.endswith(".py"):  # no class part (or a drive letter "C:\...")
        return Path(spec), DEFAULT_CLASS_NAME
    if not class_name.isidentifier():
        raise ControllerLoadError(f"{spec}: '{class_name}' after ':' is not a class name")
    return Path(path_text), class_name


class _FreshSourceLoader(importlib.machinery.SourceFileLoader):
    """Compiles the script from its source every time: no bytecode cache read or written
    (a cached .pyc can be stale when a file is rewritten within a second at the same size)."""

    def get_code(self, fullname: str) -> Any:
        return self.source_to_code(self.get_data(self.path), self.path)


def _import_fresh(path: Path, module_name: str) -> Any:
    folder = str(path.resolve().parent)
    import_spec = importlib.util.spec_from_file_location(
        module_name, path, loader=_FreshSourceLoader(module_name, str(path))
    )
    if import_spec is None or import_spec.loader is None:
        raise ControllerLoadError(f"{path}: cannot be imported as a Python module")
    module = importlib.util.module_from_spec(import_spec)
    before = set(sys.modules)
    sys.modules[module_name] = module  # dataclasses and pickling look the module up by name
    sys.path.insert(0, folder)
    try:
        import_spec.loader.exec_module(module)
    except SyntaxError as err:
        sys.modules.pop(module_name, None)
        where = f"{err.filename or path}, line {err.lineno}"
        raise ControllerLoadError(f"{where}: syntax error: {err.msg}") from None
    except (Exception, SystemExit) as err:
        sys.modules.pop(module_name, None)
        line = _innermost_line(err, folder)
        where = f"{line[0]}, line {line[1]}" if line else str(path)
        raise ControllerLoadError(
            f"{where}: importing the controller raised {type(err).__name__}: {err}"
        ) from err
    finally:
        try:
            sys.path.remove(folder)
        except ValueError:
            pass
        for name in set(sys.modules) - before - {module_name}:
            file = getattr(sys.modules[name], "__file__", None)
            if file and _is_under(file, folder):
                del sys.modules[name]
    return module


def _is_under(file: str, folder: str) -> bool:
    return os.path.abspath(file).startswith(folder + os.sep)


def _innermost_line(err: BaseException, folder: str) -> tuple[str, int] | None:
    """(file, line) of the innermost traceback frame in a file under ``folder``."""
    found = None
    for frame in traceback.extract_tb(err.__traceback__):
        if frame.lineno and _is_under(frame.filename, folder):
            found = (frame.filename, frame.lineno)
    return found


def script_location(err: BaseException, cls: type) -> str | None:
    """``"file.py, line N"`` of the innermost frame of ``err`` in the controller's folder."""
    try:
        folder = os.path.dirname(os.path.abspath(inspect.getfile(cls)))
    except (TypeError, OSError):
        return None
    line = _innermost_line(err, folder)
    return f"{line[0]}, line {line[1]}" if line else None


def controller_rate(cls: type, override: float | None) -> float:
    """Controller rate (Hz): ``override``, else the class's ``rate_hz``, else 200 Hz."""
    if override is not None:
        value, source = override, "the controller rate"
    else:
        value = getattr(cls, "rate_hz", None)
        if value is None:
            return DEFAULT_RATE_HZ
        source = f"{getattr(cls, '__name__', 'controller')}.rate_hz"
    if isinstance(value, bool) or not isinstance(value, numbers.Real) or not (
        math.isfinite(value) and value > 0
    ):
        raise ControllerLoadError(f"{source} must be a positive number of Hz, got {value!r}")
    return float(value)


class TrackedConfig(dict):
    """The config mapping a controller receives: a real dict that records which keys it read.

    Reads are ``config[key]``, ``get``, ``in``, ``setdefault`` and ``pop`` (that key);
    anything that walks the whole mapping (iteration, ``keys``/``values``/``items``,
    ``copy``, ``dict(config)``, ``{**config}``, comparison) counts as reading every key,
    so a script that hands its config on never gets a false warning.
    """

    def __init__(self, *args: Any, **kwargs: Any):
        super().__init__(*args, **kwargs)
        self.read_keys: set = set()
        self.read_all = False

    def __getitem__(self, key: Any) -> Any:
        self.read_keys.add(key)
        return super().__getitem__(key)

    def get(self, key: Any, default: Any = None) -> Any:
        self.read_keys.add(key)
        return super().get(key, default)

    def __contains__(self, key: Any) -> bool:
        self.read_keys.add(key)
        return super().__contains__(key)

    def setdefault(self, key: Any, default: Any = None) -> Any:
        self.read_keys.add(key)
        return super().setdefault(key, default)

    def pop(self, key: Any, *default: Any) -> Any:
        self.read_keys.add(key)
        return super().pop(key, *default)

    def _all(self) -> None:
        self.read_all = True

    def __iter__(self):
        self._all()
        return super().__iter__()

    def keys(self):
        self._all()
        return super().keys()

    def values(self):
        self._all()
        return super().values()

    def items(self):
        self._all()
        return super().items()

    def copy(self) -> dict:
        self._all()
        return dict(super().items())

    def __eq__(self, other: object) -> bool:
        self._all()
        return super().__eq__(other)

    __hash__ = None  # type: ignore[assignment]  # as dict

    def __reduce_ex__(self, protocol: Any) -> Any:
        self._all()
        return super().__reduce_ex__(protocol)

    def was_read(self, key: Any) -> bool:
        """Whether the controller read ``key`` (or walked the whole mapping)."""
        return self.read_all or key in self.read_keys


# controller instance -> the TrackedConfig it was built with (see tracked_config)
_CONFIGS: weakref.WeakKeyDictionary = weakref.WeakKeyDictionary()
_CONFIGS_BY_ID: dict[int, tuple[Any, TrackedConfig]] = {}  # instances without weak references
_MAX_BY_ID = 8


def tracked_config(controller: Any) -> TrackedConfig | None:
    """The :class:`TrackedConfig` that :func:`make_controller` gave ``controller``, or None."""
    try:
        return _CONFIGS.get(controller)
    except TypeError:  # not weakly referenceable or not hashable
        held = _CONFIGS_BY_ID.get(id(controller))
        return held[1] if held is not None and held[0] is controller else None


def _remember(controller: Any, config: TrackedConfig) -> None:
    try:
        _CONFIGS[controller] = config
    except TypeError:
        if len(_CONFIGS_BY_ID) >= _MAX_BY_ID:
            _CONFIGS_BY_ID.pop(next(iter(_CONFIGS_BY_ID)))
        _CONFIGS_BY_ID[id(controller)] = (controller, config)


def unread_keys(config: TrackedConfig | None, given_keys: Any) -> list[tuple[str, str | None]]:
    """``(key, nearest read key or None)`` for each of ``given_keys`` the controller never read.

    ``given_keys``: the config keys the user gave (``--set config.KEY``, ``--config``,
    ``--vary``, ``tune --gains``), without the ``config.`` prefix. The suggestion is the
    closest key the controller did read (a likely typo), by :func:`sandbox.robot.nearest_key`.
    """
    if config is None or config.read_all:
        return []
    from .robot import nearest_key

    known = sorted(k for k in config.read_keys if isinstance(k, str))
    out = []
    for key in dict.fromkeys(given_keys):
        if not config.was_read(key):
            out.append((str(key), nearest_key(str(key), known)))
    return out


def unread_key_text(key: str, nearest: str | None, script: str) -> str:
    """``config.tilt_kpp: never read by controllers/cascade.py (did you mean tilt_kp?)``."""
    hint = f" (did you mean {nearest}?)" if nearest else " (the script reads no key like it)"
    return f"config.{key}: never read by {script}{hint}"


def make_controller(cls: type, config: dict | None, robot: RobotFacts) -> Any:
    """Instantiate ``cls(config, robot)``; a failure becomes :class:`ControllerError`.

    ``config`` (plain dict of user gains) is copied into a :class:`TrackedConfig`, so
    the controller cannot change the caller's values and the keys it reads are
    recorded; :func:`tracked_config` finds that mapping again from the instance.
    """
    config = TrackedConfig(config or {})
    name = getattr(cls, "__name__", "controller")
    try:
        signature = inspect.signature(cls)
    except (TypeError, ValueError):
        signature = None  # nothing to inspect (some built-in types); let the call decide
    if signature is not None:
        try:
            signature.bind(config, robot)
        except TypeError as err:
            raise ControllerError(
                f"{name}(config, robot) does not fit its __init__ signature: {err}"
            ) from err
    try:
        controller = cls(config, robot)
    except BaseException as err:  # SystemExit and the like too; the user's Ctrl-C goes on
        from .interrupts import is_user_interrupt

        if is_user_interrupt(err):
            raise
        where = script_location(err, cls)
        at = f" ({where})" if where else ""
        raise ControllerError(f"{failure_text(name + '.__init__', err)}{at}") from err
    _remember(controller, config)
    return controller


def failure_error(err: BaseException, call: str, cls: type, context: str) -> ControllerError:
    """``err``, raised by the script's ``call`` (``"step()"``), as a ControllerError:
    ``"<context>: step() raised ValueError: text (script.py, line 12)"``."""
    if isinstance(err, ControllerError):
        return ControllerError(f"{context}: {err}")
    where = script_location(err, cls)
    at = f" ({where})" if where else ""
    return ControllerError(f"{context}: {failure_text(call, err)}{at}")


def failure_text(call: str, err: BaseException) -> str:
    """``"step() raised ValueError: text"``, ``"step() called sys.exit(0)"`` for ``call``
    ``"step()"``; never raises."""
    if hasattr(err, "os_exit_status"):  # sandbox.interrupts.ProcessExit
        return f"{call} called os._exit({_safe_text(err.os_exit_status, repr)})"
    if isinstance(err, SystemExit):
        return f"{call} called sys.exit({_safe_text(err.code, repr)})"
    text = _safe_text(err, str)
    return f"{call} raised {type(err).__name__}: {text}"


def _safe_text(value: Any, show) -> str:
    try:
        text = show(value)
    except BaseException:  # a hostile __str__/__repr__
        return f"<{type(value).__name__} that cannot be shown>"
    return text if len(text) <= 500 else text[:500] + "..."


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


# --------------------------------------------------------------------- helpers for scripts


class Pid:
    """PID with derivative on the measurement, a first-order derivative filter and
    back-calculation anti-windup (Åström & Murray, *Feedback Systems*, PID
    implementation):

    - ``D_k = T_f/(T_f+h)·D_{k-1} − k_d/(T_f+h)·(y_k − y_{k-1})``
    - ``v = k_p·e + I_k + D_k``, ``u = clip(v, output_limits)``
    - ``I_{k+1} = I_k + k_i·h·e + (h/T_t)·(u − v)``

    ``kp`` (output per unit error), ``ki`` (per unit error per second), ``kd``
    (per unit error rate). ``derivative_filter`` T_f (s); 0 differences without
    filtering, a common choice is T_d/N = kd/kp/N with N 5–20 [common practice].
    ``output_limits`` (low, high) or None for none. ``tracking_time`` T_t (s):
    None picks √(T_i·T_d) with T_i = kp/ki, T_d = kd/kp (or T_i without D, or one
    step for pure integral control, which holds the integrator at the limit);
    ``math.inf`` turns anti-windup off. Loops where more measurement needs more
    output (tilt in a balancing loop) use negative gains.
    """

    __slots__ = ("kp", "ki", "kd", "derivative_filter", "low", "high", "tracking_time",
                 "proportional", "integral", "derivative", "output", "_last_measurement")

    def __init__(
        self,
        kp: float,
        ki: float = 0.0,
        kd: float = 0.0,
        *,
        derivative_filter: float = 0.0,
        output_limits: tuple[float, float] | None = (-1.0, 1.0),
        tracking_time: float | None = None,
    ):
        for label, value in (("kp", kp), ("ki", ki), ("kd", kd)):
            if not math.isfinite(value):
                raise ValueError(f"Pid: {label} must be a finite number, got {value!r}")
        if not (derivative_filter >= 0 and math.isfinite(derivative_filter)):
            raise ValueError(f"Pid: derivative_filter must be >= 0 s, got {derivative_filter!r}")
        low, high = (-math.inf, math.inf) if output_limits is None else map(float, output_limits)
        if not low < high:
            raise ValueError(f"Pid: output_limits must be (low, high) with low < high, "
                             f"got {output_limits!r}")
        if tracking_time is not None and not tracking_time > 0:
            raise ValueError(f"Pid: tracking_time must be > 0 s, got {tracking_time!r}")
        self.kp, self.ki, self.kd = float(kp), float(ki), float(kd)
        self.derivative_filter = float(derivative_filter)
        self.low, self.high = low, high
        self.tracking_time = (float(tracking_time) if tracking_time is not None
                              else _default_tracking_time(self.kp, self.ki, self.kd))
        self.reset()

    def reset(self) -> None:
        """Forget the integral, the derivative state and the last measurement."""
        self.proportional = 0.0
        self.integral = 0.0
        self.derivative = 0.0
        self.output = 0.0
        self._last_measurement: float | None = None

    def update(
        self, setpoint: float, measurement: float, dt: float, measured_rate: float | None = None
    ) -> float:
        """One step of length ``dt`` (s): the (saturated) output.

        ``measured_rate`` (the measurement's time derivative, e.g. a gyro rate)
        replaces differencing: ``y_k − y_{k−1}`` becomes ``measured_rate·dt``.
        The first call has no previous measurement and takes its difference as 0.
        """
        if not dt > 0.0:
            raise ValueError(f"Pid.update: dt must be > 0 s, got {dt!r}")
        error = setpoint - measurement
        if measured_rate is not None:
            change = measured_rate * dt
        elif self._last_measurement is None:
            change = 0.0
        else:
            change = measurement - self._last_measurement
        self._last_measurement = measurement
        t_f = self.derivative_filter
        derivative = (t_f * self.derivative - self.kd * change) / (t_f + dt)
        proportional = self.kp * error
        unsaturated = proportional + self.integral + derivative
        output = unsaturated
        if output > self.high:
            output = self.high
        elif output < self.low:
            output = self.low
        tracking = self.tracking_time or dt  # 0.0 stands for "one step" (pure integral)
        self.integral += self.ki * dt * error + (dt / tracking) * (output - unsaturated)
        self.proportional = proportional
        self.derivative = derivative
        self.output = output
        return output


def _default_tracking_time(kp: float, ki: float, kd: float) -> float:
    """Åström & Murray's rule of thumb T_t = √(T_i·T_d); T_i without D; 0 = one step."""
    if ki == 0.0 or kp == 0.0:
        return 0.0
    integral_time = abs(kp / ki)
    if kd == 0.0:
        return integral_time
    return math.sqrt(integral_time * abs(kd / kp))


class ComplementaryTilt:
    """Tilt (rad) from gyro rate and accelerometer tilt, complementary filter.

    ``θ_n = α·(θ_{n−1} + ω_n·dt) + (1 − α)·θ_acc,n`` with ``α = τ/(τ + dt)``:
    low-pass 1/(τs+1) on the accelerometer tilt, high-pass on the integrated
    gyro. ``time_constant`` τ (s). The first update starts from the
    accelerometer tilt. A constant gyro bias b leaves a steady error τ·b.
    """

    __slots__ = ("time_constant", "angle", "started")

    def __init__(self, time_constant: float):
        if not (time_constant > 0 and math.isfinite(time_constant)):
            raise ValueError(f"ComplementaryTilt: time_constant must be > 0 s, "
                             f"got {time_constant!r}")
        self.time_constant = float(time_constant)
        self.reset()

    def reset(self) -> None:
        self.angle = 0.0
        self.started = False

    def alpha(self, dt: float) -> float:
        """Weight of the gyro path for a step ``dt`` (s): τ/(τ + dt)."""
        return self.time_constant / (self.time_constant + dt)

    def update(self, gyro_rate: float, accel_tilt: float | None, dt: float) -> float:
        """New tilt estimate (rad) from pitch rate (rad/s) and accelerometer tilt (rad).

        ``accel_tilt`` None means no usable accelerometer reading this tick (see
        :func:`accel_tilt`): the gyro alone carries the estimate (from 0 if it is
        the very first update).
        """
        if not dt > 0.0:
            raise ValueError(f"ComplementaryTilt.update: dt must be > 0 s, got {dt!r}")
        if accel_tilt is None:
            self.started = True
            self.angle += gyro_rate * dt
            return self.angle
        if not self.started:
            self.started = True
            self.angle = float(accel_tilt)
            return self.angle
        alpha = self.time_constant / (self.time_constant + dt)
        self.angle = alpha * (self.angle + gyro_rate * dt) + (1.0 - alpha) * accel_tilt
        return self.angle

    def update_from_reading(self, r: Reading) -> float:
        """Update from a :class:`Reading`: gyro y, and tilt atan2(−accel_x, accel_z)."""
        return self.update(r.gyro[1], math.atan2(-r.accel[0], r.accel[2]), r.dt)


GRAVITY = 9.80665  # m/s², standard gravity


def accel_tilt(r: Reading, forward_acceleration: float = 0.0,
               tolerance: float = 0.1) -> float | None:
    """Tilt (rad) from the accelerometer, atan2(−a_x, a_z), or None when it cannot be trusted.

    ``forward_acceleration`` (m/s², e.g. from :class:`WheelOdometry`) is the
    robot's own acceleration, which the accelerometer feels as much as gravity:
    it is taken out of a_x first. While the specific force is more than
    ``tolerance`` g away from 1 g (a shove, a bump) the result is None, so a
    filter can trust its gyro alone until the body settles.
    """
    ax = r.accel[0] - forward_acceleration
    ay, az = r.accel[1], r.accel[2]
    if abs(math.sqrt(ax * ax + ay * ay + az * az) - GRAVITY) > tolerance * GRAVITY:
        return None
    return math.atan2(-ax, az)


class WheelOdometry:
    """Distance (m), speed (m/s) and acceleration (m/s²) along the floor from the encoders.

    The encoders count the wheels' turn relative to the body; adding the body's
    tilt gives the wheels' turn on the floor, times the radius the distance.
    Speed and acceleration are differences through a first-order low-pass of
    time constant ``speed_filter`` (s).
    """

    __slots__ = ("radius", "counts_per_rev", "speed_filter", "distance", "speed",
                 "acceleration", "_started")

    def __init__(self, robot: RobotFacts, speed_filter: float = 0.05):
        self.radius = robot.wheel_radius
        self.counts_per_rev = robot.counts_per_wheel_rev
        self.speed_filter = float(speed_filter)
        self.reset()

    def reset(self) -> None:
        self.distance = 0.0
        self.speed = 0.0
        self.acceleration = 0.0
        self._started = False

    def update(self, ticks: tuple[int, int], tilt: float, dt: float) -> float:
        """New distance (m) from both encoder counts, the tilt (rad) and the tick (s)."""
        wheel = math.pi * (ticks[0] + ticks[1]) / self.counts_per_rev  # mean turn, rad
        distance = self.radius * (wheel + tilt)
        if self._started:
            blend = dt / (self.speed_filter + dt)
            previous = self.speed
            self.speed += blend * ((distance - self.distance) / dt - self.speed)
            self.acceleration += blend * ((self.speed - previous) / dt - self.acceleration)
        self._started = True
        self.distance = distance
        return distance


def pendulum_gains(robot: RobotFacts, speed_up: float = 2.5,
                   damping: float = 0.7) -> tuple[float, float]:
    """Starting (kp duty/rad, kd duty/(rad/s)) for a PD tilt loop, from the robot's facts.

    Tilt loop alone (wheels held): I·θ̈ = m g l θ − T (kp θ + kd θ̇), T the stall
    torque of both wheels, I the body's pitch inertia about the axle; gains that
    give natural frequency ``speed_up`` × √(m g l / I) with damping ratio
    ``damping`` (second-order pole placement).
    """
    lean = robot.body_mass * GRAVITY * robot.com_height  # N·m per rad
    omega = speed_up * math.sqrt(lean / robot.pitch_inertia)
    torque = 2.0 * robot.stall_torque
    kp = (lean + robot.pitch_inertia * omega**2) / torque
    kd = 2.0 * damping * omega * robot.pitch_inertia / torque
    return kp, kd


class KalmanTilt:
    """Tilt (rad) and gyro bias (rad/s) by a two-state discrete Kalman filter.

    Model: ``angle' = gyro_rate − bias − n_g``, ``bias' = n_b``; measurement:
    accelerometer tilt with white error of standard deviation ``angle_noise``.
    Noise parameters, SI:

    - ``angle_noise`` (rad): standard deviation of one accelerometer tilt sample.
      The robot's own accelerations disturb it, so values well above the pure
      sensor noise work better [common practice].
    - ``rate_noise`` (rad/s/√Hz = rad/√s): gyro white-noise density (angle random
      walk), as in IEEE Std 952; adds ``rate_noise²·dt`` to the angle variance.
    - ``bias_noise`` (rad/s/√s): gyro bias random-walk density; adds ``bias_noise²·dt``
      to the bias variance. 0 treats the bias as constant.
    - ``initial_bias_std`` (rad/s): spread of the turn-on bias; default 5 °/s, the
      top of the consumer MEMS range [common practice].

    Process noise is the exact discretisation of the continuous model (Van Loan).
    The first update starts the angle from the accelerometer with variance
    ``angle_noise²``. ``angle``, ``bias``, ``rate`` (bias-corrected), ``gain`` (K),
    ``covariance`` (posterior P) and ``prior_covariance`` are readable.
    """

    __slots__ = ("angle_noise", "rate_noise", "bias_noise", "initial_bias", "initial_bias_std",
                 "angle", "bias", "rate", "started", "_p", "_prior", "_gain")

    def __init__(
        self,
        angle_noise: float,
        rate_noise: float,
        bias_noise: float,
        *,
        initial_bias: float = 0.0,
        initial_bias_std: float = math.radians(5.0),
    ):
        if not (angle_noise > 0 and math.isfinite(angle_noise)):
            raise ValueError(f"KalmanTilt: angle_noise must be > 0 rad, got {angle_noise!r}")
        for label, value in (("rate_noise", rate_noise), ("bias_noise", bias_noise),
                             ("initial_bias_std", initial_bias_std)):
            if not (value >= 0 and math.isfinite(value)):
                raise ValueError(f"KalmanTilt: {label} must be >= 0, got {value!r}")
        self.angle_noise = float(angle_noise)
        self.rate_noise = float(rate_noise)
        self.bias_noise = float(bias_noise)
        self.initial_bias = float(initial_bias)
        self.initial_bias_std = float(initial_bias_std)
        self.reset()

    def reset(self) -> None:
        self.angle = 0.0
        self.bias = self.initial_bias
        self.rate = 0.0
        self.started = False
        # symmetric 2×2 matrices kept as (p_aa, p_ab, p_bb) for speed
        self._p = (self.angle_noise**2, 0.0, self.initial_bias_std**2)
        self._prior = self._p
        self._gain = (1.0, 0.0)

    def matrices(self, dt: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """The filter's model for a step ``dt`` (s): (F, H, Q, R)."""
        q_aa, q_ab, q_bb = self._process_noise(dt)
        return (
            np.array([[1.0, -dt], [0.0, 1.0]]),
            np.array([[1.0, 0.0]]),
            np.array([[q_aa, q_ab], [q_ab, q_bb]]),
            np.array([[self.angle_noise**2]]),
        )

    def _process_noise(self, dt: float) -> tuple[float, float, float]:
        walk = self.bias_noise * self.bias_noise
        return (self.rate_noise * self.rate_noise * dt + walk * dt**3 / 3.0,
                -walk * dt * dt / 2.0,
                walk * dt)

    def predict(self, gyro_rate: float, dt: float) -> float:
        """Propagate with the pitch rate (rad/s) over ``dt`` (s); returns the angle (rad)."""
        if not dt > 0.0:
            raise ValueError(f"KalmanTilt: dt must be > 0 s, got {dt!r}")
        self.rate = gyro_rate - self.bias
        self.angle += self.rate * dt
        p_aa, p_ab, p_bb = self._p
        q_aa, q_ab, q_bb = self._process_noise(dt)
        # F P Fᵀ + Q with F = [[1, −dt], [0, 1]]
        self._p = self._prior = (
            p_aa - 2.0 * dt * p_ab + dt * dt * p_bb + q_aa,
            p_ab - dt * p_bb + q_ab,
            p_bb + q_bb,
        )
        return self.angle

    def correct(self, accel_tilt: float) -> float:
        """Update with an accelerometer tilt (rad); returns the angle (rad)."""
        p_aa, p_ab, p_bb = self._p
        innovation_var = p_aa + self.angle_noise * self.angle_noise
        k_angle = p_aa / innovation_var
        k_bias = p_ab / innovation_var
        residual = accel_tilt - self.angle
        self.angle += k_angle * residual
        self.bias += k_bias * residual
        self.rate -= k_bias * residual
        self._p = ((1.0 - k_angle) * p_aa, (1.0 - k_angle) * p_ab, p_bb - k_bias * p_ab)
        self._gain = (k_angle, k_bias)
        return self.angle

    def update(self, gyro_rate: float, accel_tilt: float, dt: float) -> float:
        """Predict with the pitch rate (rad/s), correct with the accelerometer tilt (rad)."""
        if not self.started:
            if not dt > 0.0:
                raise ValueError(f"KalmanTilt: dt must be > 0 s, got {dt!r}")
            self.started = True
            self.angle = float(accel_tilt)
            self.rate = gyro_rate - self.bias
            return self.angle
        self.predict(gyro_rate, dt)
        return self.correct(accel_tilt)

    def update_from_reading(self, r: Reading) -> float:
        """Update from a :class:`Reading`: gyro y, and tilt atan2(−accel_x, accel_z)."""
        return self.update(r.gyro[1], math.atan2(-r.accel[0], r.accel[2]), r.dt)

    @property
    def covariance(self) -> np.ndarray:
        """Posterior covariance P of (angle rad, bias rad/s)."""
        return _symmetric(self._p)

    @property
    def prior_covariance(self) -> np.ndarray:
        """Covariance after the last prediction, before its correction."""
        return _symmetric(self._prior)

    @property
    def gain(self) -> np.ndarray:
        """Kalman gain K of the last correction: (angle, bias) per rad of residual."""
        return np.array(self._gain)


def _symmetric(p: tuple[float, float, float]) -> np.ndarray:
    return np.array([[p[0], p[1]], [p[1], p[2]]])
