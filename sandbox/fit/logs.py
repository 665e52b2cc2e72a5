"""Bench logs: CSV files from a robot's serial port, read into SI columns.

A log has a header naming each column with its unit in the name, as upright's traces do
(``t_s``, ``duty_l``, ``ticks_l``, ``gyro_y_rad_s``, ``accel_x_m_s2``, ``battery_v``), or in
the units a board prints (``t_ms``, ``t_us``, ``gyro_y_deg_s``, ``accel_x_g``,
``battery_mv``), or raw sensor counts with a scale given by the user
(``gyro_y`` with ``--scale gyro_y=131/deg/s``: 131 counts per deg/s).

What a serial log really holds is tolerated and counted, never fatal: lines with the wrong
number of fields or a cell that is not a number (dropped lines, a trailing half line),
a header repeated after a board reset (the longest stretch of rising time is kept), times
that do not rise. A log that cannot serve its test raises :class:`LogError`.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from ..units import STANDARD_GRAVITY, UnitError, to_si


class LogError(ValueError):
    """A bench log that cannot serve its test; the message is one line naming the file."""

    def __init__(self, source: str, reason: str):
        self.source = source
        self.reason = reason
        super().__init__(f"{source}: {reason}")


# Column suffix -> (canonical SI suffix, factor to SI). Longest suffixes are tried first.
_SUFFIXES: dict[str, tuple[str, float]] = {
    "_rad_s": ("_rad_s", 1.0),
    "_deg_s": ("_rad_s", math.pi / 180.0),
    "_dps": ("_rad_s", math.pi / 180.0),
    "_m_s2": ("_m_s2", 1.0),
    "_mg": ("_m_s2", STANDARD_GRAVITY / 1000.0),
    "_g": ("_m_s2", STANDARD_GRAVITY),
    "_rad": ("_rad", 1.0),
    "_deg": ("_rad", math.pi / 180.0),
    "_mv": ("_v", 1e-3),
    "_v": ("_v", 1.0),
    "_m_s": ("_m_s", 1.0),
    "_a": ("_a", 1.0),
    "_ma": ("_a", 1e-3),
}
_TIME = {"t_s": 1.0, "t_ms": 1e-3, "t_us": 1e-6, "time_s": 1.0, "time_ms": 1e-3}
# Columns that carry no unit by nature (fractions and counts).
_PLAIN = re.compile(r"^(duty|ticks|counts|duty_cmd|pwm)(_[lr]|_left|_right)?$|^event$|^log\..*")
_SCALE_KIND = {"gyro": "angular_speed", "accel": "acceleration", "battery": "voltage"}
_SCALE_SUFFIX = {"angular_speed": "_rad_s", "acceleration": "_m_s2", "voltage": "_v"}


@dataclass(frozen=True)
class BenchLog:
    """A log read into SI columns.

    ``t`` is in seconds from the first kept sample; ``columns`` maps canonical names
    (``gyro_y_rad_s``, ``ticks_l``, ``duty_l``...) to float arrays of the same length;
    ``events`` holds a text ``event`` column if the log has one. ``dropped`` counts the
    lines left out (malformed, not rising in time, outside the kept stretch), ``resets``
    the repeated headers.
    """

    source: str
    t: np.ndarray
    columns: dict[str, np.ndarray]
    events: tuple[str, ...] = ()
    dropped: int = 0
    resets: int = 0
    notes: tuple[str, ...] = field(default_factory=tuple)

    def has(self, *names: str) -> bool:
        return all(n in self.columns for n in names)

    def need(self, test: str, *names: str) -> None:
        """Raise LogError unless every named column is present."""
        missing = [n for n in names if n not in self.columns]
        if missing:
            have = ", ".join(sorted(self.columns)) or "none"
            raise LogError(self.source, f"the {test} test needs column(s) {', '.join(missing)} "
                           f"(found: {have})")

    def summary(self) -> str:
        """One line: samples, span, and what was dropped."""
        text = f"{self.source}: {self.t.size} samples over {self.t[-1] - self.t[0]:.2f} s"
        if self.dropped:
            text += f", {self.dropped} line(s) dropped"
        if self.resets:
            text += f", {self.resets} repeated header(s)"
        return text


def parse_scales(items: list[str] | None) -> dict[str, float]:
    """``name=COUNTS/UNIT`` strings -> SI value of one count, by raw column name.

    ``gyro_y=131/deg/s``: 131 counts per deg/s, one count = (π/180)/131 rad/s.
    ``accel_x=16384/g``, ``battery=1000/V``. The kind follows the name's start.
    """
    out: dict[str, float] = {}
    for item in items or []:
        name, sep, text = item.partition("=")
        name = name.strip().lower()
        counts, slash, unit = text.partition("/")
        if not sep or not name or not slash:
            raise LogError("--scale", f"{item!r}: expected NAME=COUNTS/UNIT, e.g. gyro_y=131/deg/s")
        kind = next((k for prefix, k in _SCALE_KIND.items() if name.startswith(prefix)), None)
        if kind is None:
            raise LogError("--scale", f"{item!r}: the name must start with gyro, accel or "
                           "battery (a raw column of the log)")
        try:
            per_unit = float(counts)
            unit_si = to_si(f"1 {unit.strip()}", kind)
        except (ValueError, UnitError) as err:
            raise LogError("--scale", f"{item!r}: {err}") from None
        if not (math.isfinite(per_unit) and per_unit > 0):
            raise LogError("--scale", f"{item!r}: counts per unit must be a positive number")
        out[name] = unit_si / per_unit
    return out


def canonical(name: str, scales: dict[str, float]) -> tuple[str, float] | None:
    """A header name -> (canonical SI name, factor), or None for a column left out."""
    key = name.strip().lower()
    if key in _TIME:
        return "t_s", _TIME[key]
    if key in scales:
        kind = next(k for prefix, k in _SCALE_KIND.items() if key.startswith(prefix))
        return key + _SCALE_SUFFIX[kind], scales[key]
    if _PLAIN.match(key):
        return key, 1.0
    for suffix in sorted(_SUFFIXES, key=len, reverse=True):
        if key.endswith(suffix) and len(key) > len(suffix):
            canon, factor = _SUFFIXES[suffix]
            return key[: -len(suffix)] + canon, factor
    return None


def _is_header(fields: list[str]) -> bool:
    return bool(fields) and all(re.match(r"^[A-Za-z_][A-Za-z0-9_.]*$", f.strip()) for f in fields)


def read_log(path: str | Path, scales: dict[str, float] | None = None) -> BenchLog:
    """Read a bench log CSV into SI columns; see the module docstring for what is tolerated."""
    path = Path(path)
    source = str(path)
    if not path.is_file():
        raise LogError(source, "no such file")
    try:
        text = path.read_bytes().decode("utf-8", errors="replace")
    except OSError as err:
        raise LogError(source, f"cannot read the file: {err}") from None
    return parse_log(text, source, scales or {})


def parse_log(text: str, source: str, scales: dict[str, float]) -> BenchLog:
    """Parse the text of a log (see :func:`read_log`)."""
    lines = text.replace("\r\n", "\n").replace("\r", "\n").split("\n")
    header: list[str] | None = None
    header_fields: list[str] = []
    resets = dropped = 0
    rows: list[list[float]] = []
    events: list[str] = []
    segment_of: list[int] = []
    segment = 0
    for line in lines:
        stripped = line.strip()
        if not stripped or stripped.startswith("#"):
            continue
        fields = [f.strip() for f in stripped.split(",")]
        if _is_header(fields):
            if header is None:
                header_fields = fields
                header = [f.lower() for f in fields]
            elif [f.lower() for f in fields] == header:
                resets += 1
                segment += 1
            else:
                dropped += 1
            continue
        if header is None or len(fields) != len(header):
            dropped += 1
            continue
        row = []
        ok = True
        for name, cell in zip(header, fields):
            if name == "event":
                continue
            try:
                value = float(cell)
            except ValueError:
                ok = False
                break
            if not math.isfinite(value):
                ok = False
                break
            row.append(value)
        if not ok:
            dropped += 1
            continue
        rows.append(row)
        events.append(fields[header.index("event")] if "event" in header else "")
        segment_of.append(segment)
    if header is None:
        raise LogError(source, "no header line naming the columns (e.g. t_s,gyro_y_rad_s)")
    numeric = [h for h in header if h != "event"]
    mapped = {h: canonical(h, scales) for h in numeric}
    time_columns = [h for h in numeric if mapped[h] is not None and mapped[h][0] == "t_s"]
    if not time_columns:
        raise LogError(source, "no time column: name one t_s, t_ms or t_us")
    unknown = [name for name, m in zip(header_fields, [mapped.get(h) for h in header])
               if m is None and name.lower() != "event"]
    notes = []
    raw = [u for u in unknown if u.lower().startswith(tuple(_SCALE_KIND))]
    if raw:
        notes.append(f"column(s) {', '.join(raw)} left out: raw counts need --scale "
                     f"{raw[0]}=COUNTS/UNIT")
    elif unknown:
        notes.append(f"column(s) {', '.join(unknown)} left out: no unit in the name")
    if not rows:
        raise LogError(source, "no data lines under the header")
    data = np.array(rows, dtype=float)
    t_index = numeric.index(time_columns[0])
    t = data[:, t_index] * mapped[time_columns[0]][1]
    seg = np.array(segment_of)
    keep, extra_dropped = _rising_stretch(t, seg)
    dropped += extra_dropped
    if keep.sum() < 2:
        raise LogError(source, "fewer than two samples with rising time")
    if extra_dropped and resets:
        notes.append("the board reset mid-log: the longest stretch of rising time is kept")
    t = t[keep]
    columns: dict[str, np.ndarray] = {}
    for i, name in enumerate(numeric):
        m = mapped[name]
        if m is None or m[0] == "t_s":
            continue
        columns[m[0]] = data[keep, i] * m[1]
    kept_events = tuple(e for e, k in zip(events, keep) if k) if "event" in header else ()
    return BenchLog(source, t - t[0], columns, kept_events, dropped, resets, tuple(notes))


def _rising_stretch(t: np.ndarray, segment: np.ndarray) -> tuple[np.ndarray, int]:
    """Mask of the longest run of samples with strictly rising time within one board
    session (a reset restarts time); samples not rising inside it are dropped too."""
    best_start = best_end = 0
    start = 0
    for i in range(1, t.size + 1):
        if i == t.size or (segment[i] != segment[i - 1] and t[i] <= t[i - 1]) or t[i] < t[start]:
            if i - start > best_end - best_start:
                best_start, best_end = start, i
            start = i
    keep = np.zeros(t.size, dtype=bool)
    last = -math.inf
    for i in range(best_start, best_end):
        if t[i] > last:
            keep[i] = True
            last = t[i]
    return keep, int(t.size - keep.sum())
