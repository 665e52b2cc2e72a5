"""The commands that make many runs or files: sweep, tune, demo, render (end to end, short)."""

from __future__ import annotations

import csv
from pathlib import Path

import imageio_ffmpeg
import pytest
import yaml
from typer.testing import CliRunner

from sandbox.cli import app

ROOT = Path(__file__).resolve().parent.parent
ROBOT = str(ROOT / "robots" / "shelf-runner.yaml")
CASCADE = str(ROOT / "controllers" / "cascade.py")
PID = str(ROOT / "controllers" / "pid_tilt.py")
runner = CliRunner()


def test_sweep_grid_writes_one_row_per_point(tmp_path):
    """A 2 x 1 grid: exit 0, results.csv with two rows whose parameters are the grid's."""
    out = tmp_path / "sweep"
    result = runner.invoke(app, ["sweep", ROBOT, CASCADE, "--vary", "config.tilt_kp=10:14:2",
                                 "--duration", "1", "--workers", "1", "--out", str(out)])
    assert result.exit_code == 0, result.output
    with open(out / "results.csv", newline="") as handle:
        rows = list(csv.DictReader(handle))
    assert rows[0]["index"] == "unit:", "a row of units under the column names"
    assert [float(r["config.tilt_kp"]) for r in rows[1:]] == [10.0, 14.0]
    assert "runs passed" in result.output


def test_sweep_without_a_grid_or_samples_is_bad_input(tmp_path):
    """No --vary and no --samples: exit 2 with a plain message, no traceback."""
    result = runner.invoke(app, ["sweep", ROBOT, CASCADE, "--out", str(tmp_path / "s")])
    assert result.exit_code == 2
    assert "--vary" in result.output and "Traceback" not in result.output


@pytest.mark.parametrize("spread", ["nonsense", "wheels.friction=±abc%"])
def test_sweep_bad_spread_is_bad_input(tmp_path, spread):
    """A spread that cannot be read: exit 2, the option's text in the message."""
    result = runner.invoke(app, ["sweep", ROBOT, CASCADE, "--samples", "2", "--spread", spread,
                                 "--out", str(tmp_path / "s")])
    assert result.exit_code == 2, result.output
    assert "Traceback" not in result.output


def test_tune_writes_a_config_the_controller_accepts(tmp_path):
    """Tuning two gains for a few evaluations writes best_config.yaml with both keys, and
    `upright run --config` accepts it."""
    out = tmp_path / "tune"
    result = runner.invoke(app, ["tune", ROBOT, PID, "--gains", "config.kp,config.kd",
                                 "--max-evaluations", "3", "--workers", "1", "--test", "payload",
                                 "--duration", "4", "--out", str(out)])
    assert result.exit_code in (0, 1), result.output
    config = yaml.safe_load((out / "best_config.yaml").read_text())
    assert {"kp", "kd"} <= set(config)
    run = runner.invoke(app, ["run", ROBOT, PID, "--config", str(out / "best_config.yaml"),
                              "--duration", "1", "--out", str(tmp_path / "run"), "--no-plots"])
    assert run.exit_code in (0, 1), run.output


def test_render_command_writes_the_video(tmp_path):
    """`upright render RUN_DIR --fps 10 --size 160x128` writes video.mp4 with
    floor(duration x fps) + 1 frames."""
    run_dir = tmp_path / "run"
    result = runner.invoke(app, ["run", ROBOT, CASCADE, "--duration", "1", "--tilt", "2",
                                 "--out", str(run_dir), "--no-plots"])
    assert result.exit_code == 0, result.output
    result = runner.invoke(app, ["render", str(run_dir), "--fps", "10", "--size", "160x128",
                                 "--workers", "1"])
    assert result.exit_code == 0, result.output
    frames, _ = imageio_ffmpeg.count_frames_and_secs(str(run_dir / "video.mp4"))
    assert frames == 11


@pytest.mark.parametrize("args, needle", [
    (["--size", "100x100"], "16"),
    (["--size", "big"], "WIDTHxHEIGHT"),
])
def test_render_bad_size_is_bad_input(tmp_path, args, needle):
    """A size not divisible by 16, or unreadable: exit 2 naming the rule."""
    run_dir = tmp_path / "run"
    runner.invoke(app, ["run", ROBOT, CASCADE, "--duration", "0.2", "--out", str(run_dir),
                        "--no-plots"])
    result = runner.invoke(app, ["render", str(run_dir), *args])
    assert result.exit_code == 2, result.output
    assert needle in result.output


def test_render_of_a_folder_without_a_trace_is_bad_input(tmp_path):
    """Not a run folder: exit 2."""
    result = runner.invoke(app, ["render", str(tmp_path)])
    assert result.exit_code == 2
    assert "not a run folder" in result.output


@pytest.mark.slow
def test_demo_runs_the_push_test_and_writes_a_video(tmp_path):
    """`upright demo` passes the push test and writes video.mp4, plots.png and the trace."""
    out = tmp_path / "demo"
    result = runner.invoke(app, ["demo", "--out", str(out)])
    assert result.exit_code == 0, result.output
    for name in ("trace.csv", "summary.json", "plots.png", "video.mp4"):
        assert (out / name).is_file(), name
    assert "push: PASSED" in result.output


def test_demo_without_video_is_quick_and_passes(tmp_path):
    """The demo's run itself (no video): the push test passes, exit 0."""
    out = tmp_path / "demo"
    result = runner.invoke(app, ["demo", "--out", str(out), "--no-video"])
    assert result.exit_code == 0, result.output
    assert (out / "trace.csv").is_file() and not (out / "video.mp4").exists()
