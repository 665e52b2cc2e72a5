"""Gain tuning: a derivative-free search over controller gains against a cost.

The search works on z = log(gain / starting gain), so gains keep their sign,
every gain moves in relative steps whatever its size, and z = 0 is the start.
Each z is bounded to ±log(range_factor). scipy's Nelder–Mead (or Powell)
proposes points; one evaluation runs every chosen test (× repeats) with the
same seed each time (common random numbers: two gain sets differ only in their
gains) and averages the runs' costs. The runs of one evaluation, and the whole
starting simplex, run in parallel. At most ``max_evaluations`` distinct gain
sets run; a repeated point comes from a cache.

Cost of one run (weights in :class:`CostWeights`):
- it fell, or its controller failed: ``fall`` + ``fall_per_second`` × seconds of
  the run it missed. This dwarfs every other term, and among falling gain sets it
  still prefers those that stay up longer, so the search has a slope to follow;
- otherwise: ``failed_check`` × failed test checks + ``tilt_per_deg`` × time
  average of |tilt| in degrees + ``drift_per_m`` × RMS distance (m) from where
  the test's speed setpoints put the robot + ``effort`` × mean squared duty +
  ``saturation`` × fraction of ticks at full duty.
"""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import yaml

from ..robot import RobotSpec
from ..runner import STATUS_COMPLETED, STATUS_FELL, STATUS_INTERRUPTED, RunSettings
from ..tables import fmt
from .executors import open_executor
from .grid import TextTable, controller_label, make_common
from .jobs import PointJob, RunCommon, check_name
from .plan import CONFIG_PREFIX, SweepError, sample_seed
from .store import write_text_atomic

Progress = Callable[[int, int], None]
METHODS = {"nelder-mead": "Nelder-Mead", "powell": "Powell"}
BEST_CONFIG = "best_config.yaml"


@dataclass(frozen=True)
class CostWeights:
    """Weights of the tuning cost (see the module docstring)."""

    fall: float = 1000.0  # a run that falls or whose controller fails
    fall_per_second: float = 100.0  # ... plus this per second of the run it missed
    failed_check: float = 100.0  # each failed check of a run that stayed up
    tilt_per_deg: float = 1.0  # time average of |tilt|, per degree
    drift_per_m: float = 2.0  # RMS distance from the setpoint path, per metre
    effort: float = 5.0  # mean squared duty (1: full duty all the time)
    saturation: float = 10.0  # fraction of controller ticks at full duty


def run_cost(row: Mapping[str, Any], weights: CostWeights = CostWeights()) -> float:
    """The cost of one finished run's row (from :func:`sandbox.sweep.jobs.run_point`)."""
    if row["status"] != STATUS_COMPLETED:
        ended = row.get("fell_at_s") if row["status"] == STATUS_FELL else None
        if ended is None:
            ended = row.get("duration_s") or 0.0
        missed = max(float(row["planned_s"]) - float(ended), 0.0)
        return weights.fall + weights.fall_per_second * missed
    failed = sum(1 for check in row.get("checks", []) if not check["passed"])
    return (weights.failed_check * failed
            + weights.tilt_per_deg * (row.get("mean_abs_pitch_deg") or 0.0)
            + weights.drift_per_m * (row.get("tracking_rms_m") or 0.0)
            + weights.effort * (row.get("mean_sq_duty") or 0.0)
            + weights.saturation * (row.get("saturation_fraction") or 0.0))


@dataclass(frozen=True)
class Evaluation:
    """One gain set tried: its number, gains (by ``config.`` key), cost and runs."""

    number: int
    gains: dict[str, float]
    cost: float
    passed: bool  # every run passed its test
    runs: tuple[dict[str, Any], ...] = field(repr=False)


