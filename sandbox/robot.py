"""The robot description file: load, validate, and explain each problem in one line.

Values are SI floats once loaded. Positions are ``[x, y, z]`` in the body frame
(x forward, y left, z up) measured from the centre of the axle. The schema is
:mod:`sandbox.robotschema`, the derived figures :mod:`sandbox.figures`; their names are
re-exported here, where callers import them from.
"""

from __future__ import annotations

import difflib
import re
from pathlib import Path
from typing import Any

from pydantic import BaseModel, ValidationError

from .figures import (
    FRAME_COLOUR,
    PALETTE,
    WHEEL_COLOUR,
    Box,
    Figures,
    SideFigures,
    derive,
    figures_json,
    filter_group_delay,
    frame_box,
    measured_body,
    side_figures,
)
from .robotschema import (
    MAX_NAME,
    Accel,
    AccelDensity,
    Acceleration,
    AccelWalk,
    Angle,
    AngularSpeed,
    Battery,
    Board,
    Body,
    Charge,
    Current,
    Driver,
    Encoders,
    Fraction,
    Frame,
    Frequency,
    GearRatio,
    Gyro,
    GyroDensity,
    GyroWalk,
    Imu,
    Inertia,
    Length,
    Mass,
    Measured,
    Motors,
    MotorSide,
    Part,
    Position,
    PositiveSize,
    Resistance,
    RobotSpec,
    Section,
    Time,
    Torque,
    Voltage,
    Wheels,
    WheelSide,
    _si,
)
from .units import to_si
from .yamlfile import YamlFileError, parse_yaml_text, read_yaml_file

__all__ = [
    # loading and errors (this module)
    "RobotFileError", "apply_overrides", "describe_error", "key_kind", "load_robot",
    "nearest_key", "parse_yaml", "robot_from_dict", "value_to_si",
    # the schema (sandbox.robotschema)
    "MAX_NAME", "Accel", "AccelDensity", "AccelWalk", "Acceleration", "Angle", "AngularSpeed",
    "Battery", "Board", "Body", "Charge", "Current", "Driver", "Encoders", "Fraction", "Frame",
    "Frequency", "GearRatio", "Gyro", "GyroDensity", "GyroWalk", "Imu", "Inertia", "Length",
    "Mass", "Measured", "MotorSide", "Motors", "Part", "Position", "PositiveSize", "Resistance",
    "RobotSpec", "Section", "Time", "Torque", "Voltage", "WheelSide", "Wheels",
    "_si",  # the unit validator, used by sandbox.events for its own keys
    # derived figures (sandbox.figures)
    "FRAME_COLOUR", "PALETTE", "WHEEL_COLOUR", "Box", "Figures", "SideFigures", "derive",
    "figures_json", "filter_group_delay", "frame_box", "measured_body", "side_figures",
]


class RobotFileError(ValueError):
    """A robot description with one or more problems, one line each."""

    def __init__(self, source: str, problems: list[str]):
        self.source = source
        self.problems = problems
        super().__init__("\n".join(f"{source}: {p}" for p in problems))


def load_robot(path: str | Path, overrides: dict[str, Any] | None = None) -> RobotSpec:
    """Read, override and validate a robot file. Raises RobotFileError."""
    path = Path(path)
    source = str(path)
    if not path.is_file():
        raise RobotFileError(source, ["no such file (check the path from where you run "
                                      "upright; the README's tour shows a robot file)"])
    try:
        data = read_yaml_file(path, source)
    except YamlFileError as err:
        raise RobotFileError(source, err.problems) from None
    if isinstance(data, dict) and "name" not in data:
        # The file's stem, cut to the characters a name may hold ('my bot (v2)' -> 'my bot -v2-').
        stem = re.sub(r"[^A-Za-z0-9 _.-]+", "-", path.stem).strip()[:MAX_NAME].strip()
        data["name"] = stem or "robot"
    return robot_from_dict(data, source, overrides)


def parse_yaml(text: str, source: str) -> Any:
    """YAML text to Python data, within the bounds of :mod:`sandbox.yamlfile` (no aliases,
    no duplicate keys, bounded sizes); a problem names the line and the key."""
    try:
        return parse_yaml_text(text, source)
    except YamlFileError as err:
        raise RobotFileError(source, err.problems) from None


def robot_from_dict(
    data: Any, source: str = "<robot>", overrides: dict[str, Any] | None = None
) -> RobotSpec:
    """Validate plain data (as read from YAML) into a RobotSpec."""
    if not isinstance(data, dict):
        raise RobotFileError(source, ["the file must be a mapping of sections (name, body, ...)"])
    if overrides:
        data = apply_overrides(data, overrides, source)
    try:
        spec = RobotSpec.model_validate(data)
    except ValidationError as err:
        raise RobotFileError(source, [describe_error(e) for e in err.errors()]) from None
    from .plausibility import plausibility_errors

    problems = plausibility_errors(spec, data)
    if problems:
        raise RobotFileError(source, problems)
    spec.__dict__["_source_data"] = data  # the values as written, for the warnings
    return spec


