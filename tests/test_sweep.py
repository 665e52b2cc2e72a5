"""Sweeps, Monte Carlo, tuning and executors (sandbox.sweep).

Statistics are checked against closed forms and independent root finding;
sweep rows against plain ``run_once`` calls; executors against each other
(byte-identical results.csv); resume by counting the runs a controller sees.
"""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path

import numpy as np
import pytest
import yaml

from sandbox.events import builtin_tests
from sandbox.robot import load_robot
from sandbox.runner import RunSettings
from sandbox.session import run_once
from sandbox.sweep import (
    CostWeights,
    ProgressClock,
    Spread,
    SweepError,
    make_points,
    parse_spread,
    parse_vary,
    run_cost,
    sweep_command,
    tune,
    wilson_interval,
)
from sandbox.sweep.jobs import check_column, check_slug, expected_distance
from sandbox.sweep.store import POINTS

ROOT = Path(__file__).resolve().parents[1]
SHELF_RUNNER = ROOT / "robots" / "shelf-runner.yaml"
PID_TILT = ROOT / "controllers" / "pid_tilt.py"
HELPERS = Path(__file__).resolve().parent / "controllers"
Z95 = 1.959964  # two-sided 95 % normal quantile [published: standard normal tables]

COUNTING_CONTROLLER = '''
"""Zero duty; appends one line to config["count_file"] each time it is built (one per run)."""


class Controller:
    rate_hz = 200

    def __init__(self, config, robot):
        self.kp = config.get("kp")  # read: the sweep checks its keys are
        with open(config["count_file"], "a") as stream:
            stream.write("run\\n")

    def step(self, r):
        return 0.0, 0.0
'''


@pytest.fixture(scope="module")
def shelf_runner():
    return load_robot(SHELF_RUNNER)


@pytest.fixture(scope="module")
def short_push(tmp_path_factory, shelf_runner) -> Path:
    """A 3 s test: the built-in push test's shove, forward at 0.5 s and back at 1.5 s."""
    impulse = builtin_tests(shelf_runner)["push"].events[0].push.impulse
    path = tmp_path_factory.mktemp("tests") / "short-push.yaml"
    path.write_text(yaml.safe_dump({
        "name": "short-push", "duration": 3.0,
        "events": [{"at": 0.5, "push": {"impulse": impulse}},
                   {"at": 1.5, "push": {"impulse": impulse, "direction": "backward"}}],
        "criteria": {"recover_within": 1.5, "max_drift": 0.5}}), encoding="utf-8")
    return path


def _read_csv(path: Path, unit_row: bool = True) -> list[dict[str, str]]:
    rows = list(csv.DictReader(io.StringIO(path.read_text(encoding="utf-8"))))
    if not unit_row:
        return rows
    assert rows[0]["index"] == "unit:", "the second header row gives the units"
    return rows[1:]


# --------------------------------------------------------------------- statistics


def test_wilson_interval_known_case():
    """Wilson score interval, 8 of 10 at 95 %: (0.4902, 0.9433).

    Source: the closed form of Wilson (1927), as given by Agresti & Coull (1998),
    evaluated by hand with z = 1.959964 [derived]. Independently, each end must
    solve the score test's equation (p̂ − p)² = z² p (1 − p) / n, found here by
    scipy's brentq root finder on either side of p̂ [derived from the definition].
    """
    from scipy.optimize import brentq

    low, high = wilson_interval(8, 10)
    assert low == pytest.approx(0.4902, abs=5e-5), "lower end of the 8/10 interval"
    assert high == pytest.approx(0.9433, abs=5e-5), "upper end of the 8/10 interval"

    def score(p: float) -> float:
        return (0.8 - p) ** 2 - Z95**2 * p * (1 - p) / 10

    assert low == pytest.approx(brentq(score, 1e-9, 0.8), abs=1e-6), "lower end vs score test"
    assert high == pytest.approx(brentq(score, 0.8, 1 - 1e-9), abs=1e-6), \
        "upper end vs score test"
    try:  # a third opinion where statsmodels is installed (it is not a dependency)
        from statsmodels.stats.proportion import proportion_confint
    except ImportError:
        return
    ref = proportion_confint(8, 10, alpha=0.05, method="wilson")
    assert (low, high) == pytest.approx(ref, abs=1e-9), "Wilson interval vs statsmodels"


