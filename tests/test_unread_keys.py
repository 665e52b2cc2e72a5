"""Config keys a controller never reads are named after the run, with the nearest key."""

from __future__ import annotations

from pathlib import Path

from typer.testing import CliRunner

from sandbox.cli import app

ROOT = Path(__file__).resolve().parents[1]


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
