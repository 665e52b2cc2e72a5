"""An isolated controller answering while the world advances (the board's compute time),
and the shared page its requests go through where a core is spare (sandbox.wire).

Whatever path the request and reply take, the run must be the in-process run: the same
trace bytes and summary figures, for delays shorter and longer than a controller
period, a fall, a failing step and logged channels.
"""

from __future__ import annotations

import threading
import time
from dataclasses import replace
from pathlib import Path

import pytest

from sandbox import wire
from sandbox.robot import load_robot
from sandbox.runner import RunSettings
from sandbox.session import run_once

ROOT = Path(__file__).resolve().parents[1]
SHELF_RUNNER = ROOT / "robots" / "shelf-runner.yaml"
CASCADE = str(ROOT / "controllers" / "cascade.py")


def _both(settings: RunSettings, tmp_path: Path, test: str | None = None,
) -> list:
    spec = load_robot(SHELF_RUNNER)  # board compute time 1 ms: duties due one step later
    results = []
    for isolate in (False, True):
        folder = tmp_path / ("isolated" if isolate else "here")
        results.append(run_once(spec, replace(settings, isolate=isolate), test=test,
                                folder=folder, plots=False, duration_given=True))
    return results


@pytest.mark.parametrize("latency", [0.0, 0.003, 0.007])
def test_pipelined_runs_write_the_in_process_trace(tmp_path: Path, latency: float) -> None:
    """A delay of 1, 4 and 8 physics steps (the last longer than the 5 ms period): trace
    bytes and logged channels equal the in-process run's."""
    here, isolated = _both(RunSettings(controller=CASCADE, duration=1.0, latency=latency,
                                       tilt=0.05), tmp_path)
    assert isolated.status == here.status == "completed"
    assert (here.folder / "trace.csv").read_bytes() == (
        isolated.folder / "trace.csv").read_bytes()
    assert "tilt_est_rad" in (here.folder / "trace.csv").read_text().splitlines()[0]


def test_a_fall_keeps_the_last_tick(tmp_path: Path) -> None:
    """A robot that falls: the isolated run ends at the same tick with the same rows."""
    here, isolated = _both(RunSettings(controller=str(ROOT / "tests" / "controllers" /
                                                       "constant.py"), duration=3.0,
                                       tilt=0.2), tmp_path)
    assert here.status == isolated.status == "fell"
    assert here.summary["fell_at_s"] == isolated.summary["fell_at_s"]
    assert here.summary["duration_s"] == isolated.summary["duration_s"]
    assert (here.folder / "trace.csv").read_bytes() == (
        isolated.folder / "trace.csv").read_bytes()


def test_a_failing_step_ends_at_the_same_tick(tmp_path: Path) -> None:
    """A step that raises at t = 0.2 s: a controller error in both, the rows before it kept."""
    settings = RunSettings(controller=str(ROOT / "tests" / "controllers" / "raises.py"),
                           duration=1.0, config={"fail_at": 0.2})
    here, isolated = _both(settings, tmp_path)
    assert here.status == isolated.status == "controller_error"
    assert "deliberate failure" in isolated.message
    assert here.summary["duration_s"] == isolated.summary["duration_s"]
    assert (here.folder / "trace.csv").read_bytes() == (
        isolated.folder / "trace.csv").read_bytes()


def test_pipe_only_gives_the_same_trace(tmp_path: Path, monkeypatch) -> None:
    """With no core to spare (a pool worker) requests go through the pipe: same bytes."""
    monkeypatch.setattr(wire, "_pool_worker", True)
    here, isolated = _both(RunSettings(controller=CASCADE, duration=0.5, tilt=0.05),
                           tmp_path)
    assert (here.folder / "trace.csv").read_bytes() == (
        isolated.folder / "trace.csv").read_bytes()


def test_a_push_test_gives_the_same_verdict(tmp_path: Path) -> None:
    """The built-in push test (events fire at ticks): same trace and verdict."""
    here, isolated = _both(RunSettings(controller=CASCADE, duration=3.0), tmp_path,
                           test="push")
    assert here.summary["test_result"] == isolated.summary["test_result"]
    assert (here.folder / "trace.csv").read_bytes() == (
        isolated.folder / "trace.csv").read_bytes()


# ------------------------------------------------------------------ the page alone


def _slots(tmp_path: Path) -> tuple[wire.RunnerSlot, wire.ChildSlot, str]:
    path = wire.new_page()
    return wire.RunnerSlot(path), wire.ChildSlot(path, 8), path


