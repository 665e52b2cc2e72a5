"""The run folder: streamed trace CSV, summary JSON, resolved run.yaml.

Rows are buffered in blocks (a quarter of a simulated second at 200 Hz) and handed to a
trace-writing process (:mod:`sandbox.tracefile`) that writes and flushes each
block as it comes; on every exit path the rest is handed over and the file
completed, so an exception or Ctrl-C keeps what was recorded, and even a
simulation killed outright leaves every block it sent.
"""

from __future__ import annotations

import atexit
import csv
import itertools
import json
import math
import multiprocessing.util
import os
import re
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from . import tracefile
from .interrupts import deferred
from .tracefile import (
    COLUMNS,
    DRIVE_COLUMNS,
    EVENT_COLUMN,
    LOG_PREFIX,
    PLAY_COLUMNS,
    POSE_COLUMNS,
    RUN_COLUMNS,
    TEXT_COLUMNS,
    TRUE_COLUMNS,
    TraceBlocks,
    pack_message,
    read_message,
)

try:
    import fcntl
except ImportError:  # not on Windows
    fcntl = None

__all__ = ["COLUMNS", "DRIVE_COLUMNS", "EVENT_COLUMN", "LOG_PREFIX", "PLAY_COLUMNS",
           "POSE_COLUMNS", "RUN_COLUMNS", "TEXT_COLUMNS", "TRUE_COLUMNS", "TraceWriter",
           "read_trace", "write_json", "write_yaml", "default_run_dir"]


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


def _slug(text: str, limit: int = 40) -> str:
    """A safe, bounded file-name part: letters, digits, '_' and '.', at most ``limit``."""
    return re.sub(r"[^A-Za-z0-9_.]+", "-", text)[:limit].strip("-.") or "x"


class TraceWriter:
    """Streams trace rows to ``trace.csv``; keeps the numeric columns for metrics.

    With a path, blocks of rows go to the trace-writing process
    (:mod:`sandbox.tracefile`), which formats and writes them on another core
    (or, where no such process can start, this process writes them itself);
    without one, the rows are only kept, in this process. ``columns`` names the
    fixed columns of each row, in order (a run's are ``RUN_COLUMNS``, with
    ``PLAY_COLUMNS`` before ``event`` when there is backlash); a text column
    (``TEXT_COLUMNS``) holds a string, mostly empty. Controller channels
    (``log.<name>``) are fixed by the names seen in the first block of rows; a
    name first logged later is counted in ``dropped_channels``.
    """

    def __init__(self, path: Path | None, block_rows: int = 50, columns: tuple = COLUMNS):
        self.path = path
        self.block_rows = block_rows
        self.columns = tuple(columns)
        self._rows: list[tuple] = []
        self._logs: list[dict[str, float]] = []
        self._result: dict | None = None
        self.dropped_channels: set[str] = set()
        self._blocks: TraceBlocks | None = None
        self._writing: _WritingProcess | None = None
        self._numbers_path: Path | None = None
        self._numbers: np.ndarray | None = None
        self._handle = None  # the CSV, when this process writes it itself
        if path is None:
            self._blocks = TraceBlocks(columns=self.columns)
            return
        # created (or emptied) here, so a folder that cannot be written fails at once
        with open(path, "w", encoding="utf-8"):
            pass
        try:
            writing = writing_process()
        except OSError:  # no helper can start here: format and write in this process
            self._handle = open(path, "a", newline="", encoding="utf-8")  # noqa: SIM115
            self._blocks = TraceBlocks(self._handle, columns=self.columns)
            return
        handle, numbers = tempfile.mkstemp(prefix="upright-trace-", suffix=".f64")
        os.close(handle)
        self._numbers_path = Path(numbers)
        self._id = next(_trace_ids)
        self._writing = writing
        try:
            self._send(("open", self._id,
                        tuple(_open_payload(path, self._numbers_path)) + (self.columns,)))
        except BaseException:
            self._numbers_path.unlink(missing_ok=True)
            raise

    def add(self, row: tuple, logs: dict[str, float]) -> None:
        """One row: values in ``columns`` order, then the controller's logged channels."""
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
        elif self._result is not None:
            raise OSError(f"{self.path}: the trace is already closed")
        else:
            self._send(("rows", self._id, (rows, logs)))

    def close(self) -> None:
        """Write what is left and wait for the trace file to be complete."""
        if self._result is not None:
            return
        self.flush()
        if self._blocks is not None:
            if self._handle is not None:
                self._blocks.start_if_empty()
                self._handle.close()
            self._result = self._blocks.result()
            self._numbers = np.frombuffer(self._blocks.numbers, dtype=float)
        else:
            try:
                reply = self._writing.ask(pack_message(("close", self._id, None)))
                if "error" in reply:
                    raise OSError(f"{self.path}: writing the trace failed: {reply['error']}")
                self._numbers = np.fromfile(self._numbers_path, dtype=float)
                self._result = reply
            finally:
                self._numbers_path.unlink(missing_ok=True)
        self.dropped_channels = set(self._result["dropped"])

    def _send(self, message: tuple) -> None:
        self._writing.send(pack_message(message), self.path)

    def arrays(self) -> dict[str, np.ndarray]:
        """The recorded columns as numpy arrays, logs as ``log.<name>`` (after :meth:`close`);
        a text column as an array of strings ("" where the cell is empty)."""
        if self._result is None:
            self.close()
        names = self._result["names"]
        rows = self._result["rows"]
        numeric = [c for c in self.columns if c not in TEXT_COLUMNS]
        numeric += [LOG_PREFIX + n for n in names]
        table = self._numbers.reshape(rows, len(numeric))
        out = {name: table[:, i].copy() for i, name in enumerate(numeric)}
        texts = self._result.get("texts", {})
        ordered = {}
        for name in list(self.columns) + [LOG_PREFIX + n for n in names]:
            if name in TEXT_COLUMNS:
                cells = [""] * rows
                for number, text in texts.get(name, ()):
                    cells[number] = text
                ordered[name] = np.array(cells, dtype=str)
            else:
                ordered[name] = out[name]
        return ordered


