"""The demo robots with their imperfections taken out: ideal parts, as the files were
before they listed play, static friction, per-side figures, IMU filters, mounting and
scale errors, loop jitter and compute time. Tests that check physics against a
reference use these, so the reference is not blurred by the demo robots' honest parts."""

from __future__ import annotations

import copy
from pathlib import Path
from typing import Any

import yaml

from sandbox.robot import RobotSpec, robot_from_dict
from sandbox.yamlfile import read_yaml_file

ROBOTS = Path(__file__).resolve().parents[1] / "robots"

# section path -> keys that make a part imperfect (absent: the ideal part)
IMPERFECT_KEYS = {
    ("motors",): ("backlash", "static_friction_torque", "left", "right"),
    ("wheels",): ("left", "right"),
    ("imu",): ("rotation", "filter_order"),
    ("imu", "gyro"): ("bandwidth", "scale_error"),
    ("imu", "accel"): ("bandwidth", "scale_error"),
    ("board",): ("loop_jitter", "compute_time"),
}


def ideal_data(name: str) -> dict[str, Any]:
    """The demo robot ``name``'s file as plain data, imperfections removed."""
    path = ROBOTS / f"{name}.yaml"
    data = copy.deepcopy(read_yaml_file(path, str(path)))
    for where, keys in IMPERFECT_KEYS.items():
        section = data
        for part in where:
            section = section.get(part) if isinstance(section, dict) else None
        if isinstance(section, dict):
            for key in keys:
                section.pop(key, None)
    if not data.get("board"):
        data.pop("board", None)
    return data


def ideal_robot(name: str, overrides: dict[str, Any] | None = None) -> RobotSpec:
    """The demo robot ``name`` with ideal parts (and ``overrides`` applied)."""
    return robot_from_dict(ideal_data(name), f"{name} (ideal parts)", overrides)


def ideal_robot_file(name: str, folder: Path) -> Path:
    """A robot file of the demo robot ``name`` with ideal parts, for the command line."""
    path = Path(folder) / f"{name}.yaml"
    path.write_text(yaml.safe_dump(ideal_data(name), sort_keys=False), encoding="utf-8")
    return path
