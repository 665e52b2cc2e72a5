"""The work a sweep sends to a worker, and what comes back.

A worker gets the parts every run shares once (:class:`RunCommon`: the robot
description, the controller script's text, test files, the base settings) and
then one small :class:`PointJob` per run. The physics engine is created inside
:func:`run_point`, in whichever process runs it, and kept there for the
worker's next runs of the same robot shape (:mod:`sandbox.sweep.worlds`).
Scripts travel as text so a cluster without a shared filesystem runs the same
code: a worker uses the file at the original path when its contents match,
else a copy in its temp folder.
"""

from __future__ import annotations

import hashlib
import math
import os
import re
import tempfile
import time
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np

from ..runner import STATUS_COMPLETED, RunSettings

# Figures of a run that go into results.csv, in this order.
FIGURES = ("fell_at_s", "max_abs_pitch_deg", "rms_pitch_deg", "drift_m", "max_drift_m",
           "saturation_fraction", "mean_abs_duty", "duration_s")


@dataclass(frozen=True)
class ShippedFile:
    """A script or test file as text, with its original absolute path and SHA-256."""

    path: str
    sha256: str
    data: bytes

    @classmethod
    def read(cls, path: str | Path) -> ShippedFile:
        resolved = Path(path).resolve()
        data = resolved.read_bytes()
        return cls(str(resolved), hashlib.sha256(data).hexdigest(), data)

    def local_path(self) -> Path:
        """A path on this machine holding exactly this file's contents."""
        return _local_copy(self.path, self.sha256, self.data)


_LOCAL: dict[tuple[str, str], Path] = {}


def _local_copy(path: str, sha256: str, data: bytes) -> Path:
    known = _LOCAL.get((path, sha256))
    if known is not None and known.is_file():
        return known
    original = Path(path)
    try:
        if original.is_file() and hashlib.sha256(original.read_bytes()).hexdigest() == sha256:
            _LOCAL[(path, sha256)] = original
            return original
    except OSError:
        pass
    folder = Path(tempfile.gettempdir()) / "upright-shipped" / sha256[:16]
    target = folder / original.name
    if not target.is_file():
        folder.mkdir(parents=True, exist_ok=True)
        scratch = folder / f".{original.name}.{os.getpid()}.tmp"
        scratch.write_bytes(data)
        os.replace(scratch, target)  # atomic: another worker may be writing the same file
    _LOCAL[(path, sha256)] = target
    return target


@dataclass(frozen=True)
class RunCommon:
    """What every run of a sweep or tuning shares (sent to each worker once)."""

    robot: dict[str, Any]  # SI description (RobotSpec.to_si_dict()), fixed overrides applied
    robot_source: str  # names the robot in error messages
    settings: RunSettings  # base settings; a point replaces config entries and the seed
    controller: ShippedFile
    class_name: str | None  # None: the script's class "Controller"
    test_files: dict[str, ShippedFile] = field(default_factory=dict)  # test -> its file
    duration_given: bool = False  # settings.duration overrides the tests' own


@dataclass(frozen=True)
class PointJob:
    """One run: a number, robot and config values to set, the run seed and the test."""

    index: int
    robot_values: dict[str, float]
    config_values: dict[str, float]
    seed: int
    test: str | None = None  # a built-in name, or a key of RunCommon.test_files
    stress: tuple[str, float] | None = None  # (name, amount) for `upright margins`


def controller_spec(common: RunCommon) -> str:
    local = str(common.controller.local_path())
    return f"{local}:{common.class_name}" if common.class_name else local


def run_point(common: RunCommon, job: PointJob, reuse_worlds: bool = True) -> dict[str, Any]:
    """Run one point (in a worker) and return its row: status, figures, checks, cost terms.

    ``reuse_worlds``: take the world from this process's keeper (a settled world of
    the same shape restored, else a new one kept for later runs); False builds a
    fresh world and closes it after the run. The rows are the same either way.
    """
    from ..robot import robot_from_dict
    from ..session import run_once
    from .worlds import worker_keeper

    robot, settings = common.robot, common.settings
    if job.stress is not None:
        from ..margins import apply_stress

        robot, settings = apply_stress(robot, settings, job.stress)
    spec = robot_from_dict(robot, common.robot_source, job.robot_values or None)
    settings = replace(settings, controller=controller_spec(common),
                       config={**settings.config, **job.config_values}, seed=job.seed)
    test = job.test
    if test is not None and test in common.test_files:
        test = str(common.test_files[test].local_path())
    plan = None
    if test is not None:
        from ..events import resolve_test

        plan = resolve_test(test, spec)
    started = time.perf_counter()
    result = run_once(spec, settings, test=test, duration_given=common.duration_given,
                      write=False, world_factory=worker_keeper() if reuse_worlds else None)
    wall = time.perf_counter() - started
    planned = settings.duration if plan is None or common.duration_given else plan.duration
    return outcome_row(job, result.status, result.message, result.summary, result.trace,
                       planned, plan, wall)


