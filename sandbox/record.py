"""The run folder: streamed trace CSV, summary JSON, resolved run.yaml.

Rows are buffered and written in blocks of one simulated second or so, and
flushed on every exit path, so an exception or Ctrl-C keeps what was recorded.
"""

from __future__ import annotations

import csv
import json
import math
import re
import time
from pathlib import Path
from typing import Any

import numpy as np
import yaml

TRUE_COLUMNS = (
    "t_s", "x_m", "pitch_rad", "pitch_rate_rad_s", "yaw_rad", "speed_m_s",
    "duty_l", "duty_r", "current_l_a", "current_r_a", "battery_v",
    "gyro_x_rad_s", "gyro_y_rad_s", "gyro_z_rad_s",
    "accel_x_m_s2", "accel_y_m_s2", "accel_z_m_s2", "ticks_l", "ticks_r",
)
# The body's pose as the engine holds it (centre of mass + quaternion) and the
# wheel angles relative to the body: enough to replay the run for a video.
POSE_COLUMNS = (
    "pose_x_m", "pose_y_m", "pose_z_m", "pose_qx", "pose_qy", "pose_qz", "pose_qw",
    "wheel_l_rad", "wheel_r_rad",
)
COLUMNS = TRUE_COLUMNS + POSE_COLUMNS
_INT_COLUMNS = {"ticks_l", "ticks_r"}
LOG_PREFIX = "log."


def default_run_dir(root: Path, robot: str, controller: str, test: str) -> Path:
    """``runs/<robot>-<controller>-<test>-<time>/``, made unique with a counter."""
    stamp = time.strftime("%Y%m%d-%H%M%S")
    base = "-".join(_slug(s) for s in (robot, controller, test)) + f"-{stamp}"
    path = root / base
    n = 1
    while path.exists():
        n += 1
        path = root / f"{base}-{n}"
    return path


def _slug(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_.]+", "-", text).strip("-") or "x"


class TraceWriter:
    """Streams trace rows to ``trace.csv``; keeps the numeric columns for metrics.

    Controller channels (``log.<name>``) are fixed by the names seen in the first
    block of rows; a name first logged later is counted in ``dropped_channels``.
    """

    def __init__(self, path: Path | None, block_rows: int = 200):
        self.path = path
        self.block_rows = block_rows
        self._handle = None if path is None else open(path, "w", newline="",  # noqa: SIM115
                                                      encoding="utf-8")
        self._rows: list[tuple] = []
        self._logs: list[dict[str, float]] = []
        self._log_names: list[str] | None = None
        self._format = ""
        self._format_all = ""
        self.dropped_channels: set[str] = set()
        self._blocks: list[np.ndarray] = []  # flushed rows, one array per block
        self._log_blocks: list[np.ndarray] = []

    def add(self, row: tuple, logs: dict[str, float]) -> None:
        """One row: values in COLUMNS order, then the controller's logged channels."""
        self._rows.append(row)
        self._logs.append(logs)
        if len(self._rows) >= self.block_rows:
            self.flush()

    def flush(self) -> None:
        """Write the buffered rows (and keep them, as arrays, for the figures)."""
        if self._log_names is None:
            names: list[str] = []
            for logs in self._logs:
                names.extend(k for k in logs if k not in names)
            self._start(names)
        if not self._rows:
            return
        names = self._log_names or []
        count = len(names)
        name_set = set(names)
        log_values = []
        lines = []
        for row, logs in zip(self._rows, self._logs):
            if logs.keys() == name_set:  # every channel, and no new one: the usual row
                values = tuple(logs[n] for n in names)
                if self._handle is not None:
                    lines.append(self._format_all % (row + values))
            else:  # a channel missing this tick (empty cell) or new after the first block
                self.dropped_channels.update(k for k in logs if k not in names)
                values = tuple(logs.get(n, math.nan) for n in names)
                if self._handle is not None:
                    cells = "".join("," + _cell(logs.get(n)) for n in names)
                    lines.append(self._format % row + cells)
            log_values.append(values)
        if self._handle is not None:
            self._handle.write("\n".join(lines) + "\n")
            self._handle.flush()
        self._blocks.append(np.array(self._rows, dtype=float).reshape(-1, len(COLUMNS)))
        self._log_blocks.append(np.array(log_values, dtype=float).reshape(len(log_values), count))
        self._rows.clear()
        self._logs.clear()

    def _start(self, names: list[str]) -> None:
        self._log_names = names
        self._format = ",".join("%d" if c in _INT_COLUMNS else "%.9g" for c in COLUMNS)
        self._format_all = self._format + ",%.9g" * len(names)
        if self._handle is not None:
            header = list(COLUMNS) + [LOG_PREFIX + n for n in names]
            csv.writer(self._handle, lineterminator="\n").writerow(header)

    def close(self) -> None:
        self.flush()
        if self._handle is not None and not self._handle.closed:
            self._handle.close()

    def arrays(self) -> dict[str, np.ndarray]:
        """The recorded columns (flushed rows) as numpy arrays, logs as ``log.<name>``."""
        names = self._log_names or []
        rows = (np.concatenate(self._blocks) if self._blocks
                else np.zeros((0, len(COLUMNS))))
        logs = (np.concatenate(self._log_blocks) if self._log_blocks
                else np.zeros((0, len(names))))
        out = {name: rows[:, i].copy() for i, name in enumerate(COLUMNS)}
        for i, name in enumerate(names):
            out[LOG_PREFIX + name] = logs[:, i].copy()
        return out


def _cell(value: float | None) -> str:
    return "" if value is None else "%.9g" % value


def read_trace(path: Path) -> dict[str, np.ndarray]:
    """A trace CSV back into named float arrays (empty cells become NaN)."""
    with open(path, newline="", encoding="utf-8") as handle:
        reader = csv.reader(handle)
        header = next(reader)
        rows = [[float(v) if v else math.nan for v in row] for row in reader if row]
    data = np.array(rows, dtype=float).reshape(len(rows), len(header))
    return {name: data[:, i] for i, name in enumerate(header)}


def write_json(path: Path, data: dict[str, Any]) -> None:
    path.write_text(json.dumps(_plain(data), indent=2, allow_nan=False) + "\n", encoding="utf-8")


def write_yaml(path: Path, data: dict[str, Any]) -> None:
    path.write_text(yaml.safe_dump(_plain(data), sort_keys=False), encoding="utf-8")


def _plain(value: Any) -> Any:
    """JSON-safe plain types: numpy to Python, NaN/inf to None."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return _plain(value.tolist())
    if isinstance(value, (np.floating, float)):
        number = float(value)
        return number if math.isfinite(number) else None
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, Path):
        return str(value)
    return value
