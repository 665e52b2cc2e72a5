"""The suite: run folders, suite.json, plots and a self-contained report.html.

The report is also opened in a real headless browser (Debian's chromium, which
.ci/run installs): the rendered page must hold the summary table, and a
screenshot of it must show text.
"""

from __future__ import annotations

import base64
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import matplotlib.figure
import numpy as np
import pytest
from ideal_parts import ideal_robot
from PIL import Image
from typer.testing import CliRunner

from sandbox.cli import app
from sandbox.events import BUILTIN_NAMES
from sandbox.plots import PANELS, plot_run
from sandbox.record import read_trace
from sandbox.report import render_report
from sandbox.runner import RunSettings
from sandbox.suite import run_suite

ROOT = Path(__file__).resolve().parents[1]
SHELF_RUNNER = ROOT / "robots" / "shelf-runner.yaml"
CASCADE = str(ROOT / "controllers" / "cascade.py")
WEAK_GAINS = {"tilt_kp": 6.0, "tilt_kd": 0.3}  # see test_events: fails the push test
QUICK_TESTS = ("push", "payload")
RUN_FILES = ("trace.csv", "summary.json", "run.yaml", "robot.urdf", "plots.png")
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def spec():
    return ideal_robot("shelf-runner")  # the figures below are of ideal parts


@pytest.fixture(scope="module")
def passing_suite(spec, tmp_path_factory):
    """push and payload on shelf-runner with the cascade example, two worker processes."""
    folder = tmp_path_factory.mktemp("suite") / "shelf-cascade"
    done = []
    suite = run_suite(spec, RunSettings(controller=CASCADE), folder, tests=QUICK_TESTS,
                      workers=2, label="cascade", progress=done.append, plots=True)
    return folder, suite, done


@pytest.fixture(scope="module")
def failing_suite(spec, tmp_path_factory):
    """The push test with a soft tilt loop, one worker (in this process)."""
    folder = tmp_path_factory.mktemp("suite") / "shelf-weak"
    suite = run_suite(spec, RunSettings(controller=CASCADE, config=WEAK_GAINS), folder,
                      tests=("push",), workers=1, label="weak")
    return folder, suite


# ------------------------------------------------------------------ suite.json and folders


def test_suite_writes_json_folders_and_report(passing_suite):
    """suite.json (also returned) lists each test in order with its verdict and checks;
    each test has an ordinary run folder; report.html is written; progress is called
    once per test."""
    folder, suite, done = passing_suite
    assert sorted(done) == sorted(QUICK_TESTS)
    on_disk = json.loads((folder / "suite.json").read_text(encoding="utf-8"))
    assert on_disk == json.loads(json.dumps(suite))
    assert on_disk["robot"] == "shelf-runner" and on_disk["controller"] == CASCADE
    assert on_disk["seed"] == 0 and on_disk["passed"] is True
    assert [t["name"] for t in on_disk["tests"]] == list(QUICK_TESTS)
    for test in on_disk["tests"]:
        sub = folder / test["folder"]
        for name in RUN_FILES:
            assert (sub / name).is_file(), f"{test['name']}/{name}"
        summary = json.loads((sub / "summary.json").read_text(encoding="utf-8"))
        assert summary["test"] == test["name"] and summary["status"] == test["status"]
        assert summary["test_result"]["checks"] == test["checks"]
        assert test["passed"] is (summary["test_result"]["passed"]
                                  and summary["status"] == "completed")
        assert test["figures"]["max_abs_pitch_deg"] == summary["max_abs_pitch_deg"]
        assert test["figures"]["duration_s"] == pytest.approx(10.0)
    assert (folder / "report.html").is_file()


def test_suite_with_a_failing_test_does_not_pass(failing_suite):
    """One failing test makes the suite fail; suite.json and the report say which check."""
    folder, suite = failing_suite
    assert suite["passed"] is False
    (push,) = suite["tests"]
    assert push["passed"] is False and push["status"] == "completed"
    failed = [c["label"] for c in push["checks"] if not c["passed"]]
    assert failed == ["back within 2 deg after each disturbance"]
    page = (folder / "report.html").read_text(encoding="utf-8")
    assert "0 of 1 tests passed" in page
    assert '<span class="fail">FAIL</span>' in page and failed[0] in page


# ------------------------------------------------------------------ report.html