@dataclass(frozen=True)
class TuneResult:
    """Before and after of a tuning, the best config, and how the search went."""

    gains: tuple[str, ...]
    start: dict[str, float]
    best: dict[str, float]
    best_config: dict[str, Any]  # the full controller config (plain keys, for --config)
    before: Evaluation
    after: Evaluation
    evaluations: int
    history: tuple[Evaluation, ...]
    stopped: str  # "converged", "budget" or "interrupted"
    folder: Path | None
    files: tuple[Path, ...]
    tests: tuple[str, ...]

    @property
    def cost_before(self) -> float:
        return self.before.cost

    @property
    def cost_after(self) -> float:
        return self.after.cost

    def tables(self) -> tuple[TextTable, ...]:
        gains = tuple((k, fmt(self.start[k]), fmt(self.best[k]),
                       f"x{fmt(self.best[k] / self.start[k], 3)}") for k in self.gains)
        per_test = []
        for test in self.tests:
            before = [r for r in self.before.runs if r["test"] == test]
            after = [r for r in self.after.runs if r["test"] == test]
            per_test.append((test, _verdicts(before), _verdicts(after),
                             _mean(before, "max_abs_pitch_deg"), _mean(after, "max_abs_pitch_deg"),
                             _mean(before, "max_drift_m"), _mean(after, "max_drift_m"),
                             fmt(_mean_cost(before)), fmt(_mean_cost(after))))
        return (TextTable("gains", ("key", "start", "tuned", "change"), gains),
                TextTable("tests, before -> after",
                          ("test", "before", "after", "max tilt deg", "(after)",
                           "max drift m", "(after)", "cost", "(after)"), tuple(per_test)))

    def text(self) -> str:
        parts = [t.text() for t in self.tables()]
        parts.append(f"cost {fmt(self.cost_before)} -> {fmt(self.cost_after)} after "
                     f"{self.evaluations} evaluations ({self.stopped})")
        if self.files:
            parts.append("results in " + ", ".join(str(f) for f in self.files))
        return "\n\n".join(parts)


def _verdicts(runs: Sequence[dict[str, Any]]) -> str:
    if len(runs) == 1:
        run = runs[0]
        return verdict_text(run)
    return f"{sum(1 for r in runs if r['passed'])}/{len(runs)} passed"


def verdict_text(run: Mapping[str, Any]) -> str:
    """A run's verdict in words: passed, fell (when), the controller failed, or the checks
    it failed (a run that stayed up but missed a limit)."""
    if run["passed"]:
        return "passed"
    status = run["status"]
    if status == "fell":
        when = run.get("fell_at_s")
        return "fell" + ("" if when is None else f" at {float(when):.2f} s")
    if status != "completed":
        return status.replace("_", " ")
    missed = [check_name(c) for c in run.get("checks", []) if not c["passed"]]
    return "failed: " + ", ".join(missed) if missed else "failed"


def _mean(runs: Sequence[dict[str, Any]], key: str) -> str:
    values = [float(r[key]) for r in runs if r.get(key) is not None]
    return fmt(float(np.mean(values)), 3) if values else "-"


def _mean_cost(runs: Sequence[dict[str, Any]]) -> float:
    return float(np.mean([r["cost"] for r in runs]))


class _OutOfBudget(Exception):
    """The evaluation budget is spent (ends the optimiser early)."""


class _Interrupted(Exception):
    """A run came back interrupted (Ctrl-C inside an in-process run)."""