def _open_payload(path: Path, numbers_path: Path) -> tuple[str, str]:
    """What the writing process needs to start a trace (tests replace this)."""
    return str(path), str(numbers_path)


_trace_ids = itertools.count()


class _WritingProcess:
    """The trace-writing process of this Python process (stdlib only, isolated, own session).

    Its own session keeps a Ctrl-C at the terminal from reaching it: the
    simulation catches the Ctrl-C and closes its trace properly. A lock keeps
    messages whole when runs write traces from several threads.
    """

    def __init__(self):
        options: dict = {"start_new_session": True} if os.name == "posix" else {
            "creationflags": getattr(subprocess, "CREATE_NEW_PROCESS_GROUP", 0)}
        self.process = subprocess.Popen(
            [sys.executable, "-I", "-S", tracefile.__file__],
            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, **options)
        self.owner = os.getpid()
        self.lock = threading.Lock()
        self.broken = False
        set_pipe_size = getattr(fcntl, "F_SETPIPE_SZ", None) if fcntl is not None else None
        if set_pipe_size is not None:
            try:  # room for several blocks, so the simulation never waits on a slow disk
                fcntl.fcntl(self.process.stdin.fileno(), set_pipe_size, 1 << 20)
            except OSError:
                pass

    def usable(self) -> bool:
        return not self.broken and self.owner == os.getpid() and self.process.poll() is None

    def send(self, data: bytes, path: Path | None = None) -> None:
        # a Ctrl-C waits until the message is whole: one landing mid-write would leave
        # the stream out of step, and the trace could not be closed any more
        with self.lock, deferred():
            self._write(data, path)

    def ask(self, data: bytes) -> dict:
        """Send a message and wait for its reply (a Ctrl-C waits for the reply)."""
        with self.lock, deferred():
            self._write(data)
            try:
                reply = read_message(self.process.stdout)
            except BaseException:
                self.broken = True  # a reply half read (Ctrl-C): the stream is out of step
                raise
            if reply is None:
                self.broken = True
                raise OSError("the trace-writing process stopped")
            return reply

    def _write(self, data: bytes, path: Path | None = None) -> None:
        if self.broken:
            raise OSError(f"{path or 'trace'}: the trace-writing process is gone")
        try:
            self.process.stdin.write(data)
            self.process.stdin.flush()
        except OSError as err:
            self.broken = True
            raise OSError(f"{path or 'trace'}: the trace-writing process stopped ({err})") from None
        except BaseException:
            self.broken = True  # a message half written (Ctrl-C): the stream is out of step
            raise

    def stop(self) -> None:
        """End the input (the process completes what it has, then exits) and wait briefly."""
        if self.owner != os.getpid():
            return
        try:
            self.process.stdin.close()
        except OSError:
            pass
        try:
            self.process.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.process.kill()
        self.process.stdout.close()


_writing: _WritingProcess | None = None
_writing_lock = threading.Lock()


def writing_process() -> _WritingProcess:
    """The trace-writing process, started on first use (again after a fork, or if it died)."""
    global _writing
    with _writing_lock:
        if _writing is None or not _writing.usable():
            old, _writing = _writing, _WritingProcess()
            if old is not None and old.owner == os.getpid():
                old.stop()
            atexit.register(_writing.stop)
            # multiprocessing workers leave through os._exit, past atexit handlers, but
            # run these: without them the helper is left for init to reap
            multiprocessing.util.Finalize(_writing, _writing.stop, exitpriority=10)
        return _writing


def read_trace(path: Path) -> dict[str, np.ndarray]:
    """A trace CSV back into named arrays: floats (empty cells become NaN), and strings
    for a text column (``event``, or any column whose cells are not all numbers)."""
    with open(path, newline="", encoding="utf-8") as handle:
        reader = csv.reader(handle)
        header = next(reader)
        rows = [row for row in reader if row]
    width = len(header)
    for row in rows:
        if len(row) != width:
            raise ValueError(f"{path}: a row has {len(row)} cells, the header {width}")
    out = {}
    for i, name in enumerate(header):
        cells = [row[i] for row in rows]
        if name in TEXT_COLUMNS:
            out[name] = np.array(cells, dtype=str)
            continue
        try:
            out[name] = np.array([float(v) if v else math.nan for v in cells], dtype=float)
        except ValueError:  # a text column this reader does not know by name
            out[name] = np.array(cells, dtype=str)
    return out


def write_json(path: Path, data: dict[str, Any]) -> None:
    path.write_text(json.dumps(_plain(data), indent=2, allow_nan=False) + "\n", encoding="utf-8")


def write_yaml(path: Path, data: dict[str, Any]) -> None:
    # libyaml's emitter where installed (the same text as safe_dump's, measured on every
    # record of a suite; about 4x faster: two records a run)
    dumper = getattr(yaml, "CSafeDumper", yaml.SafeDumper)
    path.write_text(yaml.dump(_plain(data), Dumper=dumper, sort_keys=False), encoding="utf-8")


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
