"""The hostile-input suite: arguments and controller scripts that once hung, traced back,
exited 0 on a failure or lost what was recorded, each with the exit code and message it
must give now and what must survive.

Hostile files (alias bombs, exponent towers, huge numbers, duplicate keys, binary files)
are in tests/test_file_checks.py; an endless step under ``--isolate`` in
tests/test_isolate_cli.py.
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
import textwrap
from pathlib import Path

import pytest
from typer.testing import CliRunner

from sandbox.cli import app

ROOT = Path(__file__).resolve().parents[1]
ROBOT = str(ROOT / "robots" / "shelf-runner.yaml")
CASCADE = str(ROOT / "controllers" / "cascade.py")
GRID = "config.tilt_kp=1..2,n=10000"

# (arguments after the command, message fragment): each is refused with exit 2 at once
BAD_ARGUMENTS = {
    "duration-inf": (["run", ROBOT, CASCADE, "--duration", "inf"], "--duration must be"),
    "duration-nan": (["run", ROBOT, CASCADE, "--duration", "nan"], "--duration must be"),
    "duration-huge": (["run", ROBOT, CASCADE, "--duration", "1e12"], "from 0.001 to 3600 s"),
    "duration-negative": (["run", ROBOT, CASCADE, "--duration", "-1"], "--duration must be"),
    "physics-step-tiny": (["run", ROBOT, CASCADE, "--physics-step", "1e-7"],
                          "--physics-step must be"),
    "too-many-steps": (["run", ROBOT, CASCADE, "--duration", "3000", "--physics-step", "0.1"],
                       "physics steps; at most"),
    "latency-nan": (["run", ROBOT, CASCADE, "--latency", "nan"], "--latency must be"),
    "fall-limit-nan": (["run", ROBOT, CASCADE, "--fall-limit", "nan"], "--fall-limit must be"),
    "tilt-nan": (["run", ROBOT, CASCADE, "--tilt", "nan"], "--tilt must be"),
    "rate-huge": (["run", ROBOT, CASCADE, "--rate", "1e9"], "--rate must be"),
    "step-timeout-nan": (["run", ROBOT, CASCADE, "--step-timeout", "nan"],
                         "--step-timeout must be"),
    "render-fps": (["render", "nowhere", "--fps", "1e9"], "--fps must be"),
    "render-size": (["render", "nowhere", "--size", "65536x65536"], "--size must be"),
    "render-size-digits": (["render", "nowhere", "--size", "9" * 5000 + "x16"],
                           "expected WIDTHxHEIGHT"),
    "grid-huge": (["sweep", ROBOT, CASCADE, "--vary", GRID, "--vary",
                   GRID.replace("tilt_kp", "tilt_kd"), "--vary",
                   GRID.replace("tilt_kp", "speed_kp")], "runs; at most 100,000"),
    "samples-huge": (["sweep", ROBOT, CASCADE, "--samples", "100000000", "--spread",
                      "wheels.radius=±1%"], "--samples must be"),
    "sweep-unconfirmed": (["sweep", ROBOT, CASCADE, "--samples", "3000", "--spread",
                           "wheels.radius=±1%"], "add --yes"),
    "workers-zero": (["sweep", ROBOT, CASCADE, "--samples", "2", "--workers", "0"],
                     "--workers must be"),
    "tune-evaluations": (["tune", ROBOT, CASCADE, "--gains", "config.tilt_kp",
                          "--max-evaluations", "0"], "--max-evaluations must be"),
    "margins-latency": (["margins", ROBOT, CASCADE, "--latency", "inf"], "--latency must be"),
}


@pytest.mark.parametrize("case", sorted(BAD_ARGUMENTS))
def test_bad_argument_is_refused_in_one_line(case: str, tmp_path: Path) -> None:
    """Exit 2, the option named with its range, one line, no traceback, nothing run."""
    args, fragment = BAD_ARGUMENTS[case]
    result = CliRunner().invoke(app, [*args, "--out", str(tmp_path / "out")]
                                if args[0] in ("run", "sweep") else args)
    assert result.exit_code == 2, (case, result.output)
    assert fragment in result.output, (case, result.output)
    assert "Traceback" not in result.output
    errors = [line for line in result.output.splitlines() if line.startswith("error")]
    assert len(errors) == 1, result.output  # (a sweep shows its axes first)
    assert not (tmp_path / "out" / "trace.csv").exists()


def _script(tmp_path: Path, name: str, body: str) -> Path:
    path = tmp_path / f"{name}.py"
    path.write_text(textwrap.dedent(body))
    return path


def _step_does(line: str, imports: str = "") -> str:
    return f"""
        {imports}
        class Controller:
            rate_hz = 200

            def __init__(self, config, robot):
                pass

            def step(self, r):
                if r.t >= 0.1:
                    {line}
                return 0.0, 0.0
    """


class Quit(BaseException):
    pass


# (script body, message fragment): each must end the run as a controller error
ENDINGS = {
    "sys-exit-0": (_step_does("sys.exit(0)", "import sys"), "called sys.exit(0)"),
    "os-exit-0": (_step_does("os._exit(0)", "import os"), "os._exit(0)"),
    "base-exception": (_step_does("raise Quit()", "class Quit(BaseException): pass"),
                       "raised Quit"),
    "keyboard-interrupt-raised": (_step_does("raise KeyboardInterrupt"),
                                  "raised KeyboardInterrupt"),
    "huge-integer-duty": (_step_does("return 10 ** 400, 0.0"), "step"),
}


def _upright(*args: str, timeout: float = 120.0) -> subprocess.CompletedProcess:
    """The command line as a whole process (an os._exit ends only that)."""
    return subprocess.run([sys.executable, "-m", "sandbox.cli", *args], cwd=ROOT,
                          capture_output=True, text=True, timeout=timeout,
                          env={**os.environ, "PYTHONPATH": str(ROOT)})


def _rows(folder: Path) -> list[list[str]]:
    with (folder / "trace.csv").open(newline="") as handle:
        return list(csv.reader(handle))[1:]


@pytest.mark.parametrize("isolate", [False, True], ids=["in-process", "isolated"])
@pytest.mark.parametrize("case", sorted(ENDINGS))
def test_every_way_a_controller_ends_is_a_controller_error(case: str, isolate: bool,
                                                           tmp_path: Path) -> None:
    """Exit 3, status controller_error, the cause named, summary and trace kept (the
    ticks before the ending all recorded)."""
    body, fragment = ENDINGS[case]
    script = _script(tmp_path, case.replace("-", "_"), body)
    out = tmp_path / "run"
    done = _upright("run", ROBOT, str(script), "--duration", "0.5", "--out", str(out),
                    "--no-plots", *(["--isolate"] if isolate else []))
    assert done.returncode == 3, (done.stdout, done.stderr)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["status"] == "controller_error"
    assert fragment in done.stdout + done.stderr, (done.stdout, done.stderr)
    assert "Traceback" not in done.stdout + done.stderr
    assert len(_rows(out)) >= 20  # the ticks before 0.1 s at 200 Hz


def test_a_raised_keyboard_interrupt_is_the_controllers_with_ctrl_c_ignored(
        tmp_path: Path) -> None:
    """Started with SIGINT ignored (nohup, a background job of a script), no Ctrl-C can
    reach upright: a KeyboardInterrupt the script raises is its error (exit 3), not the
    user's (it was reported as an interruption, exit 130)."""
    import signal

    body, fragment = ENDINGS["keyboard-interrupt-raised"]
    script = _script(tmp_path, "raises_interrupt", body)
    out = tmp_path / "run"
    done = subprocess.run(
        [sys.executable, "-m", "sandbox.cli", "run", ROBOT, str(script), "--duration", "0.5",
         "--out", str(out), "--no-plots"], cwd=ROOT, capture_output=True, text=True,
        timeout=120, env={**os.environ, "PYTHONPATH": str(ROOT)},
        preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_IGN))
    assert done.returncode == 3, (done.stdout, done.stderr)
    assert fragment in done.stdout + done.stderr