def test_wilson_interval_edges():
    """At 0/n the interval is [0, z²/(n + z²)], at n/n [n/(n + z²), 1] (Wilson closed form
    with p̂ = 0 or 1 [derived]): for n = 10, 0.277535 and 0.722465."""
    low, high = wilson_interval(0, 10)
    assert low == 0.0, "lower end at 0/10"
    assert high == pytest.approx(Z95**2 / (10 + Z95**2), abs=1e-6), "upper end at 0/10"
    low, high = wilson_interval(10, 10)
    assert high == 1.0, "upper end at 10/10"
    assert low == pytest.approx(10 / (10 + Z95**2), abs=1e-6), "lower end at 10/10"
    with pytest.raises(ValueError, match="successes"):
        wilson_interval(11, 10)


def test_progress_clock_rate_and_time_left():
    """Rate counts only runs finished after the first update (resumed points excluded)."""
    now = [100.0]
    clock = ProgressClock(clock=lambda: now[0])
    assert clock.update(4, 20) == (None, None), "first update only starts the clock"
    now[0] = 104.0
    rate, left = clock.update(12, 20)
    assert rate == pytest.approx(2.0), "8 runs in 4 s"
    assert left == pytest.approx(4.0), "8 runs left at 2 per second"


# --------------------------------------------------------------------- parsing and points


def test_parse_vary_forms_and_errors():
    """START:STOP:N gives N evenly spaced values (ends included, 12 significant figures)."""
    axis = parse_vary("wheels.friction=0.3:0.9:4")
    assert axis.key == "wheels.friction"
    assert axis.values == (0.3, 0.5, 0.7, 0.9)
    assert parse_vary("config.kp=5,7.5,10").values == (5.0, 7.5, 10.0)
    assert parse_vary("config.kp=3:3:1").values == (3.0,)
    for bad, words in (("wheels.friction", "KEY=START"), ("config.kp=1:2:0", "n .* must"),
                       ("config.kp=a:2:3", "not a number"), ("=1:2:3", "dotted key"),
                       ("wheels..friction=1:2:2", "dotted key"), ("config.kp=1:2", "START")):
        with pytest.raises(SweepError, match=words):
            parse_vary(bad)


def test_parse_spread_forms_and_errors():
    """±X% is relative (a fraction), ±X absolute; '+-' stands for '±'."""
    assert parse_spread("body.parts.0.mass=±5%") == Spread("body.parts.0.mass", 0.05, True)
    assert parse_spread("wheels.friction=+-0.1") == Spread("wheels.friction", 0.1, False)
    assert parse_spread("config.kp=10%") == Spread("config.kp", 0.1, True)
    for bad in ("wheels.friction=±abc", "wheels.friction=±150%", "wheels.friction"):
        with pytest.raises(SweepError):
            parse_spread(bad)


def test_spread_sampling_reproducible_and_bounded():
    """Draws stay within ±X of nominal, repeat with the seed, differ with another seed,
    and do not depend on the order or presence of other spreads (per-key generators)."""
    nominal = {"body.parts.0.mass": 0.26, "wheels.friction": 0.9}.__getitem__
    spreads = [Spread("body.parts.0.mass", 0.05, True), Spread("wheels.friction", 0.1, False)]
    points = make_points([], spreads, 200, 7, nominal)
    again = make_points([], spreads, 200, 7, nominal)
    assert [p.values for p in points] == [p.values for p in again], "same seed, same draws"
    assert [p.seed for p in points] == [p.seed for p in again], "same seed, same run seeds"
    other = make_points([], spreads, 200, 8, nominal)
    assert [p.values for p in points] != [p.values for p in other], "another seed differs"
    mass = np.array([p.values["body.parts.0.mass"] for p in points])
    friction = np.array([p.values["wheels.friction"] for p in points])
    assert np.all(np.abs(mass - 0.26) <= 0.05 * 0.26 + 1e-15), "mass within ±5 %"
    assert np.all(np.abs(friction - 0.9) <= 0.1 + 1e-15), "friction within ±0.1"
    # 200 uniform draws cover the range: each end within 10 % of the width
    assert mass.min() < 0.26 * 0.96 and mass.max() > 0.26 * 1.04, "mass draws span the range"
    assert len({p.seed for p in points}) == 200, "every sample has its own run seed"
    swapped = make_points([], spreads[::-1], 200, 7, nominal)
    alone = make_points([], spreads[1:], 200, 7, nominal)
    assert [p.values for p in swapped] == [p.values for p in points], "order of --spread"
    assert [p.values["wheels.friction"] for p in alone] == friction.tolist(), \
        "a key's draws do not depend on other keys"