class _Search:
    """Evaluates gain sets (cached, counted, in parallel) for the optimiser."""

    def __init__(self, pool, keys: Sequence[str], start: Mapping[str, float],
                 tests: Sequence[str], seeds: Sequence[int], weights: CostWeights,
                 budget: int, progress: Progress | None):
        self.pool, self.keys, self.start = pool, list(keys), dict(start)
        self.tests, self.seeds, self.weights = list(tests), list(seeds), weights
        self.budget, self.progress = budget, progress
        self.cache: dict[tuple[float, ...], Evaluation] = {}
        self.history: list[Evaluation] = []
        self.next_job = 0

    def gains(self, z: Sequence[float]) -> dict[str, float]:
        return {k: self.start[k] * math.exp(float(v)) for k, v in zip(self.keys, z)}

    @staticmethod
    def _key(z: Sequence[float]) -> tuple[float, ...]:
        return tuple(round(float(v), 12) for v in z)

    def evaluate_many(self, zs: Sequence[Sequence[float]]) -> list[float]:
        """Costs of several gain sets; their runs go to the workers together."""
        fresh: list[tuple[float, ...]] = []
        for z in zs:
            key = self._key(z)
            if key not in self.cache and key not in fresh:
                fresh.append(key)
        room = self.budget - len(self.history)
        short = len(fresh) > room
        fresh = fresh[:max(room, 0)]
        jobs: dict[int, tuple[tuple[float, ...], str]] = {}
        batch = []
        for key in fresh:
            config = {k[len(CONFIG_PREFIX):]: v for k, v in self.gains(key).items()}
            for test in self.tests:
                for seed in self.seeds:
                    jobs[self.next_job] = (key, test)
                    batch.append(PointJob(self.next_job, {}, config, seed, test))
                    self.next_job += 1
        rows: dict[tuple[float, ...], list[dict[str, Any]]] = {key: [] for key in fresh}
        for job, row in self.pool.map_unordered(batch):
            if row["status"] == STATUS_INTERRUPTED:
                raise _Interrupted
            rows[jobs[job.index][0]].append({**row, "cost": run_cost(row, self.weights)})
        for key in fresh:
            runs = sorted(rows[key], key=lambda r: r["index"])
            evaluation = Evaluation(len(self.history), self.gains(key),
                                    float(np.mean([r["cost"] for r in runs])),
                                    all(r["passed"] for r in runs), tuple(runs))
            self.cache[key] = evaluation
            self.history.append(evaluation)
            if self.progress:
                self.progress(len(self.history), self.budget)
        if short:
            raise _OutOfBudget
        return [self.cache[self._key(z)].cost for z in zs]

    def cost(self, z: np.ndarray) -> float:
        return self.evaluate_many([z])[0]


def gain_keys(gains: Sequence[str]) -> list[str]:
    """``kp`` or ``config.kp`` -> ``config.kp``; robot keys are not gains."""
    keys = []
    for gain in gains:
        gain = gain.strip()
        key = gain if gain.startswith(CONFIG_PREFIX) else CONFIG_PREFIX + gain
        if key == CONFIG_PREFIX or "=" in key:
            raise SweepError(f"gain {gain!r}: give a controller config key such as config.kp")
        if key in keys:
            raise SweepError(f"gain {key} is listed twice")
        keys.append(key)
    if not keys:
        raise SweepError("name at least one gain to tune, e.g. config.kp")
    return keys


def starting_gains(spec: RobotSpec, settings: RunSettings, keys: Sequence[str],
                   start: Mapping[str, float]) -> dict[str, float]:
    """Start values: given > the config > the controller's attribute of the same name
    after construction (the default it worked out for this robot)."""
    from ..contract import RobotFacts
    from ..scripts import controller_rate, load_controller_class, make_controller

    given = {(k if k.startswith(CONFIG_PREFIX) else CONFIG_PREFIX + k): float(v)
             for k, v in start.items()}
    unknown = set(given) - set(keys)
    if unknown:
        raise SweepError(f"start values for keys not tuned: {', '.join(sorted(unknown))}")
    out: dict[str, float] = {}
    controller = None
    for key in keys:
        name = key[len(CONFIG_PREFIX):]
        value = given.get(key, settings.config.get(name))
        if value is None:
            if controller is None:
                cls = load_controller_class(settings.controller)
                rate = controller_rate(cls, settings.rate_hz)
                facts = RobotFacts.from_spec(spec, rate, settings.physics_dt)
                controller = make_controller(cls, settings.config, facts)
            value = getattr(controller, name, None)
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise SweepError(f"{key}: no starting value (not in the config, and the controller "
                             f"has no number attribute '{name}'); give one with --start "
                             f"{key}=VALUE")
        if not math.isfinite(value) or value == 0:
            raise SweepError(f"{key}: the starting value must be a finite, non-zero number "
                             f"(gains move in relative steps), got {value!r}")
        out[key] = float(value)
    return out


