"""Config keys a controller never reads are named after the run, with the nearest key."""

from __future__ import annotations

from pathlib import Path

from typer.testing import CliRunner

from sandbox.cli import app

ROOT = Path(__file__).resolve().parents[1]
SHELF_RUNNER = str(ROOT / "robots" / "shelf-runner.yaml")
CASCADE = str(ROOT / "controllers" / "cascade.py")


def test_a_typo_in_a_gain_name_warns_with_the_suggestion(tmp_path: Path) -> None:
    """`--set config.tilt_kpp=3` on the cascade example: the run goes on and a warning names
    the key and the key the script did read (tilt_kp); summary.json keeps it."""
    import json

    out = tmp_path / "run"
    result = CliRunner().invoke(app, [
        "run", str(ROOT / "robots" / "shelf-runner.yaml"), str(ROOT / "controllers" / "cascade.py"),
        "--duration", "0.2", "--set", "config.tilt_kpp=3", "--out", str(out), "--no-plots"])
    assert result.exit_code == 0, result.output
    assert "config.tilt_kpp: never read by" in result.output
    assert "did you mean tilt_kp?" in result.output
    summary = json.loads((out / "summary.json").read_text())
    assert [k["key"] for k in summary["unread_config_keys"]] == ["tilt_kpp"]


def test_keys_the_script_reads_give_no_warning(tmp_path: Path) -> None:
    result = CliRunner().invoke(app, [
        "run", str(ROOT / "robots" / "shelf-runner.yaml"), str(ROOT / "controllers" / "cascade.py"),
        "--duration", "0.2", "--set", "config.tilt_kp=20", "--out", str(tmp_path / "r"),
        "--no-plots"])
    assert result.exit_code == 0, result.output
    assert "never read" not in result.output


def test_a_sweep_over_an_unread_key_is_refused_before_any_run(tmp_path: Path) -> None:
    """`--vary config.tilt_kpp=...` (a typo): exit 2 naming the key and the nearest one the
    script reads, and no sweep folder with results."""
    out = tmp_path / "sweep"
    result = CliRunner().invoke(app, [
        "sweep", SHELF_RUNNER, CASCADE,
        "--vary", "config.tilt_kpp=10,20", "--duration", "0.2", "--workers", "1",
        "--out", str(out)])
    assert result.exit_code == 2, result.output
    assert "config.tilt_kpp: never read by" in result.output
    assert "did you mean tilt_kp?" in result.output
    assert not (out / "results.csv").exists()


def test_tune_over_an_unread_gain_is_refused(tmp_path: Path) -> None:
    result = CliRunner().invoke(app, [
        "tune", SHELF_RUNNER, CASCADE,
        "--gains", "config.tilt_kpp", "--duration", "0.2", "--workers", "1",
        "--out", str(tmp_path / "tune")])
    assert result.exit_code == 2, result.output
    assert "never read by" in result.output