class PageParser(HTMLParser):
    """Collects tags with their attributes, and the rows of the table id="summary"."""

    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.summary_rows: list[list[str]] = []
        self._depth = 0  # >0 while inside the summary table
        self._cell: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append((tag, attrs))
        if tag == "table" and (attrs.get("id") == "summary" or self._depth):
            self._depth += 1
        elif self._depth and tag == "tr":
            self.summary_rows.append([])
        elif self._depth and tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag):
        if tag == "table" and self._depth:
            self._depth -= 1
        elif self._depth and tag in ("td", "th") and self._cell is not None:
            self.summary_rows[-1].append("".join(self._cell).strip())
            self._cell = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def parse(page: str) -> PageParser:
    parser = PageParser()
    parser.feed(page)
    parser.close()
    return parser


def test_report_is_self_contained(passing_suite):
    """No network address, no script; every image a data: URI holding that test's
    plots.png byte for byte."""
    folder, suite, _ = passing_suite
    page = (folder / "report.html").read_text(encoding="utf-8")
    for forbidden in ("http://", "https://", "<script", "@import", "url("):
        assert forbidden not in page.lower(), forbidden
    parsed = parse(page)
    images = [attrs for tag, attrs in parsed.tags if tag == "img"]
    assert len(images) == len(QUICK_TESTS)
    for attrs, test in zip(images, suite["tests"]):
        prefix = "data:image/png;base64,"
        assert attrs["src"].startswith(prefix)
        data = base64.b64decode(attrs["src"][len(prefix):])
        assert data.startswith(PNG_SIGNATURE)
        assert data == (folder / test["folder"] / "plots.png").read_bytes()
    for tag, attrs in parsed.tags:  # links only to anchors on the page itself
        for name in ("href", "src"):
            if name in attrs:
                assert attrs[name].startswith(("#", "data:")), (tag, attrs[name][:40])


def test_report_summary_table_has_one_row_per_test(passing_suite):
    """The summary table: a header and one row per test with its name, verdict, status."""
    folder, suite, _ = passing_suite
    rows = parse((folder / "report.html").read_text(encoding="utf-8")).summary_rows
    assert rows[0][:3] == ["test", "verdict", "status"]
    assert [r[:3] for r in rows[1:]] == [[t["name"], "PASS", "completed"] for t in suite["tests"]]


def test_report_escapes_text_and_counts_passes(tmp_path):
    """Messages and names are HTML-escaped; the page counts passed tests; a test whose
    folder has no plots gets no image."""
    suite = {"robot": "r<1>", "controller": "ctrl/a&b.py", "seed": 3, "passed": False,
             "tests": [
                 {"name": "push", "status": "completed", "passed": True, "folder": "push",
                  "message": "", "checks": [], "figures": {"max_abs_pitch_deg": 1.0,
                                                           "rms_pitch_deg": 0.5,
                                                           "drift_m": None}},
                 {"name": "slope", "status": "controller_error", "passed": False,
                  "folder": "slope", "message": "step() raised <ValueError> & more",
                  "checks": [{"label": "stays up", "measured": "controller_error",
                              "limit": "completed", "passed": False}],
                  "figures": {}}]}
    page = render_report(tmp_path, suite)
    assert "<ValueError>" not in page and "&lt;ValueError&gt; &amp; more" in page
    assert "r&lt;1&gt;" in page and "a&amp;b.py" in page
    assert "1 of 2 tests passed" in page
    assert "<img" not in page
    rows = parse(page).summary_rows
    assert [r[:3] for r in rows[1:]] == [["push", "PASS", "completed"],
                                         ["slope", "FAIL", "controller_error"]]
    assert rows[2][-1] == "stays up"


# ------------------------------------------------------------------ plots.png


@pytest.fixture
def captured_figures(monkeypatch):
    """Figures passed to savefig (still written to disk)."""
    figures = []
    original = matplotlib.figure.Figure.savefig

    def capture(self, *args, **kwargs):
        figures.append(self)
        return original(self, *args, **kwargs)

    monkeypatch.setattr(matplotlib.figure.Figure, "savefig", capture)
    return figures