def test_unseeded_random_in_a_controller_is_still_reproducible(tmp_path: Path) -> None:
    """Python's `random` and numpy's global generator are seeded from the run's seed
    before the script is built: the same seed gives the same trace bytes."""
    script = _script(tmp_path, "noisy", """
        import random
        import numpy as np

        class Controller:
            rate_hz = 200

            def __init__(self, config, robot):
                pass

            def step(self, r):
                return 0.01 * random.random(), 0.01 * float(np.random.rand())
    """)
    traces = []
    for name in ("a", "b"):
        out = tmp_path / name
        result = CliRunner().invoke(app, ["run", ROBOT, str(script), "--duration", "0.3",
                                          "--out", str(out), "--no-plots"])
        assert result.exit_code in (0, 1), result.output
        traces.append((out / "trace.csv").read_bytes())
    assert traces[0] == traces[1]


def test_a_thread_left_running_does_not_keep_upright_alive(tmp_path: Path) -> None:
    """A controller that starts a non-daemon thread that never ends: the run still ends
    with its exit code, well within the time limit."""
    script = _script(tmp_path, "lingers", """
        import threading
        import time

        class Controller:
            rate_hz = 200

            def __init__(self, config, robot):
                threading.Thread(target=lambda: time.sleep(3600)).start()

            def step(self, r):
                return 0.0, 0.0
    """)
    done = _upright("run", ROBOT, str(script), "--duration", "0.3", "--out",
                    str(tmp_path / "run"), "--no-plots", "--isolate", timeout=60)
    assert done.returncode in (0, 1), done.stderr
    assert (tmp_path / "run" / "summary.json").is_file()


