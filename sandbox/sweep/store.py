"""A sweep's output folder: what it runs, the rows as they arrive, the sorted table.

- ``sweep.json``: the sweep's definition (robot, controller hash, test, settings,
  axes, spreads, samples, seed). A rerun into the same folder must match it.
- ``points.jsonl``: one JSON line per finished point, appended and flushed as each
  run ends, so a crash or Ctrl-C loses at most the runs in progress. A rerun reads
  it and skips the points already there (a torn last line is ignored).
- ``results.csv``: every finished point, sorted by point number, rewritten at the
  end of each call (also after an interruption). Floats are written with ``repr``,
  so the table reads back exactly and does not depend on the order runs finished.
"""

from __future__ import annotations

import atexit
import csv
import io
import json
import os
import secrets
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

from .jobs import FIGURES
from .plan import SweepError

DEFINITION = "sweep.json"
POINTS = "points.jsonl"
RESULTS = "results.csv"


def _normal(data: Any) -> Any:
    """The JSON round trip of ``data`` (tuples become lists), for comparisons."""
    return json.loads(json.dumps(data, default=str))


LOCK = "sweep.lock"


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's process: alive
        return True
    return True


def take_lock(folder: Path) -> Path:
    """Hold ``folder`` for this process: a lock file with its process id. A lock whose
    holder is still running refuses the sweep; one whose holder is gone (a crash, a
    SIGKILL) is stale and taken over. Released by :func:`release_lock` (and at exit)."""
    path = folder / LOCK
    for _ in range(3):
        try:
            handle = os.open(path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            try:
                holder = int(path.read_text(encoding="ascii").strip() or "0")
            except (OSError, ValueError):
                holder = 0
            if holder and holder != os.getpid() and _alive(holder):
                raise SweepError(f"{folder} is in use by another sweep (process {holder}); "
                                 "wait for it to finish, or give another --out") from None
            try:
                path.unlink()  # stale: its holder has gone
            except FileNotFoundError:
                pass
            continue
        with os.fdopen(handle, "w", encoding="ascii") as stream:
            stream.write(f"{os.getpid()}\n")
        atexit.register(release_lock, path)
        return path
    raise SweepError(f"{folder}: could not take the lock {path}; try again")


def release_lock(path: Path) -> None:
    """Remove this process's lock file (a lock another process now holds is left)."""
    try:
        if int(path.read_text(encoding="ascii").strip() or "0") == os.getpid():
            path.unlink()
    except (OSError, ValueError):
        pass


class SweepFolder:
    """The output folder of one sweep; ``done`` maps point numbers to finished rows."""

    def __init__(self, folder: Path, definition: dict[str, Any]):
        self.folder = folder
        folder.mkdir(parents=True, exist_ok=True)
        self._lock = take_lock(folder)
        definition = _normal(definition)
        path = folder / DEFINITION
        if path.is_file():
            try:
                known = json.loads(path.read_text(encoding="utf-8"))
            except (OSError, ValueError) as err:
                raise SweepError(f"{path}: cannot read the sweep definition ({err}); "
                                 "choose another output folder") from None
            if known != definition:
                differs = sorted(k for k in set(known) | set(definition)
                                 if known.get(k) != definition.get(k))
                raise SweepError(
                    f"{folder} holds a different sweep (it differs in: {', '.join(differs)}); "
                    "choose another output folder, or delete this one to start again")
        else:
            write_text_atomic(path, json.dumps(definition, indent=2))
        self.done: dict[int, dict[str, Any]] = self._read_points()

    def _read_points(self) -> dict[int, dict[str, Any]]:
        path = self.folder / POINTS
        done: dict[int, dict[str, Any]] = {}
        if not path.is_file():
            return done
        with path.open(encoding="utf-8") as stream:
            for line in stream:
                try:
                    row = json.loads(line)
                    done[int(row["index"])] = row
                except (ValueError, KeyError, TypeError):
                    continue  # a line torn by a crash: that point runs again
        return done

    def release(self) -> None:
        """Let another sweep use this folder."""
        release_lock(self._lock)

    def add(self, row: dict[str, Any]) -> None:
        """Append one finished point to points.jsonl and push it to the disk."""
        path = self.folder / POINTS
        needs_newline = path.is_file() and path.stat().st_size > 0 and not _ends_in_newline(path)
        with path.open("a", encoding="utf-8") as stream:
            if needs_newline:  # after a torn line, start clean
                stream.write("\n")
            stream.write(json.dumps(row) + "\n")
            stream.flush()
            os.fsync(stream.fileno())
        self.done[int(row["index"])] = row

    def rows(self) -> list[dict[str, Any]]:
        return [self.done[i] for i in sorted(self.done)]


def _ends_in_newline(path: Path) -> bool:
    with path.open("rb") as stream:
        stream.seek(-1, os.SEEK_END)
        return stream.read(1) == b"\n"


def result_columns(keys: Sequence[str], rows: Iterable[dict[str, Any]]) -> list[str]:
    """Columns of results.csv: point, parameters, seed, verdict, figures, checks, message.

    Each test check gives ``passed.<check>`` (1 when it passed, 0 when not) and,
    except ``stays up`` (whose figure is only the fall, already in ``status``),
    ``measured.<check>_<unit>``, the figure compared with the check's limit.
    """
    checks: dict[str, dict[str, Any]] = {}
    for row in rows:
        for check in row.get("checks", []):
            checks.setdefault(check["column"], check)
    check_columns = [c for entry in checks.values() for c in _check_columns(entry)]
    return ["index", "cell", "sample", *keys, "seed", "status", "passed", *FIGURES,
            *check_columns, "message"]


def _check_columns(entry: dict[str, Any]) -> list[str]:
    name = _check_slug(entry)
    passed = f"passed.{name}"
    if name == "stays_up":
        return [passed]
    return [passed, "measured." + entry["column"].removeprefix("check.")]


def _check_slug(entry: dict[str, Any]) -> str:
    # rows stored before entries carried their name: the column less its unit suffix
    return entry.get("name") or entry["column"].removeprefix("check.")


# SI units of results.csv's columns, for its second header row
COLUMN_UNITS = {"fell_at_s": "s", "max_abs_pitch_deg": "deg", "rms_pitch_deg": "deg",
                "drift_m": "m", "max_drift_m": "m", "saturation_fraction": "fraction of ticks",
                "mean_abs_duty": "duty (-1..1)", "duration_s": "s", "passed": "1 = passed",
                "seed": "", "index": "unit:", "status": "", "message": ""}
KEY_UNITS = {"mass": "kg", "radius": "m", "width": "m", "track": "m", "depth": "m",
             "height": "m", "bottom": "m", "at": "m", "size": "m", "stall_torque": "N m",
             "friction_torque": "N m", "static_friction_torque": "N m", "no_load_speed": "rad/s",
             "rated_voltage": "V", "voltage_drop": "V", "cell_voltage": "V", "stall_current": "A",
             "cell_resistance": "ohm", "rotor_inertia": "kg m^2", "pitch_inertia": "kg m^2",
             "backlash": "rad", "rate": "Hz", "bandwidth": "Hz", "loop_jitter": "s",
             "compute_time": "s", "friction": "", "gear_ratio": "", "cells": "",
             "deadband": "", "pwm_bits": "", "counts_per_rev": ""}


def column_unit(column: str, units: dict[str, str]) -> str:
    """The unit written under ``column`` in results.csv's unit row."""
    if column in COLUMN_UNITS:
        return COLUMN_UNITS[column]
    if column.startswith("passed."):
        return "1 = passed"
    if column.startswith("measured."):
        return units.get(column, "")
    if column.startswith("config."):
        return "controller's own"
    last = next((part for part in reversed(column.split(".")) if not part.isdigit()), "")
    return KEY_UNITS.get(last, "SI" if column not in ("cell", "sample") else "")


def _cell(value: Any) -> str:
    if value is None:
        return ""
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, float):
        return repr(value)
    return str(value)


