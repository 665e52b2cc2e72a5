"""Trace rows into CSV text and packed numbers; also the trace-writing process.

Formatting a row of some thirty numbers as text costs more than everything
else upright does in a controller tick, so when a run writes a folder the
rows go, in pickled blocks, to a separate process running this file
(``python tracefile.py``) which formats, writes and flushes them while the
simulation goes on, on another core. It also appends each row's values, as
float64, to a scratch file for the simulation to read back. One such process
serves every trace of the Python process that started it, one after another
or several at once. Standard library only: it starts without numpy.

Messages on its stdin, and replies on its stdout: an 8-byte little-endian
length, then a pickle of ``(kind, trace, payload)``:

- ``("open", id, (csv_path, numbers_path[, columns]))``: start a trace whose
  fixed columns are ``columns`` (default COLUMNS);
- ``("rows", id, (rows, logs))``: row tuples in the trace's column order and one
  dict of logged channels per row;
- ``("close", id, None)``: finish the trace; the reply is
  ``{"names", "dropped", "rows", "texts"}``, or ``{"error": text}``.

Text columns (TEXT_COLUMNS, such as ``event``) hold a string in the row, mostly
empty: the CSV gets it quoted where needed, the numbers file leaves it out, and
the non-empty cells come back in the reply's ``texts`` as ``{column: [[row, text],
...]}``.

At the end of its input (the simulation has ended, or was killed) it
completes every open trace's CSV, removes their scratch files and exits.
"""

from __future__ import annotations

import csv
import math
import os
import pickle
import struct
import sys
from array import array

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
# What a builder asks of a run besides DESIGN.md's columns: the setpoint the test
# commands, each motor's voltage and torque, each wheel's rate, the controller's duties
# before clipping, and (text) the disturbance that fired on the tick.
DRIVE_COLUMNS = (
    "setpoint_speed_m_s", "setpoint_turn_rad_s", "voltage_l_v", "voltage_r_v",
    "torque_l_n_m", "torque_r_n_m", "wheel_rate_l_rad_s", "wheel_rate_r_rad_s",
    "duty_raw_l", "duty_raw_r",
)
EVENT_COLUMN = "event"
# each gearbox's motor side less its wheel, only when motors.backlash is on
PLAY_COLUMNS = ("play_l_rad", "play_r_rad")
RUN_COLUMNS = COLUMNS + DRIVE_COLUMNS + (EVENT_COLUMN,)
INT_COLUMNS = frozenset({"ticks_l", "ticks_r"})
TEXT_COLUMNS = frozenset({EVENT_COLUMN})
LOG_PREFIX = "log."
LENGTH = struct.Struct("<Q")


class TraceBlocks:
    """Takes blocks of rows; writes them as CSV to ``handle`` (if any) and keeps the numbers.

    The numbers of each row (the numeric ones of ``columns``, then the log
    channels) go to ``numbers`` or, with ``numbers_handle``, are appended to that
    binary file block by block; the non-empty cells of text columns are kept in
    ``texts``. Controller channels (``log.<name>``) are fixed by the names seen in
    the first block; a name first logged later is counted in ``dropped``.
    """

    def __init__(self, handle=None, numbers_handle=None, columns: tuple = COLUMNS):
        self.handle = handle
        self.numbers_handle = numbers_handle
        self.columns = tuple(columns)
        self.text_index = tuple(i for i, c in enumerate(self.columns) if c in TEXT_COLUMNS)
        self.texts: dict[str, list[list]] = {self.columns[i]: [] for i in self.text_index}
        self.names: list[str] | None = None
        self.dropped: set[str] = set()
        self.rows = 0
        self.numbers = array("d")  # float64, row after row
        self._format = ""
        self._format_all = ""

    def take(self, rows: list[tuple], logs: list[dict[str, float]]) -> None:
        if self.names is None:
            names: list[str] = []
            for entry in logs:
                names.extend(k for k in entry if k not in names)
            self._start(names)
        if not rows:
            return
        names = self.names
        name_set = set(names)
        numbers = self.numbers
        lines = []
        text_index = self.text_index
        for number, (row, entry) in enumerate(zip(rows, logs), start=self.rows):
            if text_index:
                row = self._take_texts(row, number)
            else:
                numbers.extend(row)
            if entry.keys() == name_set:  # every channel, and no new one: the usual row
                values = tuple(entry[n] for n in names)
                if self.handle is not None:
                    lines.append(self._format_all % (row + values))
            else:  # a channel missing this tick (empty cell) or new after the first block
                self.dropped.update(k for k in entry if k not in names)
                values = tuple(entry.get(n, math.nan) for n in names)
                if self.handle is not None:
                    cells = "".join("," + _cell(entry.get(n)) for n in names)
                    lines.append(self._format % row + cells)
            numbers.extend(values)
        self.rows += len(rows)
        if self.handle is not None:
            self.handle.write("\n".join(lines) + "\n")
            self.handle.flush()
        if self.numbers_handle is not None:
            numbers.tofile(self.numbers_handle)
            self.numbers_handle.flush()
            del numbers[:]

    def _take_texts(self, row: tuple, number: int) -> tuple:
        """Keep row ``number``'s numbers and non-empty texts; the row with its texts
        made CSV cells."""
        start = 0
        cells = row
        for i in self.text_index:
            self.numbers.extend(row[start:i])
            start = i + 1
            text = row[i]
            if text:
                self.texts[self.columns[i]].append([number, text])
                cells = cells[:i] + (_text_cell(text),) + cells[i + 1:]
        self.numbers.extend(row[start:])
        return cells

    def _start(self, names: list[str]) -> None:
        self.names = names
        self._format = ",".join("%d" if c in INT_COLUMNS else "%s" if c in TEXT_COLUMNS
                                else "%.9g" for c in self.columns)
        self._format_all = self._format + ",%.9g" * len(names)
        if self.handle is not None:
            header = list(self.columns) + [LOG_PREFIX + n for n in names]
            csv.writer(self.handle, lineterminator="\n").writerow(header)
            self.handle.flush()

    def start_if_empty(self) -> None:
        """Fix the (empty) channel list and write the header if no block came."""
        if self.names is None:
            self.take([], [])

    def result(self) -> dict:
        """Log channel names, dropped channels, the row count and the non-empty texts."""
        out = {"names": self.names or [], "dropped": sorted(self.dropped), "rows": self.rows}
        if self.texts:
            out["texts"] = self.texts
        return out


