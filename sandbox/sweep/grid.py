"""Grid and Monte Carlo sweeps: many runs of one controller, one table of results.

``run_sweep`` runs every point of a grid (``--vary``) and/or a Monte Carlo draw
(``--samples`` with ``--spread``) into an output folder (see ``store.py``),
resuming where an earlier call into the same folder stopped, and returns a
:class:`SweepReport` the command line prints.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any

import numpy as np

from ..robot import RobotSpec, robot_from_dict
from ..runner import STATUS_INTERRUPTED, RunSettings
from ..tables import fmt, table
from .executors import open_executor
from .jobs import FIGURES, PointJob, RunCommon, ShippedFile
from .plan import (
    Axis,
    Point,
    Spread,
    SweepError,
    make_points,
    nominal_value,
    parse_spread,
    parse_vary,
)
from .stats import wilson_interval
from .store import RESULTS, SweepFolder, results_csv_text, write_text_atomic

Progress = Callable[[int, int], None]
HEATMAP = "heatmap.png"
MAX_TABLE_ROWS = 50  # grid cells shown in the terminal; results.csv has every one


@dataclass(frozen=True)
class TextTable:
    """A titled table of text cells for the terminal."""

    title: str
    header: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]

    def text(self) -> str:
        body = table(self.rows, self.header)
        return f"{self.title}\n{body}" if self.title else body


@dataclass(frozen=True)
class SweepReport:
    """What a sweep did: counts, the overall success rate, tables to print, files written."""

    folder: Path
    total: int  # points in the sweep
    finished: int  # points with a result (this call and earlier ones)
    ran: int  # runs this call made
    skipped: int  # points finished by an earlier call (resumed)
    passed: int  # finished points that passed (the test, or stayed up without one)
    success_interval: tuple[float, float] | None  # 95 % Wilson interval of the pass rate
    interrupted: bool
    tables: tuple[TextTable, ...]
    files: tuple[Path, ...]

    def text(self) -> str:
        parts = [t.text() for t in self.tables]
        rate = f"{self.passed}/{self.finished} runs passed"
        if self.finished:
            rate += f" ({100 * self.passed / self.finished:.1f} %"
            if self.success_interval is not None:
                low, high = self.success_interval
                rate += f"; 95 % Wilson interval {100 * low:.1f}-{100 * high:.1f} %"
            rate += ")"
        parts.append(rate)
        if self.skipped:
            parts.append(f"{self.skipped} points were already finished in {self.folder}/")
        if self.interrupted:
            parts.append(f"interrupted: {self.total - self.finished} points left; run the same "
                         f"command with --out {self.folder} to finish them")
        parts.append("results in " + ", ".join(str(f) for f in self.files))
        return "\n\n".join(parts)


# --------------------------------------------------------------------- preparing


def split_controller(controller: str) -> tuple[str, str | None]:
    """``"file.py:Class"`` -> (``"file.py"``, ``"Class"``); no class part -> None."""
    path, colon, name = controller.rpartition(":")
    if colon and path.endswith(".py") and name.isidentifier():
        return path, name
    return controller, None


def make_common(spec: RobotSpec, settings: RunSettings, tests: Sequence[str | None],
                duration_given: bool) -> RunCommon:
    """The shared part of every run; fails early on a controller or test that will not load."""
    from ..events import BUILTIN_NAMES, resolve_test
    from ..scripts import load_controller_class

    load_controller_class(settings.controller)  # ControllerLoadError now, not in a worker
    path, class_name = split_controller(settings.controller)
    test_files = {}
    for test in tests:
        if test is None:
            continue
        resolve_test(test, spec)  # TestFileError now
        if test not in BUILTIN_NAMES:
            test_files[test] = ShippedFile.read(test)
    return RunCommon(robot=spec.to_si_dict(), robot_source=spec.name, settings=settings,
                     controller=ShippedFile.read(path), class_name=class_name,
                     test_files=test_files, duration_given=duration_given)


def check_points(common: RunCommon, points: Sequence[Point]) -> None:
    """Validate every point's robot before any run, naming the point and its values."""
    seen: set[tuple] = set()
    for point in points:
        values = point.robot_values()
        signature = tuple(sorted(values.items()))
        if signature in seen:
            continue
        seen.add(signature)
        try:
            robot_from_dict(common.robot, common.robot_source, values or None)
        except ValueError as err:
            shown = ", ".join(f"{k}={fmt(v)}" for k, v in values.items())
            raise SweepError(f"point {point.index} ({shown}) is not a valid robot:\n{err}") \
                from None