def test_plots_have_seven_panels_with_units(passing_suite, captured_figures, tmp_path):
    """plots.png of a suite test, drawn again from its trace: seven panels (tilt, position,
    pitch rate, duty, speed, motor current, battery), every axis label with its unit in
    brackets, time on the shared x axis, every disturbance marked on every panel."""
    folder, suite, _ = passing_suite
    test = suite["tests"][0]
    sub = folder / test["folder"]
    trace = read_trace(sub / "trace.csv")
    summary = json.loads((sub / "summary.json").read_text(encoding="utf-8"))
    marks = [tuple(m) for m in summary["marks"]]
    out = plot_run(trace, tmp_path / "plots.png", title="t", marks=marks)
    (figure,) = captured_figures
    axes = [a for a in figure.axes if a.get_ylabel()]
    assert len(axes) == len(PANELS) == 7
    for ax, panel in zip(axes, PANELS):
        label = ax.get_ylabel()
        assert label.startswith(panel), (label, panel)
        assert re.search(r"\(.+\)$", label), f"no unit on {label!r}"
        assert len(ax.get_lines()) >= 1
        drawn = {round(line.get_xdata()[0], 6) for line in ax.get_lines()
                 if len(line.get_xdata()) == 2 and line.get_xdata()[0] == line.get_xdata()[1]}
        assert {round(t, 6) for t, _ in marks} <= drawn, f"marks on {panel}"
    assert axes[-1].get_xlabel() == "time (s)"
    legend = [text.get_text() for text in axes[0].get_legend().get_texts()]
    assert legend[0] == "true tilt" and "tilt_est" in legend
    assert not any(entry.endswith("_rad") for entry in legend), legend  # drawn in degrees
    np.testing.assert_allclose(axes[0].get_lines()[0].get_ydata(),
                               np.degrees(trace["pitch_rad"]), err_msg="tilt panel (deg)")
    for path in (out, sub / "plots.png"):
        with Image.open(path) as image:
            assert image.format == "PNG" and image.size == (810, 1215), path


# ------------------------------------------------------------------ in a real browser

CHROMIUM = shutil.which("chromium") or (
    "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)
needs_chromium = pytest.mark.skipif(
    CHROMIUM is None, reason="chromium not installed (.ci/run installs Debian's package)")


def chromium(tmp_path: Path, *args: str) -> subprocess.CompletedProcess:
    profile = tmp_path / "profile"
    profile.mkdir(exist_ok=True)
    command = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
               "--no-first-run", "--disable-background-networking",
               "--disable-component-update", "--disable-sync", f"--user-data-dir={profile}",
               *args]
    return subprocess.run(command, capture_output=True, text=True, timeout=120, check=False)


@needs_chromium
def test_report_renders_in_a_browser(passing_suite, tmp_path):
    """Headless Chromium loads report.html: the rendered DOM holds the summary table with
    one row per test, and a 1024×768 screenshot shows dark text and the green PASS
    verdicts in the table's area (top of the page), not a blank page."""
    folder, suite, _ = passing_suite
    url = (folder / "report.html").resolve().as_uri()
    dom = chromium(tmp_path, "--dump-dom", url)
    assert dom.returncode == 0, dom.stderr[-2000:]
    rows = parse(dom.stdout).summary_rows
    assert [r[:2] for r in rows[1:]] == [[t["name"], "PASS"] for t in suite["tests"]], (
        dom.stdout[:2000])
    shot = tmp_path / "report.png"
    result = chromium(tmp_path, f"--screenshot={shot}", "--window-size=1024,768", url)
    assert result.returncode == 0 and shot.is_file(), result.stderr[-2000:]
    with Image.open(shot) as image:
        pixels = np.asarray(image.convert("RGB")).astype(int)
    assert pixels.shape[:2] == (768, 1024)
    top = pixels[40:320, :700]  # heading, counts and the summary table
    dark = top.max(axis=2) < 90
    assert dark.mean() > 0.005, f"dark (text) pixels: {dark.mean():.4f} of the table area"
    green = np.all(np.abs(top - np.array([0x17, 0x61, 0x17])) < 40, axis=2)
    assert green.sum() > 50, f"PASS-green pixels: {green.sum()}"


# ------------------------------------------------------------------ the command line


@pytest.mark.slow
@pytest.mark.parametrize("sets, code", [((), 0), (("config.tilt_kp=6", "config.tilt_kd=0.3"), 1)],
                         ids=["cascade-passes", "weak-fails"])
def test_cli_suite_exit_code(tmp_path, sets, code):
    """`upright suite ROBOT CTRL --workers 2`: every built-in test, exit 0 when all pass
    and 1 when one fails; a table row per test and report.html written."""
    out = tmp_path / "suite"
    args = ["suite", str(SHELF_RUNNER), CASCADE, "--workers", "2", "--out", str(out)]
    for item in sets:
        args += ["--set", item]
    result = CliRunner().invoke(app, args)
    assert result.exit_code == code, result.output
    suite = json.loads((out / "suite.json").read_text(encoding="utf-8"))
    assert [t["name"] for t in suite["tests"]] == list(BUILTIN_NAMES)
    assert suite["passed"] is (code == 0)
    for name in BUILTIN_NAMES:
        assert re.search(rf"^\s*\S?\s*{re.escape(name)}\s", result.output, re.M), name
    assert (out / "report.html").is_file()
    assert "Traceback" not in result.output