def flat_row(row: dict[str, Any]) -> dict[str, Any]:
    """A stored row with its parameter values and checks as plain columns."""
    flat = {k: v for k, v in row.items() if k not in ("values", "checks")}
    flat.update(row.get("values", {}))
    for check in row.get("checks", []):
        columns = _check_columns(check)
        flat[columns[0]] = check["passed"]
        if len(columns) > 1:
            flat[columns[1]] = check["value"]
    return flat


def results_csv_text(keys: Sequence[str], rows: Sequence[dict[str, Any]]) -> str:
    """results.csv as text (rows in the order given: callers sort by point number): a row
    of column names, a row of units (its first cell ``unit:``), then one row per point."""
    columns = result_columns(keys, rows)
    units = {}
    for row in rows:
        for check in row.get("checks", []):
            measured = _check_columns(check)[1:]
            if measured:
                units.setdefault(measured[0], check.get("unit", ""))
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(columns)
    writer.writerow([column_unit(c, units) for c in columns])
    for row in rows:
        flat = flat_row(row)
        writer.writerow([_cell(flat.get(c)) for c in columns])
    return buffer.getvalue()


def read_results(path: Path) -> list[dict[str, str]]:
    """results.csv's point rows as dicts of text (the unit row left out)."""
    with path.open(encoding="utf-8", newline="") as stream:
        rows = list(csv.DictReader(stream))
    return [r for r in rows if r.get("index") != COLUMN_UNITS["index"]]


def write_text_atomic(path: Path, text: str) -> None:
    """Write ``path`` whole or not at all, through a scratch file of a name no other
    writer uses (process id and a random part), so two rewrites never share one."""
    scratch = path.with_name(f"{path.name}.{os.getpid()}.{secrets.token_hex(4)}.tmp")
    try:
        scratch.write_text(text, encoding="utf-8")
        os.replace(scratch, path)
    finally:
        scratch.unlink(missing_ok=True)