@pytest.mark.parametrize("isolate", [False, True], ids=["in-process", "isolated"])
def test_a_forking_controller_does_not_double_the_trace(isolate: bool, tmp_path: Path) -> None:
    """A script that forks in step: the child leaves at once and writes nothing into the
    trace; one row per tick (0.3 s at 200 Hz: 61 rows, t = 0 included)."""
    script = _script(tmp_path, "forks", """
        import os

        class Controller:
            rate_hz = 200

            def __init__(self, config, robot):
                self.forked = False

            def step(self, r):
                if not self.forked:
                    self.forked = True
                    if os.fork() == 0:
                        return 0.0, 0.0  # the child goes on as if it were the run
                return 0.0, 0.0
    """)
    out = tmp_path / "run"
    done = _upright("run", ROBOT, str(script), "--duration", "0.3", "--out", str(out),
                    "--no-plots", *(["--isolate"] if isolate else []), timeout=60)
    assert done.returncode in (0, 1), done.stderr
    times = [row[0] for row in _rows(out)]
    assert len(times) == len(set(times)) == 61


def test_concurrent_rewrites_share_no_scratch_file(tmp_path):
    """Five threads rewriting one results.csv 200 times each (the stress case of the issue,
    where 294 of 1000 rewrites failed on a shared results.csv.tmp): none fails, the file
    is whole, and no scratch file is left behind."""
    import threading

    from sandbox.sweep.store import write_text_atomic

    path = tmp_path / "results.csv"
    errors: list[BaseException] = []

    def rewrite(writer: int) -> None:
        for k in range(200):
            try:
                write_text_atomic(path, f"{writer},{k}\n" * 50)
            except OSError as err:
                errors.append(err)

    threads = [threading.Thread(target=rewrite, args=(i,)) for i in range(5)]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert errors == [], f"{len(errors)} of 1000 rewrites failed: {errors[:1]}"
    lines = path.read_text(encoding="utf-8").splitlines()
    assert len(lines) == 50 and len(set(lines)) == 1, "results.csv is torn"
    assert [p.name for p in tmp_path.iterdir()] == ["results.csv"]


def test_a_sweep_folder_another_live_sweep_holds_is_refused(tmp_path: Path) -> None:
    """A lock file naming a live process refuses a second sweep on that --out (exit 2,
    the holder named); a lock left by a process that has gone is taken over."""
    from sandbox.sweep.store import LOCK

    out = tmp_path / "sweep"
    out.mkdir()
    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        (out / LOCK).write_text(f"{holder.pid}\n")
        args = ["sweep", ROBOT, CASCADE, "--vary", "config.tilt_kp=10,12", "--duration",
                "0.1", "--workers", "1", "--no-isolate", "--out", str(out)]
        refused = CliRunner().invoke(app, args)
        assert refused.exit_code == 2, refused.output
        assert f"in use by another sweep (process {holder.pid})" in refused.output
        assert not (out / "points.jsonl").exists()
    finally:
        holder.kill()
        holder.wait()
    taken = CliRunner().invoke(app, args)  # the holder has gone: its lock is stale
    assert taken.exit_code == 0, taken.output
    assert not (out / LOCK).exists(), "the lock is released when the sweep ends"