def test_grid_points_row_major_with_samples():
    """Cells are row-major (last --vary fastest); every cell sees the same samples."""
    axes = [parse_vary("config.kp=1,2"), parse_vary("wheels.friction=0.5,0.9")]
    spreads = [Spread("body.parts.0.mass", 0.1, True)]
    points = make_points(axes, spreads, 3, 0, lambda key: 0.26)
    assert [p.index for p in points] == list(range(12))
    assert [(p.values["config.kp"], p.values["wheels.friction"]) for p in points[::3]] == [
        (1.0, 0.5), (1.0, 0.9), (2.0, 0.5), (2.0, 0.9)]
    first_cell = [p.values["body.parts.0.mass"] for p in points[:3]]
    last_cell = [p.values["body.parts.0.mass"] for p in points[9:]]
    assert first_cell == last_cell, "common random numbers across cells"
    with pytest.raises(SweepError, match="--samples"):
        make_points([], spreads, 0, 0, lambda key: 1.0)


def test_expected_distance_and_check_columns():
    """A setpoint of 0.5 m/s from t = 1 s puts the robot 1 m ahead at t = 3 s
    (distance = ∫ v dt, exact for a held speed [derived])."""
    t = np.arange(0, 3.0001, 0.005)
    distance = expected_distance(t, [(1.0, 0.5)])
    assert distance[-1] == pytest.approx(1.0, abs=1e-9), "distance after 2 s at 0.5 m/s"
    assert distance[t < 1.0].max() == 0.0, "no distance before the setpoint"
    assert check_column({"label": "position held", "limit": "1.02 m"}) == \
        "check.position_held_m"
    assert check_column({"label": "stays up", "limit": "completed"}) == "check.stays_up"


def test_run_cost_weights():
    """The tuning cost is as documented: a fall costs 1000 + 100 per missed second; a run
    that stays up costs the weighted tilt, drift, effort, saturation and failed checks."""
    fell = {"status": "fell", "fell_at_s": 1.5, "planned_s": 4.0, "duration_s": 1.5}
    assert run_cost(fell) == pytest.approx(1000 + 100 * 2.5)
    error = {"status": "controller_error", "fell_at_s": None, "planned_s": 4.0,
             "duration_s": 1.0}
    assert run_cost(error) == pytest.approx(1000 + 100 * 3.0)
    ok = {"status": "completed", "planned_s": 4.0, "mean_abs_pitch_deg": 0.5,
          "tracking_rms_m": 0.25, "mean_sq_duty": 0.04, "saturation_fraction": 0.1,
          "checks": [{"passed": True}, {"passed": False}]}
    assert run_cost(ok) == pytest.approx(100 + 0.5 + 2 * 0.25 + 5 * 0.04 + 10 * 0.1)
    assert run_cost(ok, CostWeights(failed_check=0.0, effort=0.0, saturation=0.0)) == \
        pytest.approx(0.5 + 0.5)


# --------------------------------------------------------------------- sweeps


def test_two_point_grid_matches_separate_runs(tmp_path, shelf_runner, short_push):
    """Each grid row carries exactly the figures of a plain run_once with that value."""
    settings = RunSettings(controller=str(PID_TILT), seed=3)
    report = sweep_command(shelf_runner, settings, vary=["wheels.friction=0.4,0.9"],
                           test=str(short_push), workers=1, out=tmp_path / "grid")
    rows = _read_csv(tmp_path / "grid" / "results.csv")
    assert report.finished == 2 and len(rows) == 2
    for row, friction in zip(rows, (0.4, 0.9)):
        assert float(row["wheels.friction"]) == friction
        spec = load_robot(SHELF_RUNNER, {"wheels.friction": friction})
        alone = run_once(spec, settings, test=str(short_push), write=False)
        for name in ("max_abs_pitch_deg", "rms_pitch_deg", "drift_m", "max_drift_m",
                     "saturation_fraction", "mean_abs_duty", "duration_s"):
            assert float(row[name]) == alone.summary[name], f"{name} at friction {friction}"
        assert row["status"] == alone.status
        assert row["passed"] == str(int(alone.summary["test_result"]["passed"]))
        assert int(row["seed"]) == 3, "grid points run with the base seed"
        for check in alone.summary["test_result"]["checks"]:
            column = check_column(check)
            name = column.removeprefix("check.")
            assert row[f"passed.{check_slug(check)}"] == str(int(check["passed"]))
            if check["label"] != "stays up":
                assert float(row[f"measured.{name}"]) == check["value"], \
                    f"{column} at friction {friction}"


