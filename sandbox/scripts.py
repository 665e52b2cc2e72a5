"""Loading a controller script and building its controller.

:func:`load_controller_class` imports a script afresh and finds its class,
:func:`controller_rate` reads its rate, :func:`make_controller` builds it with a
:class:`TrackedConfig` that records which config keys it read (:func:`unread_keys`),
and :func:`failure_error` / :func:`failure_text` word what a script raised, with
:func:`script_location` naming the line. Scripts and callers import these from
:mod:`sandbox.control`.
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
import weakref
from pathlib import Path
from typing import Any

from .contract import ControllerError, ControllerLoadError, RobotFacts

__all__ = [
    "DEFAULT_CLASS_NAME",
    "DEFAULT_RATE_HZ",
    "TrackedConfig",
    "controller_rate",
    "failure_error",
    "failure_text",
    "load_controller_class",
    "make_controller",
    "script_location",
    "tracked_config",
    "unread_key_text",
    "unread_keys",
]

DEFAULT_CLASS_NAME = "Controller"
DEFAULT_RATE_HZ = 200.0


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
        raise ControllerLoadError(f"{path}: no such controller file (check the path: a Python "
                                 "file with a class Controller, as in controllers/)")
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