def test_a_suite_cut_short_writes_what_finished(tmp_path: Path) -> None:
    """Ctrl-C after the first test (raised from the progress callback, where the suite
    is between tests): suite.json and report.html are written for the finished test,
    the others are listed as interrupted, and the interrupt goes on to the caller."""
    from sandbox.robot import load_robot
    from sandbox.runner import RunSettings
    from sandbox.suite import run_suite

    def stop(_name: str) -> None:
        raise KeyboardInterrupt

    spec = load_robot(ROBOT)
    with pytest.raises(KeyboardInterrupt):
        run_suite(spec, RunSettings(controller=CASCADE), tmp_path / "suite", workers=1,
                  progress=stop)
    suite = json.loads((tmp_path / "suite" / "suite.json").read_text())
    assert [t["name"] for t in suite["tests"]] == ["push"]
    assert len(suite["interrupted"]) == 8 and not suite["passed"]
    assert (tmp_path / "suite" / "report.html").is_file()


def test_a_killed_worker_costs_the_sweep_a_retry_not_its_end(tmp_path: Path) -> None:
    """A controller that kills its own worker process (SIGKILL, as the out-of-memory
    killer would) on its first run: the point runs again in a new pool and the sweep
    ends normally with every point recorded; one that kills it every time is recorded
    as failed (worker_lost) after its second try."""
    marker = tmp_path / "killed-once"
    script = _script(tmp_path, "killer", f"""
        import os, signal
        from pathlib import Path

        class Controller:
            rate_hz = 200

            def __init__(self, config, robot):
                self.always = config.get("always", 0.0) > 0
                self.target = config.get("tilt_kp", 0.0) == 12

            def step(self, r):
                marker = Path({str(marker)!r})
                if self.target and (self.always or not marker.exists()):
                    marker.write_text("x")
                    os.kill(os.getpid(), signal.SIGKILL)
                return 0.0, 0.0
    """)
    for always, out in ((0, "once"), (1, "always")):
        args = ["sweep", ROBOT, str(script), "--vary", "config.tilt_kp=10,12,14",
                "--set", f"config.always={always}", "--duration", "0.2", "--workers", "2",
                "--no-isolate", "--out", str(tmp_path / out)]
        done = _upright(*args, timeout=180)
        assert done.returncode == 0, (done.stdout, done.stderr)
        assert "Traceback" not in done.stderr
        lines = [json.loads(line) for line in
                 (tmp_path / out / "points.jsonl").read_text().splitlines()]
        statuses = sorted(row["status"] for row in lines)
        assert len(lines) == 3
        if always:
            assert statuses.count("worker_lost") == 1, statuses
        else:
            assert "worker_lost" not in statuses, statuses


