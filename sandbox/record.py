"""The run folder: streamed trace CSV, summary JSON, resolved run.yaml.

Rows are buffered in blocks of half a simulated second or so and handed to a
trace-writing process (:mod:`sandbox.tracefile`) that writes and flushes each
block as it comes; on every exit path the rest is handed over and the file
completed, so an exception or Ctrl-C keeps what was recorded, and even a
simulation killed outright leaves every block it sent.
"""

from __future__ import annotations

import csv
import json
import math
import os
import pickle
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from . import tracefile
from .tracefile import COLUMNS, LENGTH, LOG_PREFIX, POSE_COLUMNS, TRUE_COLUMNS, TraceBlocks

try:
    import fcntl
except ImportError:  # not on Windows
    fcntl = None

__all__ = ["COLUMNS", "LOG_PREFIX", "POSE_COLUMNS", "TRUE_COLUMNS", "TraceWriter", "read_trace",
           "write_json", "write_yaml", "default_run_dir"]


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

    With a path, blocks of rows go to a trace-writing process
    (:mod:`sandbox.tracefile`) that formats and writes them on another core;
    without one, the rows are only kept, in this process. Controller channels
    (``log.<name>``) are fixed by the names seen in the first block of rows; a
    name first logged later is counted in ``dropped_channels``.
    """

    def __init__(self, path: Path | None, block_rows: int = 50):
        self.path = path
        self.block_rows = block_rows
        self._rows: list[tuple] = []
        self._logs: list[dict[str, float]] = []
        self._result: dict | None = None
        self.dropped_channels: set[str] = set()
        self._blocks: TraceBlocks | None = None
        self._process: subprocess.Popen | None = None
        self._numbers_path: Path | None = None
        self._numbers: np.ndarray | None = None
        if path is None:
            self._blocks = TraceBlocks()
        else:
            # created (or emptied) here, so a folder that cannot be written fails at once
            with open(path, "w", encoding="utf-8"):
                pass
            handle, numbers = tempfile.mkstemp(prefix="upright-trace-", suffix=".f64")
            os.close(handle)
            self._numbers_path = Path(numbers)
            self._process = _start_writer(path, self._numbers_path)

    def add(self, row: tuple, logs: dict[str, float]) -> None:
        """One row: values in COLUMNS order, then the controller's logged channels."""
        self._rows.append(row)
        self._logs.append(logs)
        if len(self._rows) >= self.block_rows:
            self.flush()

    def flush(self) -> None:
        """Hand the buffered rows on (to the writing process, or keep them here)."""
        if not self._rows:
            return
        rows, logs = self._rows, self._logs
        self._rows, self._logs = [], []
        if self._blocks is not None:
            self._blocks.take(rows, logs)
            return
        if self._process is None:
            raise OSError(f"{self.path}: the trace is already closed")
        payload = pickle.dumps((rows, logs), protocol=pickle.HIGHEST_PROTOCOL)
        try:
            self._process.stdin.write(LENGTH.pack(len(payload)) + payload)
            self._process.stdin.flush()
        except BrokenPipeError:
            self._finish()  # raises with the writing process's own message

    def close(self) -> None:
        """Write what is left and wait for the trace file to be complete."""
        if self._result is not None:
            return
        self.flush()
        if self._blocks is not None:
            self._result = self._blocks.result()
            self._numbers = np.frombuffer(self._blocks.numbers, dtype=float)
        else:
            self._finish()
        self.dropped_channels = set(self._result["dropped"])

    def _finish(self) -> None:
        process, self._process = self._process, None
        if process is None:
            return
        try:
            process.stdin.close()
        except BrokenPipeError:
            pass
        output = process.stdout.read()
        problem = process.stderr.read().decode("utf-8", "replace").strip()
        process.wait()
        process.stdout.close()
        process.stderr.close()
        try:
            if process.returncode != 0 or not output:
                raise OSError(f"{self.path}: writing the trace failed: "
                              f"{problem or f'exit status {process.returncode}'}")
            self._result = pickle.loads(output)
            self._numbers = np.fromfile(self._numbers_path, dtype=float)
        finally:
            self._numbers_path.unlink(missing_ok=True)

    def arrays(self) -> dict[str, np.ndarray]:
        """The recorded columns as numpy arrays, logs as ``log.<name>`` (after :meth:`close`)."""
        if self._result is None:
            self.close()
        names = self._result["names"]
        columns = list(COLUMNS) + [LOG_PREFIX + n for n in names]
        table = self._numbers.reshape(self._result["rows"], len(columns))
        return {name: table[:, i].copy() for i, name in enumerate(columns)}


def _start_writer(path: Path, numbers_path: Path) -> subprocess.Popen:
    """The trace-writing process for ``path`` (stdlib only, isolated, own session).

    Its own session keeps a Ctrl-C at the terminal from reaching it: the
    simulation catches the Ctrl-C and closes the trace properly.
    """
    options: dict = {"start_new_session": True} if os.name == "posix" else {
        "creationflags": getattr(subprocess, "CREATE_NEW_PROCESS_GROUP", 0)}
    process = subprocess.Popen(
        [sys.executable, "-I", "-S", tracefile.__file__, str(path), str(numbers_path)],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, **options)
    set_pipe_size = getattr(fcntl, "F_SETPIPE_SZ", None) if fcntl is not None else None
    if set_pipe_size is not None:
        try:  # room for several blocks, so the simulation never waits on a slow disk
            fcntl.fcntl(process.stdin.fileno(), set_pipe_size, 1 << 20)
        except OSError:
            pass
    return process


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