def definition(common: RunCommon, axes: Sequence[Axis], spreads: Sequence[Spread],
               samples: int, test: str | None) -> dict[str, Any]:
    """Everything that decides a sweep's results (sweep.json); a resumed sweep must match."""
    s = common.settings
    return {
        "kind": "sweep",
        "format": 1,
        "robot": common.robot,
        "controller": {"path": common.controller.path, "sha256": common.controller.sha256,
                       "class": common.class_name},
        "test": test,
        "test_sha256": common.test_files[test].sha256 if test in common.test_files else None,
        "settings": {"config": s.config, "duration_s": s.duration,
                     "duration_given": common.duration_given, "tilt_rad": s.tilt,
                     "seed": s.seed, "physics_dt_s": s.physics_dt, "rate_hz": s.rate_hz,
                     "latency_s": s.latency, "fall_limit_rad": s.fall_limit},
        "axes": [{"key": a.key, "values": list(a.values)} for a in axes],
        "spreads": [{"key": p.key, "amount": p.amount, "relative": p.relative}
                    for p in spreads],
        "samples": samples,
    }


# --------------------------------------------------------------------- running


def run_sweep(spec: RobotSpec, settings: RunSettings, folder: Path, *,
              axes: Sequence[Axis] = (), spreads: Sequence[Spread] = (), samples: int = 0,
              test: str | None = None, duration_given: bool = False,
              workers: int | None = None, cluster: str | None = None,
              figure: str = "max_abs_pitch_deg", progress: Progress | None = None,
              plots: bool = True) -> SweepReport:
    """Run a grid and/or Monte Carlo sweep into ``folder``; resume what is there.

    ``spec`` and ``settings`` are the base robot and run (``--set`` values already
    in; ``settings.seed`` is the base seed). ``progress(done, total)`` is called
    once before the first run (done = points already finished) and after each.
    Ctrl-C stops the sweep: finished points are kept, the report says so.
    """
    if figure not in FIGURES:
        raise SweepError(f"--figure {figure!r}: choose one of {', '.join(FIGURES)}")
    if not axes and not samples:
        raise SweepError("nothing to sweep: give --vary KEY=A,B,C or KEY=START..STOP,n=N and/or "
                         "--samples N")
    common = make_common(spec, replace(settings, test_name=test or "none"), [test],
                         duration_given)
    points = make_points(axes, spreads, samples, settings.seed,
                         lambda key: nominal_value(key, common.robot, settings.config))
    check_points(common, points)
    store = SweepFolder(folder, definition(common, axes, spreads, samples, test))
    by_index = {p.index: p for p in points}
    todo = [p for p in points if p.index not in store.done]
    skipped = len(points) - len(todo)
    if progress:
        progress(skipped, len(points))
    ran, interrupted = 0, False
    jobs = (PointJob(p.index, p.robot_values(), p.config_values(), p.seed, test) for p in todo)
    try:
        if todo:
            with open_executor(common, workers=workers, cluster=cluster, jobs=len(todo)) as pool:
                for job, row in pool.map_unordered(jobs):
                    if row["status"] == STATUS_INTERRUPTED:  # Ctrl-C inside an in-process run
                        interrupted = True
                        pool.close(cancel=True)
                        break
                    point = by_index[job.index]
                    store.add({**row, "cell": point.cell, "sample": point.sample,
                               "values": dict(point.values)})
                    ran += 1
                    if progress:
                        progress(len(store.done), len(points))
    except KeyboardInterrupt:
        interrupted = True
    title = f"{spec.name} - {controller_label(settings.controller)} - {test or 'no test'}"
    try:
        return finish(store, points, axes, spreads, samples, figure, ran, skipped,
                      interrupted, plots, title)
    finally:
        store.release()