def tune(robot: RobotSpec, controller: str, *, gains: Sequence[str],
         tests: Sequence[str] = ("push",), start: Mapping[str, float] | None = None,
         seed: int = 0, workers: int | None = None, cluster: str | None = None,
         config: Mapping[str, Any] | None = None, settings: RunSettings | None = None,
         duration_given: bool = False, repeats: int = 1, method: str = "nelder-mead",
         max_evaluations: int = 40, range_factor: float = 10.0, initial_step: float = 0.4,
         weights: CostWeights = CostWeights(), folder: Path | None = None,
         progress: Progress | None = None) -> TuneResult:
    """Search ``gains`` (config keys) of ``controller`` on ``robot`` over ``tests``.

    ``settings`` carries the other run settings (rate, latency, physics step,
    tilt, duration with ``duration_given``); its controller, config and seed are
    replaced by the arguments. ``repeats`` > 1 runs each test with more seeds
    (derived from ``seed``). ``initial_step`` is the starting simplex's size in
    log units (0.4: gains × 1.5). With ``folder``: writes best_config.yaml (the
    whole config, for ``upright run --config``), history.csv and tune.json.
    """
    if method not in METHODS:
        raise SweepError(f"method {method!r}: choose one of {', '.join(METHODS)}")
    if max_evaluations < 2:
        raise SweepError(f"max evaluations must be 2 or more, got {max_evaluations}")
    if repeats < 1:
        raise SweepError(f"repeats must be 1 or more, got {repeats}")
    if not range_factor > 1.0:
        raise SweepError(f"range factor must be above 1, got {range_factor}")
    if seed < 0:
        raise SweepError(f"the seed must be zero or more, got {seed}")
    tests = list(tests)
    if not tests:
        raise SweepError("name at least one test to tune on")
    keys = gain_keys(gains)
    base = replace(settings or RunSettings(controller=controller), controller=controller,
                   config=dict(config if config is not None else
                               (settings.config if settings else {})), seed=seed)
    start_gains = starting_gains(robot, base, keys, start or {})
    common: RunCommon = make_common(robot, base, tests, duration_given)
    seeds = [seed] + [sample_seed(seed, r) for r in range(1, repeats)]
    limit = math.log(range_factor)
    n = len(keys)
    stopped = "converged"
    with open_executor(common, workers=workers, cluster=cluster,
                       jobs=len(tests) * repeats * (n + 1)) as pool:
        search = _Search(pool, keys, start_gains, tests, seeds, weights, max_evaluations,
                         progress)
        try:
            stopped = _optimise(search, METHODS[method], n, limit, initial_step,
                                max_evaluations)
        except _OutOfBudget:
            stopped = "budget"
        except (_Interrupted, KeyboardInterrupt):
            stopped = "interrupted"
            pool.close(cancel=True)
    if not search.history:
        raise KeyboardInterrupt  # interrupted before the start was even measured
    history = tuple(search.history)
    best = min(history, key=lambda e: (e.cost, e.number))
    best_config = {**base.config, **{k[len(CONFIG_PREFIX):]: v for k, v in best.gains.items()}}
    result = TuneResult(gains=tuple(keys), start=start_gains, best=dict(best.gains),
                        best_config=best_config, before=history[0], after=best,
                        evaluations=len(history), history=history, stopped=stopped,
                        folder=folder, files=(), tests=tuple(tests))
    if folder is not None:
        result = replace(result, files=write_tune_folder(folder, result, robot, base, weights))
    return result


def _optimise(search: _Search, method: str, n: int, limit: float, initial_step: float,
              budget: int) -> str:
    from scipy.optimize import minimize

    zero = np.zeros(n)
    bounds = [(-limit, limit)] * n
    # scipy counts calls, cached ones too; _Search enforces the budget of distinct gain sets
    calls = 10 * budget
    if method == "Nelder-Mead":
        step = min(initial_step, limit)
        simplex = np.vstack([zero, step * np.eye(n)])
        search.evaluate_many(list(simplex))  # the start and its neighbours in parallel
        options = {"initial_simplex": simplex, "maxfev": calls, "xatol": 0.02, "fatol": 0.01}
    else:
        search.evaluate_many([zero])
        options = {"maxfev": calls, "xtol": 0.02, "ftol": 1e-3}
    outcome = minimize(search.cost, zero, method=method, bounds=bounds, options=options)
    return "converged" if outcome.success else "budget"