def test_a_watching_child_takes_the_offered_request(tmp_path: Path) -> None:
    runner, child, path = _slots(tmp_path)
    try:
        assert not runner.offer(b"ignored!")  # nobody watches yet: use the pipe
        got = []
        child.gap = 0.2  # s: it naps 0.1 s, then watches (the runner offers meanwhile)
        reader = threading.Thread(target=lambda: got.append(
            child.next_request(-1, lambda: None)))
        reader.start()
        deadline = time.monotonic() + 5.0
        while not runner.page[wire.WATCHING_AT] and time.monotonic() < deadline:
            time.sleep(1e-4)
        assert runner.offer(b"request1")
        reader.join(5.0)
        assert got == [b"request1"]
    finally:
        runner.close()
        import os
        os.unlink(path)


def test_a_child_that_turned_to_the_pipe_reads_the_pipe(tmp_path: Path) -> None:
    """Past its watching time the child says so, and the runner's next request goes to the
    pipe; a request offered just as it turned away is still found (at its next look)."""
    import os

    runner, child, path = _slots(tmp_path)
    read_fd, write_fd = os.pipe()
    try:
        got = []
        reader = threading.Thread(target=lambda: got.append(child.next_request(
            read_fd, lambda: os.read(read_fd, 8))))
        reader.start()
        time.sleep(wire.WATCH_LONGEST + 0.05)  # the child has given up watching
        assert runner.page[wire.WATCHING_AT] == 0
        assert not runner.offer(b"ignored!")
        os.write(write_fd, b"by pipe!")
        reader.join(5.0)
        assert got == [b"by pipe!"]
        # the race: the runner saw "watching" and offered, but the child turned away
        runner.page[wire.WATCHING_AT] = 1
        got.clear()
        reader = threading.Thread(target=lambda: got.append(child.next_request(
            read_fd, lambda: os.read(read_fd, 8))))
        child.gap = 0.0
        runner.page[wire.WATCHING_AT] = 1
        time.sleep(0.0)
        reader.start()
        time.sleep(wire.WATCH_LONGEST + 0.05)
        runner.page[wire.WATCHING_AT] = 1  # as if read just before the child's change
        assert runner.offer(b"raced!!!")
        reader.join(5.0)
        assert got == [b"raced!!!"]
    finally:
        runner.close()
        os.close(read_fd)
        os.close(write_fd)
        os.unlink(path)


def test_a_child_that_keeps_finding_requests_late_gives_up_the_page(tmp_path: Path) -> None:
    import os

    runner, child, path = _slots(tmp_path)
    try:
        child.late = wire.LATE_LIMIT + 1
        got = []
        read_fd, write_fd = os.pipe()
        reader = threading.Thread(target=lambda: got.append(child.next_request(
            read_fd, lambda: os.read(read_fd, 8))))
        reader.start()
        time.sleep(0.01)
        assert runner.page[wire.WATCHING_AT] == 0  # straight to the pipe
        os.write(write_fd, b"by pipe!")
        reader.join(5.0)
        assert got == [b"by pipe!"]
        os.close(read_fd)
        os.close(write_fd)
    finally:
        runner.close()
        os.unlink(path)


def test_no_shared_page_is_left_behind(tmp_path: Path) -> None:
    """The page's name is removed once the child has it mapped, so even a killed run
    leaves nothing in /dev/shm."""
    import glob

    folder = "/dev/shm" if Path("/dev/shm").is_dir() else None
    if folder is None or not wire.spare_core():
        pytest.skip("no shared page on this machine")
    from sandbox.control import RobotFacts
    from sandbox.isolate import IsolatedController

    before = set(glob.glob(f"{folder}/upright-wire-*"))
    spec = load_robot(SHELF_RUNNER)
    controller = IsolatedController(CASCADE, {}, RobotFacts.from_spec(spec, 200.0, 1e-3))
    try:
        assert set(glob.glob(f"{folder}/upright-wire-*")) == before
    finally:
        controller.close()


def test_a_busy_machine_has_no_core_to_spare(monkeypatch) -> None:
    """The page is used only while the load average leaves more than half a core free
    (two cores here), never in a pool worker."""
    if not hasattr(wire.os, "sched_getaffinity"):
        pytest.skip("no CPU affinity on this platform")
    monkeypatch.setattr(wire.os, "sched_getaffinity", lambda pid: {0, 1})
    monkeypatch.setattr(wire.platform, "machine", lambda: "x86_64")
    monkeypatch.setattr(wire.os, "getloadavg", lambda: (1.2, 1.0, 1.0))
    assert wire.spare_core()
    monkeypatch.setattr(wire.os, "getloadavg", lambda: (1.6, 1.0, 1.0))
    assert not wire.spare_core()
    monkeypatch.setattr(wire.os, "getloadavg", lambda: (0.0, 0.0, 0.0))
    monkeypatch.setattr(wire, "_pool_worker", True)
    assert not wire.spare_core()