def key_kind(dotted: str) -> str | None:
    """The unit kind ('length', 'mass', ...) of a dotted robot key such as
    ``body.parts.0.mass`` or ``imu.at.2``; None for a key without a unit or no such key."""
    annotation: Any = RobotSpec
    metadata: tuple = ()
    for part in dotted.split("."):
        args = [a for a in getattr(annotation, "__args__", ()) if a is not type(None)]
        if isinstance(annotation, type) and issubclass(annotation, BaseModel):
            field = annotation.model_fields.get(part)
            if field is None:
                return None
            annotation, metadata = field.annotation, tuple(field.metadata)
        elif args and part.isdigit():  # a list or tuple element
            annotation = args[min(int(part), len(args) - 1)]
            metadata = tuple(getattr(annotation, "__metadata__", ()))
        else:
            return None
        while not getattr(annotation, "__metadata__", None) and len(
                [a for a in getattr(annotation, "__args__", ()) if a is not type(None)]) == 1 \
                and getattr(annotation, "__origin__", None) not in (list, tuple):
            annotation = next(a for a in annotation.__args__ if a is not type(None))  # X | None
    for item in (*metadata, *getattr(annotation, "__metadata__", ())):
        kind = getattr(getattr(item, "func", None), "unit_kind", None)
        if kind:
            return kind
    return None


def value_to_si(key: str, value: object) -> float:
    """A number or unit string for a dotted key, as ``--set`` reads it: robot keys by their
    kind ('35 mm' for a length), controller ``config.`` keys in SI base units."""
    from .units import any_to_si

    if isinstance(value, str) and key.startswith("config."):
        return any_to_si(value)
    kind = None if key.startswith("config.") else key_kind(key)
    return to_si(value, kind) if kind else any_to_si(value)


def apply_overrides(data: dict, overrides: dict[str, Any], source: str) -> dict:
    """A copy of ``data`` with dotted keys set (``wheels.friction``, ``body.parts.0.mass``)."""
    import copy

    data = copy.deepcopy(data)
    problems = []
    for dotted, value in overrides.items():
        keys = dotted.split(".")
        if not all(keys):
            problems.append(f"{dotted!r}: a key has an empty part (write e.g. wheels.friction)")
            continue
        node: Any = data
        try:
            for key in keys[:-1]:
                node = node[int(key)] if isinstance(node, list) else node.setdefault(key, {})
            if isinstance(node, list):
                node[int(keys[-1])] = value
            elif isinstance(node, dict):
                node[keys[-1]] = value
            else:
                raise TypeError
        except (ValueError, IndexError, TypeError, AttributeError):
            problems.append(f"{dotted}: cannot set this key (no such place in the description)")
    if problems:
        raise RobotFileError(source, problems)
    return data


def describe_error(err: dict, root: type[BaseModel] | None = None) -> str:
    """One plain line for one pydantic error: the dotted key, the problem, the allowed range."""
    loc = err.get("loc", ())
    key = _dotted(loc)
    kind = err.get("type", "")
    if kind == "extra_forbidden":
        parent = loc[:-1]
        known = _fields_at(parent, root or RobotSpec)
        hint = nearest_key(str(loc[-1]), known)
        allowed = f"did you mean '{hint}'?" if hint else "allowed: " + ", ".join(known)
        return f"{key}: unknown key ({allowed})"
    if kind == "missing":
        return f"{key}: missing (required)"
    message = err.get("msg", "")
    if message.startswith("Value error, "):
        message = message[len("Value error, ") :]
    message = message[:1].lower() + message[1:]
    shown = err.get("input")
    if kind in {"greater_than", "greater_than_equal", "less_than", "less_than_equal"}:
        message = f"{message} (got {shown!r}, in SI units)"
    elif kind == "literal_error":
        message = f"{message} (got {shown!r})"
    if not key:
        return message
    return f"{key}: {message}"


def nearest_key(word: str, known: list[str]) -> str | None:
    """The known key closest to a mistyped one, or None; swapped letters count as close."""

    def score(candidate: str) -> float:
        ratio = difflib.SequenceMatcher(None, word.lower(), candidate.lower()).ratio()
        return ratio + (0.2 if sorted(word.lower()) == sorted(candidate.lower()) else 0.0)

    best = max(known, key=score, default=None)
    return best if best is not None and score(best) >= 0.6 else None


def _dotted(loc: tuple) -> str:
    out = ""
    for part in loc:
        if isinstance(part, int):
            out += f"[{part}]"
        else:
            out += ("." if out else "") + str(part)
    return out


def _fields_at(loc: tuple, root: type[BaseModel]) -> list[str]:
    """Field names of the section at ``loc`` (for 'did you mean')."""
    model: Any = root
    for part in loc:
        if isinstance(part, int):
            continue
        field = model.model_fields.get(part)
        if field is None:
            return []
        annotation = field.annotation
        inner = getattr(annotation, "__args__", None)
        if inner:  # list[Part]
            annotation = inner[0]
        if not (isinstance(annotation, type) and issubclass(annotation, BaseModel)):
            return []
        model = annotation
    return list(model.model_fields)