def finish(store: SweepFolder, points: Sequence[Point], axes: Sequence[Axis],
           spreads: Sequence[Spread], samples: int, figure: str, ran: int, skipped: int,
           interrupted: bool, plots: bool, title: str) -> SweepReport:
    """Write results.csv (sorted) and the heatmap; build the report."""
    rows = store.rows()
    keys = [a.key for a in axes] + [s.key for s in spreads if s.key not in
                                    {a.key for a in axes}]
    files = [store.folder / RESULTS]
    write_text_atomic(files[0], results_csv_text(keys, rows))
    cells = cell_summaries(rows, len(points) // max(samples, 1), figure)
    if plots and axes and len(axes) <= 2 and rows:
        from .heatmap import plot_grid

        rate = np.array([c["passed"] / c["runs"] if c["runs"] else np.nan for c in cells])
        mean = np.array([c["mean"] for c in cells], dtype=float)
        files.append(plot_grid(axes, rate, mean, figure, store.folder / HEATMAP, title))
    passed = sum(1 for r in rows if r["passed"])
    interval = wilson_interval(passed, len(rows)) if samples and rows else None
    tables = tuple(summary_tables(axes, spreads, samples, figure, cells, rows))
    return SweepReport(folder=store.folder, total=len(points), finished=len(rows), ran=ran,
                       skipped=skipped, passed=passed, success_interval=interval,
                       interrupted=interrupted, tables=tables, files=tuple(files))


def cell_summaries(rows: Sequence[dict[str, Any]], cells: int,
                   figure: str) -> list[dict[str, Any]]:
    """Per grid cell: runs, passes, and the mean and largest ``figure`` (NaN if none)."""
    out = [{"runs": 0, "passed": 0, "values": [], "statuses": []} for _ in range(cells)]
    for row in rows:
        cell = out[row["cell"]]
        cell["runs"] += 1
        cell["passed"] += bool(row["passed"])
        cell["statuses"].append(row["status"])
        if row.get(figure) is not None:
            cell["values"].append(float(row[figure]))
    for cell in out:
        values = cell["values"]
        cell["mean"] = float(np.mean(values)) if values else math.nan
        cell["max"] = float(np.max(values)) if values else math.nan
    return out


def _num(value: float) -> str:
    return "-" if value is None or not math.isfinite(value) else fmt(value)


def _rate(passed: int, runs: int) -> tuple[str, str]:
    if not runs:
        return "-", "-"
    low, high = wilson_interval(passed, runs)
    return f"{100 * passed / runs:.1f} %", f"{100 * low:.1f}-{100 * high:.1f} %"


def summary_tables(axes: Sequence[Axis], spreads: Sequence[Spread], samples: int, figure: str,
                   cells: Sequence[dict[str, Any]], rows: Sequence[dict[str, Any]]
                   ) -> list[TextTable]:
    """Tables for the terminal: per grid cell, or the Monte Carlo totals and failures."""
    tables = []
    if axes:
        keys = tuple(a.key for a in axes)
        grid = np.array(np.meshgrid(*(a.values for a in axes), indexing="ij")).reshape(
            len(axes), -1).T
        body = []
        for values, cell in zip(grid[:MAX_TABLE_ROWS], cells):
            shown = tuple(fmt(float(v)) for v in values)
            if samples:
                rate, interval = _rate(cell["passed"], cell["runs"])
                body.append((*shown, f"{cell['passed']}/{cell['runs']}", rate, interval,
                             _num(cell["mean"]), _num(cell["max"])))
            else:
                status = cell["statuses"][0] if cell["statuses"] else "not run"
                verdict = "-" if not cell["runs"] else ("yes" if cell["passed"] else "no")
                body.append((*shown, status, verdict, _num(cell["mean"])))
        header = ((*keys, "passed", "rate", "95 % interval", f"{figure} mean", "max")
                  if samples else (*keys, "status", "passed", figure))
        title = (f"first {MAX_TABLE_ROWS} of {len(cells)} grid cells (all in {RESULTS})"
                 if len(cells) > MAX_TABLE_ROWS else "")
        tables.append(TextTable(title, header, tuple(body)))
    elif samples:
        runs = len(rows)
        passed = sum(1 for r in rows if r["passed"])
        rate, interval = _rate(passed, runs)
        values = [float(r[figure]) for r in rows if r.get(figure) is not None]
        tables.append(TextTable("", ("runs", "passed", "rate", "95 % interval",
                                     f"{figure} median", "max"),
                                ((str(runs), str(passed), rate, interval,
                                  _num(float(np.median(values))) if values else "-",
                                  _num(max(values)) if values else "-"),)))
    failures = [r for r in rows if not r["passed"]]
    if samples and spreads and failures:
        keys = tuple(s.key for s in spreads)
        shown = [(str(r["index"]), *(fmt(float(r["values"][k])) for k in keys), r["status"],
                  _num(r.get("fell_at_s"))) for r in failures[:10]]
        title = "failed draws" + (f" (first 10 of {len(failures)})" if len(failures) > 10 else "")
        tables.append(TextTable(title, ("point", *keys, "status", "fell at s"), tuple(shown)))
    return tables


# --------------------------------------------------------------------- the command


def controller_label(controller: str) -> str:
    path, class_name = split_controller(controller)
    return Path(path).stem + (f"-{class_name}" if class_name else "")


def check_config_keys(spec: RobotSpec, settings: RunSettings, keys: dict[str, float],
                      option: str) -> None:
    """Refuse config keys the controller never reads, found with one short probe run
    (0.05 s, no folder) before any work starts. ``keys``: config keys (without the
    ``config.`` prefix) that the sweep or tuning varies, with a value each takes, besides
    ``settings.config``."""
    from ..session import run_once

    config = {**settings.config}
    for key, value in keys.items():
        config.setdefault(key, value)
    if not config:
        return
    probe = run_once(spec, replace(settings, config=config, duration=0.05), write=False)
    unread = probe.summary.get("unread_config_keys") or []
    if unread:
        raise SweepError("; ".join(item["text"] for item in unread)
                         + f": nothing would change between the {option} points; fix the key "
                         "name (see the script's config.get calls)")


def sweep_command(spec: RobotSpec, settings: RunSettings, *, vary: Sequence[str] = (),
                  spread: Sequence[str] = (), samples: int = 0, test: str | None = None,
                  duration_given: bool = False, workers: int | None = None,
                  cluster: str | None = None, out: Path | None = None,
                  figure: str = "max_abs_pitch_deg", progress: Progress | None = None,
                  runs_root: Path = Path("runs"), confirmed: bool = True) -> SweepReport:
    """``upright sweep``: parse ``--vary``/``--spread`` strings and run the sweep.

    A sweep beyond :data:`sandbox.bounds.MAX_SWEEP_RUNS` runs is refused, and one
    beyond :data:`sandbox.bounds.ASK_ABOVE_RUNS` unless ``confirmed`` (``--yes``),
    counted before any point is built.

    Default folder: ``runs/sweep-<robot>-<controller>-<test>-<time>/``. Raises
    SweepError (a ValueError) for unusable input.
    """
    import math
    import os

    from .. import bounds
    from ..record import default_run_dir

    axes = [parse_vary(v) for v in vary]
    spreads = [parse_spread(s) for s in spread]
    runs = math.prod(len(a.values) for a in axes) * max(samples, 1)
    bounds.sweep_size(runs, settings.duration, workers or os.cpu_count() or 1, confirmed)
    check_config_keys(spec, settings, {a.key.removeprefix("config."): a.values[0]
                                       for a in axes if a.key.startswith("config.")}, "sweep")
    folder = out or default_run_dir(runs_root, f"sweep-{spec.name}",
                                    controller_label(settings.controller), test or "none")
    return run_sweep(spec, settings, folder, axes=axes, spreads=spreads, samples=samples,
                     test=test, duration_given=duration_given, workers=workers,
                     cluster=cluster, figure=figure, progress=progress)