def write_tune_folder(folder: Path, result: TuneResult, robot: RobotSpec, base: RunSettings,
                      weights: CostWeights) -> tuple[Path, ...]:
    """best_config.yaml, history.csv and tune.json; returns their paths."""
    folder.mkdir(parents=True, exist_ok=True)
    config_path = folder / BEST_CONFIG
    header = (f"# Controller config tuned by upright on {robot.name} ({', '.join(result.tests)});"
              f"\n# cost {result.cost_before:.6g} -> {result.cost_after:.6g}. "
              f"Use: upright run ROBOT CONTROLLER --config {BEST_CONFIG}\n")
    write_text_atomic(config_path, header + yaml.safe_dump(
        {k: _plain_number(v) for k, v in result.best_config.items()}, sort_keys=False))
    history_path = folder / "history.csv"
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(["evaluation", *result.gains, "cost", "passed"])
    for e in result.history:
        writer.writerow([e.number, *(repr(e.gains[k]) for k in result.gains), repr(e.cost),
                         e.passed])
    write_text_atomic(history_path, buffer.getvalue())
    summary_path = folder / "tune.json"
    summary = {
        "robot": robot.name,
        "controller": base.controller,
        "tests": list(result.tests),
        "seed": base.seed,
        "gains": list(result.gains),
        "start": result.start,
        "best": result.best,
        "best_config": result.best_config,
        "cost_before": result.cost_before,
        "cost_after": result.cost_after,
        "evaluations": result.evaluations,
        "stopped": result.stopped,
        "weights": asdict(weights),
        "before": [_run_summary(r) for r in result.before.runs],
        "after": [_run_summary(r) for r in result.after.runs],
    }
    write_text_atomic(summary_path, json.dumps(summary, indent=2))
    return config_path, history_path, summary_path


def _plain_number(value: Any) -> Any:
    return float(value) if isinstance(value, (np.floating, float)) else value


def _run_summary(row: Mapping[str, Any]) -> dict[str, Any]:
    keep = ("test", "seed", "status", "passed", "fell_at_s", "max_abs_pitch_deg",
            "rms_pitch_deg", "drift_m", "max_drift_m", "saturation_fraction",
            "mean_abs_pitch_deg", "tracking_rms_m", "mean_sq_duty", "cost", "checks")
    return {k: row.get(k) for k in keep}


def tune_command(spec: RobotSpec, settings: RunSettings, *, gains: Sequence[str],
                 tests: Sequence[str] = ("push",), start: Sequence[str] = (),
                 method: str = "nelder-mead", max_evaluations: int = 40, repeats: int = 1,
                 duration_given: bool = False, workers: int | None = None,
                 cluster: str | None = None, out: Path | None = None,
                 progress: Progress | None = None, runs_root: Path = Path("runs")) -> TuneResult:
    """``upright tune``: parse ``--start KEY=VALUE`` strings and tune into a folder.

    ``settings`` as for ``upright run`` (controller, config from --config/--set,
    seed, rate...). Default folder: ``runs/tune-<robot>-<controller>-<tests>-<time>/``.
    """
    from ..record import default_run_dir
    from ..robot import value_to_si

    start_values: dict[str, float] = {}
    for item in start:
        key, sep, text = item.partition("=")
        try:
            start_values[key.strip()] = value_to_si(key.strip(), text.strip())  # as --set
        except ValueError:
            sep = ""
        if not sep or not key.strip():
            raise SweepError(f"--start {item!r}: expected KEY=NUMBER (or a value with a unit, "
                             "SI base units), e.g. config.kp=8")
    from .grid import check_config_keys

    check_config_keys(spec, settings, {
        g.removeprefix("config."): start_values.get(g, 1.0) for g in gains
        if g.startswith("config.")}, "tune")
    folder = out or default_run_dir(runs_root, f"tune-{spec.name}",
                                    controller_label(settings.controller), "+".join(tests))
    return tune(spec, settings.controller, gains=gains, tests=tests, start=start_values,
                seed=settings.seed, workers=workers, cluster=cluster, config=settings.config,
                settings=settings, duration_given=duration_given, repeats=repeats,
                method=method, max_evaluations=max_evaluations, folder=folder,
                progress=progress)