def test_resume_skips_finished_points(tmp_path, shelf_runner):
    """A rerun into the same folder runs only the points missing from points.jsonl
    (counted by a controller that appends a line per run, plus one for the short probe
    run each sweep makes of its config keys first); results.csv is unchanged."""
    script = tmp_path / "counting.py"
    script.write_text(COUNTING_CONTROLLER, encoding="utf-8")
    count_file = tmp_path / "count.txt"
    settings = RunSettings(controller=str(script), duration=0.05,
                           config={"count_file": str(count_file)})
    folder = tmp_path / "sweep"
    calls = []
    kwargs = dict(vary=["config.kp=1,2", "wheels.friction=0.5,0.9"], duration_given=True,
                  workers=1, out=folder, progress=lambda done, total: calls.append(done))
    first = sweep_command(shelf_runner, settings, **kwargs)
    runs = lambda: len(count_file.read_text().splitlines())  # noqa: E731
    assert runs() == 1 + 4 and first.ran == 4 and first.skipped == 0
    assert calls == [0, 1, 2, 3, 4], "progress before the first run and after each"
    assert (folder / "heatmap.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n", "2-D heatmap"
    table = (folder / "results.csv").read_text()
    lines = (folder / POINTS).read_text().splitlines()
    # a crash after two points, in the middle of writing the third
    (folder / POINTS).write_text("\n".join(lines[:2]) + "\n" + lines[2][:25], encoding="utf-8")
    second = sweep_command(shelf_runner, settings, **kwargs)
    assert runs() == 5 + 1 + 2, "only the two missing points ran again"
    assert (second.ran, second.skipped, second.finished) == (2, 2, 4)
    assert (folder / "results.csv").read_text() == table, "same table after resuming"
    third = sweep_command(shelf_runner, settings, **kwargs)
    assert runs() == 8 + 1 and third.ran == 0 and third.skipped == 4, "nothing left to run"
    with pytest.raises(SweepError, match="different sweep"):
        sweep_command(shelf_runner, settings, **{**kwargs, "vary": ["config.kp=1,3"]})


def test_interrupted_point_is_not_recorded(tmp_path, shelf_runner):
    """Ctrl-C during a run stops the sweep; the interrupted point is not marked done."""
    settings = RunSettings(controller=str(HELPERS / "interrupts.py"), duration=0.2)
    report = sweep_command(shelf_runner, settings, vary=["config.at=5,0.05,5"],
                           duration_given=True, workers=1, out=tmp_path / "s")
    assert report.interrupted and report.finished == 1 and report.ran == 1
    stored = [json.loads(line) for line in (tmp_path / "s" / POINTS).read_text().splitlines()]
    assert [row["index"] for row in stored] == [0]
    assert "--out" in report.text()


def test_monte_carlo_sweep_rows_and_rate(tmp_path, shelf_runner):
    """Monte Carlo rows hold the drawn values and own seeds; the report's interval is the
    Wilson interval of the pass count."""
    settings = RunSettings(controller=str(PID_TILT), duration=0.3, seed=11)
    report = sweep_command(shelf_runner, settings, samples=4,
                           spread=["body.parts.0.mass=±10%", "wheels.friction=±0.2"],
                           duration_given=True, workers=1, out=tmp_path / "mc")
    rows = _read_csv(tmp_path / "mc" / "results.csv")
    nominal = {"body.parts.0.mass": 0.26, "wheels.friction": 0.9}.__getitem__
    points = make_points([], [parse_spread("body.parts.0.mass=±10%"),
                              parse_spread("wheels.friction=±0.2")], 4, 11, nominal)
    for row, point in zip(rows, points):
        assert float(row["body.parts.0.mass"]) == point.values["body.parts.0.mass"]
        assert float(row["wheels.friction"]) == point.values["wheels.friction"]
        assert int(row["seed"]) == point.seed
    assert report.success_interval == wilson_interval(report.passed, 4)


def test_sweep_rejects_bad_input(tmp_path, shelf_runner):
    """Bad keys and values fail before any run, naming the point or the key."""
    settings = RunSettings(controller=str(PID_TILT), duration=0.1)
    with pytest.raises(SweepError, match="not a valid robot"):
        sweep_command(shelf_runner, settings, vary=["wheels.friction=-1,0.5"],
                      out=tmp_path / "a")
    with pytest.raises(SweepError, match="no value in the controller config"):
        sweep_command(shelf_runner, settings, samples=2, spread=["config.kp=±10%"],
                      out=tmp_path / "b")
    with pytest.raises(SweepError, match="nothing to sweep"):
        sweep_command(shelf_runner, settings, out=tmp_path / "c")
    with pytest.raises(SweepError, match="--figure"):
        sweep_command(shelf_runner, settings, vary=["config.kp=1,2"], figure="speed",
                      out=tmp_path / "d")
    assert not (tmp_path / "a").exists(), "no folder for a sweep that never started"


def test_local_processes_and_dask_write_identical_results(tmp_path, shelf_runner):
    """The same sweep in this process, in 2 local processes and on a 2-worker local Dask
    cluster writes byte-identical results.csv (seeded per point, sorted by point)."""
    pytest.importorskip("dask.distributed")
    settings = RunSettings(controller=str(PID_TILT), duration=0.3, seed=5)
    # 16 points: Dask tasks then carry two runs each, local processes one
    kwargs = dict(vary=["config.kp=8:14:4"], samples=4, spread=["wheels.friction=±0.2"],
                  duration_given=True)
    tables = {}
    for name, extra in (("inline", {"workers": 1}), ("local", {"workers": 2}),
                        ("dask", {"workers": 2, "cluster": "local"})):
        sweep_command(shelf_runner, settings, out=tmp_path / name, **kwargs, **extra)
        tables[name] = (tmp_path / name / "results.csv").read_text()
    assert tables["local"] == tables["inline"], "local processes vs this process"
    assert tables["dask"] == tables["local"], "Dask cluster vs local processes"


# --------------------------------------------------------------------- tuning


def _poor_start(shelf_runner) -> dict[str, float]:
    """kp at 0.3 of pid_tilt's own starting gain for this robot: it falls when pushed."""
    from sandbox.control import RobotFacts, load_controller_class, make_controller

    cls = load_controller_class(str(PID_TILT))
    default = make_controller(cls, {}, RobotFacts.from_spec(shelf_runner, 200.0, 1e-3)).kp
    return {"config.kp": 0.3 * default}


def test_tune_improves_poor_gains_short(tmp_path, shelf_runner, short_push):
    """From a kp that falls on the short push test, a dozen Nelder–Mead evaluations find
    gains that pass it; best_config.yaml reproduces the tuned run exactly."""
    result = tune(shelf_runner, str(PID_TILT), gains=["config.kp", "config.kd"],
                  tests=[str(short_push)], start=_poor_start(shelf_runner), seed=0,
                  workers=1, max_evaluations=12, folder=tmp_path / "tune")
    assert result.before.runs[0]["status"] == "fell", "the poor start falls"
    assert result.cost_before >= 1000.0
    assert result.cost_after < result.cost_before, "tuning lowered the cost"
    assert result.after.passed, "the tuned gains pass the test they were tuned on"
    assert result.evaluations <= 12, "evaluation budget"
    config = yaml.safe_load((tmp_path / "tune" / "best_config.yaml").read_text())
    assert config["kp"] == result.best["config.kp"] and config["kd"] == result.best["config.kd"]
    again = run_once(shelf_runner, RunSettings(controller=str(PID_TILT), config=config, seed=0),
                     test=str(short_push), write=False)
    assert again.summary["test_result"]["passed"], "best_config.yaml passes in a plain run"
    assert again.summary["max_abs_pitch_deg"] == result.after.runs[0]["max_abs_pitch_deg"]
    history = _read_csv(tmp_path / "tune" / "history.csv", unit_row=False)
    assert len(history) == result.evaluations
    assert not math.isnan(json.loads((tmp_path / "tune" / "tune.json").read_text())
                          ["cost_after"])


@pytest.mark.slow
def test_tune_on_builtin_push_two_workers(tmp_path, shelf_runner):
    """The full built-in push test (10 s, three shoves), two local workers: the tuned gains
    pass where the poor start falls."""
    result = tune(shelf_runner, str(PID_TILT), gains=["config.kp", "config.kd"],
                  tests=["push"], start=_poor_start(shelf_runner), seed=0, workers=2,
                  max_evaluations=30, folder=tmp_path / "tune")
    assert result.before.runs[0]["status"] == "fell"
    assert result.after.passed and result.cost_after < result.cost_before