def run_points(common: RunCommon, jobs: list[PointJob]) -> list[dict[str, Any]]:
    """Several points in a row (one cluster task), their rows in the same order."""
    return [run_point(common, job) for job in jobs]


def outcome_row(job: PointJob, status: str, message: str, summary: dict[str, Any],
                trace: dict[str, np.ndarray], planned: float, plan: Any,
                wall: float) -> dict[str, Any]:
    """The plain-data row of one finished run (JSON-ready; floats kept exact)."""
    test = summary.get("test_result")
    row: dict[str, Any] = {
        "index": job.index,
        "seed": job.seed,
        "test": job.test,
        "status": status,
        "passed": bool(test["passed"]) if test else status == STATUS_COMPLETED,
        **{name: _plain(summary.get(name)) for name in FIGURES},
        "checks": [check_entry(c) for c in test["checks"]] if test else [],
        "planned_s": float(planned),
        "message": message if status != STATUS_COMPLETED else "",
        "wall_s": wall,
    }
    row.update(cost_terms(trace, plan))
    return row


STATUS_WORKER_LOST = "worker_lost"


def lost_row(job: PointJob, message: str) -> dict[str, Any]:
    """The row of a point whose worker process died under it twice: failed, no figures."""
    return outcome_row(job, STATUS_WORKER_LOST, message, {}, {}, 0.0, None, 0.0)


def _plain(value: Any) -> Any:
    if isinstance(value, (np.floating, np.integer)):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def check_entry(check: dict[str, Any]) -> dict[str, Any]:
    """A test check as stored for results: ``check.<label>_<unit>``, value, passed, and
    the label's slug and the limit's unit (for results.csv's columns and unit row)."""
    return {"column": check_column(check), "value": _plain(check.get("value")),
            "passed": bool(check["passed"]), "name": check_slug(check),
            "unit": check_unit(check)}


def check_slug(check: dict[str, Any]) -> str:
    """``"position held"`` -> ``"position_held"``."""
    return re.sub(r"[^a-z0-9]+", "_", str(check["label"]).lower()).strip("_")


def check_unit(check: dict[str, Any]) -> str:
    """The unit of a check's limit (``"1.02 m"`` -> ``"m"``); empty for a bare number."""
    number, _, unit = str(check.get("limit", "")).partition(" ")
    try:
        float(number)
    except ValueError:
        return ""
    return unit.strip()


def check_column(check: dict[str, Any]) -> str:
    unit = re.sub(r"[^A-Za-z0-9]+", "_", check_unit(check)).strip("_")
    return f"check.{check_slug(check)}" + (f"_{unit}" if unit else "")


def check_name(entry: dict[str, Any]) -> str:
    """A stored check entry's name in words (``position held``), also for rows stored
    before entries carried their name."""
    name = entry.get("name") or str(entry.get("column", "check")).removeprefix("check.")
    return name.replace("_", " ")


def cost_terms(trace: dict[str, np.ndarray], plan: Any) -> dict[str, float | None]:
    """Figures tuning weighs, from the trace.

    mean_abs_pitch_deg: time average of |tilt| (the ticks are evenly spaced, so the
    mean is the integral over the run divided by its length); tracking_rms_m: RMS
    distance from where the test's speed setpoints put the robot (the start, when
    there are none); mean_sq_duty: mean of the squared duties of both wheels.
    """
    pitch = trace.get("pitch_rad", np.zeros(0))
    if pitch.size == 0:
        return {"mean_abs_pitch_deg": None, "tracking_rms_m": None, "mean_sq_duty": None}
    t = trace["t_s"]
    x = trace["x_m"] - trace["x_m"][0]
    target = expected_distance(t, setpoint_schedule(plan))
    duty_sq = 0.5 * (trace["duty_l"] ** 2 + trace["duty_r"] ** 2)
    return {
        "mean_abs_pitch_deg": float(np.degrees(np.mean(np.abs(pitch)))),
        "tracking_rms_m": float(np.sqrt(np.mean((x - target) ** 2))),
        "mean_sq_duty": float(np.mean(duty_sq)),
    }


def setpoint_schedule(plan: Any) -> list[tuple[float, float]]:
    """(time s, speed m/s) of a test's timed speed setpoints, in time order."""
    if plan is None:
        return []
    return sorted((float(e.at), float(e.setpoint.speed)) for e in plan.events
                  if e.setpoint is not None and e.at is not None)


def expected_distance(t: np.ndarray, schedule: list[tuple[float, float]]) -> np.ndarray:
    """Distance (m) a robot following the speed schedule exactly has covered at ``t``."""
    speed = np.zeros_like(t)
    for when, value in schedule:
        speed[t >= when - 1e-9] = value
    return np.concatenate(([0.0], np.cumsum(speed[:-1] * np.diff(t)))) if t.size else t