@pytest.mark.parametrize("after", [0.3, 0.9, 1.6, 2.5])
def test_ctrl_c_at_any_moment_ends_with_130_and_keeps_what_was_recorded(
        after: float, tmp_path: Path) -> None:
    """Ctrl-C (SIGINT to the process) at moments from start-up to mid-run: exit 130 every
    time (or, while the interpreter is still starting, death by the signal, which a shell
    shows as 130); once the trace exists there is a summary (status interrupted) and a
    whole trace (every row as long as the header)."""
    import signal
    import time

    out = tmp_path / "run"
    # 300 s: still running when the last signal comes (a 30 s run now ends in about 2 s)
    process = subprocess.Popen(
        [sys.executable, "-m", "sandbox.cli", "run", ROBOT, CASCADE, "--duration", "300",
         "--out", str(out), "--no-plots"], cwd=ROOT, stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE, env={**os.environ, "PYTHONPATH": str(ROOT)},
        preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    time.sleep(after)
    process.send_signal(signal.SIGINT)
    _, err = process.communicate(timeout=60)
    if process.returncode == -signal.SIGINT:
        # the signal came while the interpreter itself was starting, before Python
        # took SIGINT over: a shell reports this as 130 too, and nothing had started
        assert not (out / "trace.csv").exists()
        return
    assert process.returncode == 130, err
    assert b"Traceback" not in err
    if (out / "trace.csv").exists():
        summary = json.loads((out / "summary.json").read_text())
        assert summary["status"] == "interrupted"
        with (out / "trace.csv").open(newline="") as handle:
            rows = list(csv.reader(handle))
        assert all(len(row) == len(rows[0]) for row in rows)


@pytest.mark.slow
def test_a_killed_dask_worker_is_recorded_not_a_traceback(tmp_path: Path) -> None:
    """With `--cluster local`, a point whose controller SIGKILLs its worker every time:
    Dask tries it on new workers, then gives up; the point is recorded as worker_lost,
    the other points complete, exit 0, no FutureCancelledError traceback."""
    script = _script(tmp_path, "dask_killer", """
        import os, signal

        class Controller:
            rate_hz = 200

            def __init__(self, config, robot):
                self.target = config.get("tilt_kp", 0.0) == 12

            def step(self, r):
                if self.target:
                    os.kill(os.getpid(), signal.SIGKILL)
                return 0.0, 0.0
    """)
    out = tmp_path / "sweep"
    done = _upright("sweep", ROBOT, str(script), "--vary", "config.tilt_kp=10,12,14",
                    "--duration", "0.2", "--workers", "2", "--no-isolate", "--cluster",
                    "local", "--out", str(out), timeout=300)
    assert done.returncode == 0, (done.stdout, done.stderr)
    assert "Traceback" not in done.stderr
    statuses = sorted(json.loads(line)["status"]
                      for line in (out / "points.jsonl").read_text().splitlines())
    assert statuses == ["completed", "completed", "worker_lost"]


def _group_members(group: int) -> list[str]:
    """Live processes of a process group (zombies aside), as `ps` lines."""
    lines = subprocess.run(["ps", "-eo", "pid,pgid,stat,args"], capture_output=True,
                           text=True).stdout.splitlines()[1:]
    return [line for line in lines
            if int(line.split()[1]) == group and not line.split()[2].startswith("Z")]


@pytest.mark.parametrize("cluster", [[], pytest.param(["--cluster", "local"],
                                                       marks=pytest.mark.slow)],
                         ids=["local-processes", "dask-local"])
def test_no_helper_process_outlives_a_killed_sweep(cluster: list[str], tmp_path: Path) -> None:
    """SIGKILL of the sweep's own process mid-sweep: within a few seconds no process it
    started (pool workers, trace writers, isolated controllers, Dask nannies and
    workers) is still running."""
    import signal
    import time

    process = subprocess.Popen(
        [sys.executable, "-m", "sandbox.cli", "sweep", ROBOT, CASCADE, "--vary",
         "config.tilt_kp=10,11,12,13,14,15", "--duration", "10", "--workers", "2",
         "--out", str(tmp_path / "sweep"), *cluster], cwd=ROOT, stdout=subprocess.DEVNULL,
        stderr=subprocess.DEVNULL, env={**os.environ, "PYTHONPATH": str(ROOT)},
        start_new_session=True)
    deadline = time.monotonic() + 60
    while len(_group_members(process.pid)) < 3 and time.monotonic() < deadline:
        time.sleep(0.2)  # until the workers run
    assert len(_group_members(process.pid)) >= 3, "the sweep started its workers"
    time.sleep(1.0)
    process.kill()
    process.wait()
    deadline = time.monotonic() + 10
    while _group_members(process.pid) and time.monotonic() < deadline:
        time.sleep(0.2)
    left = _group_members(process.pid)
    for line in left:  # leave the machine clean even when the check fails
        os.kill(int(line.split()[0]), signal.SIGKILL)
    assert not left, left


@pytest.mark.slow
def test_a_dask_worker_started_again_after_a_crash_is_guarded_too() -> None:
    """A local cluster's worker killed (as a controller might): the one its nanny starts
    in its place also watches upright's process and knows the pool fills the cores."""
    import signal
    import time

    from sandbox.sweep.executors import DaskCluster

    def guarded() -> tuple[int, bool, bool]:
        import threading

        from sandbox import wire

        return (os.getpid(), wire._pool_worker,
                any(t.name == "upright-parent-watch" for t in threading.enumerate()))

    cluster = DaskCluster(None, "local", 1)
    try:
        (first,) = cluster.client.run(guarded).values()
        assert first[1:] == (True, True)
        os.kill(first[0], signal.SIGKILL)
        deadline = time.monotonic() + 60
        again = None
        while time.monotonic() < deadline:
            try:
                answers = list(cluster.client.run(guarded).values())
            except Exception:  # noqa: BLE001 - the worker is still coming back
                answers = []
            if answers and answers[0][0] != first[0]:
                again = answers[0]
                break
            time.sleep(0.5)
        assert again is not None, "the nanny started a new worker"
        assert again[1:] == (True, True)
    finally:
        cluster.close()
