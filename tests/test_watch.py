"""`upright run --watch`: the engine's own window under a virtual display (Xvfb), with a
screenshot of it; and the one-line refusal where no display exists. The physics of a
watched run is the headless run's: the trace bytes are compared."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent.parent
ROBOT = ROOT / "robots" / "desk-mite.yaml"
CONTROLLER = ROOT / "controllers" / "cascade.py"
XVFB = shutil.which("xvfb-run")
needs_xvfb = pytest.mark.skipif(XVFB is None, reason="xvfb-run not installed (Debian package "
                                "xvfb; .ci/run installs it)")

SNAPSHOT = """
import sys
import numpy as np
from sandbox.actuators import DriveTrain
from sandbox.robot import load_robot
from sandbox.watch import WatchedWorld
from sandbox.world import window_snapshot

spec = load_robot(sys.argv[1])
world = WatchedWorld(spec, physics_dt=1e-3, tilt=0.0)
for _ in range(100):  # 0.1 s, paced: the window's thread takes up the camera meanwhile
    world.step(0.0, 0.0)
np.save(sys.argv[2], window_snapshot(world.client))
world.close()
"""


def upright(*args: str, env: dict | None = None, xvfb: bool = False) -> subprocess.CompletedProcess:
    argv = [sys.executable, "-m", "sandbox.cli", *args]
    if xvfb:
        argv = [XVFB, "-a", "-s", "-screen 0 1024x768x24", *argv]
    return subprocess.run(argv, capture_output=True, text=True, timeout=600, cwd=ROOT, env=env)


def test_watch_without_a_display_says_so_in_one_line(tmp_path):
    env = {k: v for k, v in os.environ.items() if k != "DISPLAY"}
    done = upright("run", str(ROBOT), str(CONTROLLER), "--watch", "--duration", "1",
                   "--out", str(tmp_path / "run"), env=env)
    assert done.returncode == 2
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "display" in lines[0] and "Traceback" not in done.stderr
    assert not (tmp_path / "run").exists()


def test_slow_motion_out_of_range_is_refused(tmp_path):
    done = upright("run", str(ROBOT), str(CONTROLLER), "--slow-motion", "0.5",
                   "--out", str(tmp_path / "run"))
    assert done.returncode == 2 and "--slow-motion" in done.stderr


@needs_xvfb
@pytest.mark.slow
def test_watched_run_under_xvfb_has_the_headless_physics(tmp_path):
    """Same trace bytes with and without the window: the window only draws."""
    watched = upright("run", str(ROBOT), str(CONTROLLER), "--watch", "--duration", "1",
                      "--no-plots", "--out", str(tmp_path / "watched"), xvfb=True)
    assert watched.returncode == 0, watched.stderr[-2000:]
    headless = upright("run", str(ROBOT), str(CONTROLLER), "--duration", "1", "--no-plots",
                       "--out", str(tmp_path / "headless"))
    assert headless.returncode == 0, headless.stderr
    assert ((tmp_path / "watched" / "trace.csv").read_bytes()
            == (tmp_path / "headless" / "trace.csv").read_bytes())


@needs_xvfb
def test_the_window_shows_the_robot(tmp_path):
    """A screenshot of the window (the engine's OpenGL renderer on Xvfb's Mesa) is not
    blank: it has the floor and a robot in colours unlike the sky."""
    out = tmp_path / "shot.npy"
    done = subprocess.run([XVFB, "-a", "-s", "-screen 0 1024x768x24", sys.executable, "-c",
                           SNAPSHOT, str(ROBOT), str(out)], capture_output=True, text=True,
                          timeout=300, cwd=ROOT)
    assert done.returncode == 0, done.stderr[-2000:]
    image = np.load(out)
    assert image.shape == (240, 320, 3)
    assert image.std() > 10.0  # not one flat colour
    pixels = image.reshape(-1, 3).astype(int)
    red, green, blue = pixels[:, 0], pixels[:, 1], pixels[:, 2]
    frame = (green > red + 30) & (green > blue + 30)  # the robot's frame is drawn green
    assert frame.sum() >= 50, frame.sum()