def _cell(value: float | None) -> str:
    return "" if value is None else "%.9g" % value


def _text_cell(text: str) -> str:
    """A text as one CSV cell: quoted (quotes doubled) where it holds a comma, a quote or
    a line break, as the csv module reads it back."""
    text = str(text)
    if any(c in text for c in ',"\r\n'):
        return '"' + text.replace('"', '""') + '"'
    return text


def read_message(stream) -> tuple | dict | None:
    """One message from ``stream``, or None at the end of input."""
    head = stream.read(LENGTH.size)
    if len(head) < LENGTH.size:
        return None
    (size,) = LENGTH.unpack(head)
    body = stream.read(size)
    if len(body) < size:
        return None  # the simulation ended mid-message (killed): keep what came whole
    return pickle.loads(body)


def pack_message(message: tuple | dict) -> bytes:
    """``message`` pickled, with its length in front."""
    body = pickle.dumps(message, protocol=pickle.HIGHEST_PROTOCOL)
    return LENGTH.pack(len(body)) + body


class _Trace:
    """One open trace in the writing process: its files, or why it cannot be written."""

    def __init__(self, csv_path: str, numbers_path: str, columns: tuple = COLUMNS):
        self.numbers_path = numbers_path
        self.error = ""
        self.handle = self.numbers = None
        try:
            self.handle = open(csv_path, "a", newline="", encoding="utf-8")  # noqa: SIM115
            self.numbers = open(numbers_path, "ab")  # noqa: SIM115
        except OSError as err:
            self.fail(err)
        self.blocks = TraceBlocks(self.handle, self.numbers, columns)

    def take(self, rows: list[tuple], logs: list[dict]) -> None:
        if not self.error:
            try:
                self.blocks.take(rows, logs)
            except OSError as err:
                self.fail(err)

    def fail(self, err: OSError) -> None:
        self.error = self.error or str(err)
        self.close_files()

    def close_files(self) -> None:
        for handle in (self.handle, self.numbers):
            if handle is not None and not handle.closed:
                try:
                    handle.close()
                except OSError as err:
                    self.error = self.error or str(err)

    def finish(self) -> dict:
        """Header if no row came, files closed; the reply to ``close``."""
        if not self.error:
            try:
                self.blocks.start_if_empty()
            except OSError as err:
                self.fail(err)
        self.close_files()
        return {"error": self.error} if self.error else self.blocks.result()


def serve(source, sink) -> None:
    """Answer messages from ``source`` (replies to ``sink``) until the input ends."""
    traces: dict[int, _Trace] = {}
    while (message := read_message(source)) is not None:
        kind, trace, payload = message
        if kind == "open":
            traces[trace] = _Trace(*payload)
        elif kind == "rows":
            if trace in traces:
                traces[trace].take(*payload)
        elif kind == "close":
            done = traces.pop(trace, None)
            reply = done.finish() if done else {"error": f"no open trace number {trace}"}
            sink.write(pack_message(reply))
            sink.flush()
    # The simulation has gone without closing these: complete their CSV files; nobody
    # will read the numbers.
    for left in traces.values():
        left.finish()
        try:
            os.remove(left.numbers_path)
        except OSError:
            pass


if __name__ == "__main__":
    import signal

    # Ctrl-C is for the simulation, which then closes its traces: finish writing first.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    try:
        serve(sys.stdin.buffer, sys.stdout.buffer)
    except BrokenPipeError:  # the simulation is gone while we answered it
        pass
    # Skip the interpreter's tear-down: every file is closed.
    os._exit(0)
