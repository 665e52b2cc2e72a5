"""--vary forms a reader cannot misread: a list, a range with its count written out, and the
old START:STOP:N kept for one release with a note. No engine runs here."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from sandbox.cli import app
from sandbox.sweep.plan import SweepError, axis_text, parse_vary, vary_form

ROOT = Path(__file__).resolve().parent.parent


def test_list_and_range_give_the_values_written():
    """A list is taken as written; START..STOP,n=N gives N values with both ends, as
    numpy.linspace(START, STOP, N) does (the reference)."""
    assert parse_vary("config.kp=6,12,18,24").values == (6.0, 12.0, 18.0, 24.0)
    for text in ("config.kp=6..24,n=4", "config.kp=6..24 n=4", "config.kp= 6 .. 24 , n = 4"):
        assert parse_vary(text).values == (6.0, 12.0, 18.0, 24.0), text
    axis = parse_vary("wheels.friction=0.3..0.9,n=7")
    assert axis.values == pytest.approx(tuple(np.linspace(0.3, 0.9, 7)), abs=1e-12)
    assert parse_vary("config.kp=-1..1,n=3").values == (-1.0, 0.0, 1.0)
    assert parse_vary("config.kp=2..2,n=1").values == (2.0,)
    assert vary_form("config.kp=6..24,n=4").note == ""


def test_old_colon_form_still_works_with_a_note():
    """START:STOP:N keeps its meaning (N values) and says how to write it now."""
    axis = parse_vary("config.kp=6:24:4")
    assert axis.values == (6.0, 12.0, 18.0, 24.0)
    form = vary_form("config.kp=6:24:4")
    assert form.form == "colon"
    assert "deprecated" in form.note and "config.kp=6..24,n=4" in form.note
    assert parse_vary("config.kp=6..24,n=4") == axis  # the suggested spelling is the same axis


@pytest.mark.parametrize(("text", "words"), [
    ("config.kp=6..24", "count written out"),
    ("config.kp=6..24/4", "count written out"),
    ("config.kp=6..24,n=0", "n .*whole number"),
    ("config.kp=6..24,n=2.5", "n .*whole number"),
    ("config.kp=1..2,n=1", "n=1 gives one value"),
    ("config.kp=a..2,n=3", "'a' is not a number"),
    ("config.kp=1,2,", "'' is not a number"),
    ("config.kp=1:2", "KEY=A,B,C"),
    ("config.kp=inf,1", "finite"),
])
def test_bad_axes_say_what_to_write(text, words):
    with pytest.raises(SweepError, match=words):
        parse_vary(text)


def test_axis_text_lists_values_and_count():
    assert axis_text(parse_vary("config.kp=6..24,n=4")) == "config.kp: 6, 12, 18, 24 (4 values)"
    long = axis_text(parse_vary("config.kp=1..100,n=100"))
    assert long.startswith("config.kp: 1, 2, 3, 4, 5, 6, ..., 95,") and "(100 values)" in long


@settings(max_examples=300, deadline=None)
@given(st.text(alphabet="0123456789.,:n= -e+akx", max_size=24))
def test_fuzzed_axes_give_an_axis_or_a_sweep_error(spec):
    """Any text after KEY= gives finite values or a SweepError, never another exception."""
    try:
        axis = parse_vary(f"config.kp={spec}")
    except SweepError:
        return
    assert axis.values and all(np.isfinite(axis.values))


def test_cli_shows_each_axis_before_the_sweep(tmp_path):
    """The values of every axis are printed before any run; a bad axis exits 2 at once."""
    result = CliRunner().invoke(app, ["sweep", str(ROOT / "robots" / "shelf-runner.yaml"),
                                      str(ROOT / "controllers" / "cascade.py"),
                                      "--vary", "config.tilt_kp=6:24:4", "--vary", "x.y=1..2",
                                      "--out", str(tmp_path / "s")])
    assert result.exit_code == 2
    assert "axis config.tilt_kp: 6, 12, 18, 24 (4 values)" in result.output
    assert "deprecated" in result.output and "count written out" in result.output
    assert "Traceback" not in result.output
    assert not (tmp_path / "s").exists(), "nothing ran"
