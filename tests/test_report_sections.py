"""report.html reads without the README: the robot's figures, the controller with its
config, hash and upright's version, what each test does, each check's figure against
its limit, and a chart per test; checked in the page and in headless Chromium."""

from __future__ import annotations

import hashlib
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from sandbox import __version__
from sandbox.charts import chart_svg
from sandbox.plots import setpoint_path
from sandbox.robot import load_robot
from sandbox.runner import RunSettings
from sandbox.suite import run_suite

ROOT = Path(__file__).resolve().parents[1]
SHELF_RUNNER = ROOT / "robots" / "shelf-runner.yaml"
CASCADE = str(ROOT / "controllers" / "cascade.py")
CONFIG = {"tilt_kp": 30.0}


@pytest.fixture(scope="module")
def suite_folder(tmp_path_factory):
    """The push test alone, in this process, without plots (the suite's default)."""
    folder = tmp_path_factory.mktemp("report") / "suite"
    suite = run_suite(load_robot(SHELF_RUNNER), RunSettings(controller=CASCADE, config=CONFIG),
                      folder, tests=("push",), workers=1, label="cascade")
    return folder, suite


class Elements(HTMLParser):
    """Text of the elements with an id, and the tags seen."""

    def __init__(self):
        super().__init__()
        self.ids: dict[str, list[str]] = {}
        self.tags: list[tuple[str, dict]] = []
        self._open: list[str] = []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append((tag, attrs))
        if attrs.get("id"):
            self.ids[attrs["id"]] = []
            self._open.append(attrs["id"])
        elif self._open:
            self._open.append("")

    def handle_endtag(self, tag):
        if self._open:
            self._open.pop()

    def handle_data(self, data):
        for name in self._open:
            if name:
                self.ids[name].append(data)

    def text(self, name: str) -> str:
        return " ".join(" ".join(self.ids.get(name, [])).split())


def _elements(page: str) -> Elements:
    parser = Elements()
    parser.feed(page)
    return parser


def test_report_has_the_new_sections(suite_folder):
    """Robot figures, controller (script, class, SHA-256 of the file, config, version),
    the push test's description and timeline, each check with measured and limit."""
    folder, suite = suite_folder
    page = (folder / "report.html").read_text(encoding="utf-8")
    parts = _elements(page)
    robot = parts.text("robot-figures")
    assert "mass, whole robot" in robot and "wheel radius" in robot and "34 mm" in robot
    controller = parts.text("controller-facts")
    digest = hashlib.sha256(Path(CASCADE).read_bytes()).hexdigest()
    assert digest in controller and "cascade.py" in controller
    assert "config.tilt_kp 30.0" in controller and __version__ in controller
    push = builtin_description()
    assert push in page
    assert "at 2 s: push" in page and "forward" in page and "backward" in page
    checks = parts.text("checks-push")
    assert checks.startswith("check measured limit verdict")
    for check in suite["tests"][0]["checks"]:
        assert f"{check['label']} {check['measured']} {check['limit']}" in checks
    assert not (folder / "push" / "plots.png").exists(), "plots only on request"
    svgs = [attrs for tag, attrs in parts.tags if tag == "svg"]
    assert len(svgs) == 1 and svgs[0]["class"] == "chart"
    for forbidden in ("http://", "https://", "<script"):
        assert forbidden not in page


def builtin_description() -> str:
    from sandbox.events import builtin_tests

    return builtin_tests(load_robot(SHELF_RUNNER))["push"].description


def test_chart_keeps_peaks_and_follows_the_setpoint():
    """The chart's curves keep each bucket's extremes (a one-tick spike survives); the
    setpoint path integrates the speed setpoint (distance = ∫ v dt, exact for a held
    speed [derived])."""
    t = np.arange(0, 10.0001, 0.005)
    pitch = np.zeros_like(t)
    pitch[1001] = np.radians(5.0)
    trace = {"t_s": t, "pitch_rad": pitch, "x_m": 0.2 * t}
    svg = chart_svg(trace, [(5.0, "push")], [(2.0, 0.25)])
    assert svg.count("<polyline") == 3 and svg.count('class="mark"') == 2
    tilt_points = svg.split("<polyline")[1]
    rows = [float(p.split(",")[1]) for p in tilt_points.split('points="')[1].split('"')[0]
            .split()]
    assert len(rows) <= 640 and min(rows) < max(rows) - 50, "the 5° spike is in the curve"
    path = setpoint_path(t, None, [(2.0, 0.25)])
    assert path[-1] == pytest.approx(0.25 * 8.0, abs=1e-9)
    assert chart_svg({"t_s": np.zeros(1)}) == ""


CHROMIUM = shutil.which("chromium") or (
    "/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)


@pytest.mark.skipif(CHROMIUM is None, reason="chromium not installed (.ci/run installs it)")
def test_report_sections_render_in_chromium(suite_folder, tmp_path):
    """The browser's DOM holds the new sections with their text; a full-page screenshot
    shows the chart's blue position curve and the checks table's text."""
    folder, _ = suite_folder
    url = (folder / "report.html").resolve().as_uri()
    profile = tmp_path / "profile"
    base = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run",
            "--disable-background-networking", "--disable-component-update",
            f"--user-data-dir={profile}"]
    dom = subprocess.run([*base, "--dump-dom", url], capture_output=True, text=True,
                         timeout=120, check=False)
    assert dom.returncode == 0, dom.stderr[-2000:]
    parts = _elements(dom.stdout)
    for name in ("robot-figures", "controller-facts", "checks-push"):
        assert parts.text(name), f"{name} missing from the rendered page"
    assert "upright version" in parts.text("controller-facts")
    shot = tmp_path / "report.png"
    result = subprocess.run([*base, f"--screenshot={shot}", "--window-size=1024,3000", url],
                            capture_output=True, text=True, timeout=120, check=False)
    assert result.returncode == 0 and shot.is_file(), result.stderr[-2000:]
    with Image.open(shot) as image:
        pixels = np.asarray(image.convert("RGB")).astype(int)
    blue = np.all(np.abs(pixels - np.array([0x1f, 0x77, 0xb4])) < 40, axis=2)
    assert blue.sum() > 100, f"chart curve pixels: {blue.sum()}"
    dark = pixels.max(axis=2) < 90
    assert dark.mean() > 0.003, "text on the page"
