"""report.html: one self-contained page for a suite (no network, no scripts, no web fonts).

Plots and videos are embedded as data URIs so the page can be mailed or
shared on its own.
"""

from __future__ import annotations

import base64
import html
from pathlib import Path
from typing import Any

STYLE = """
body { font-family: sans-serif; margin: 2em auto; max-width: 60em; color: #222; }
h1 { font-size: 1.5em; } h2 { font-size: 1.2em; margin-top: 2em; }
table { border-collapse: collapse; margin: 1em 0; }
th, td { border: 1px solid #bbb; padding: 0.3em 0.6em; text-align: left; }
th { background: #eee; }
.pass { color: #176117; font-weight: bold; } .fail { color: #a11; font-weight: bold; }
img, video { max-width: 100%; border: 1px solid #ccc; }
.small { color: #555; font-size: 0.9em; }
"""


def _data_uri(path: Path, mime: str) -> str | None:
    if not path.is_file():
        return None
    return f"data:{mime};base64," + base64.b64encode(path.read_bytes()).decode("ascii")


def _verdict(passed: bool) -> str:
    return '<span class="pass">PASS</span>' if passed else '<span class="fail">FAIL</span>'


def _number(value: Any, digits: int = 3) -> str:
    return "-" if value is None else f"{value:.{digits}g}"


def render_report(folder: Path, suite: dict[str, Any],
                  charts: dict[str, str] | None = None) -> str:
    """The HTML text of a suite's report; ``charts`` maps test names to inline SVG."""
    e = html.escape
    rows = []
    for test in suite["tests"]:
        f = test["figures"]
        failed = [c["label"] for c in test["checks"] if not c["passed"]]
        rows.append(
            f"<tr><td><a href=\"#{e(test['name'])}\">{e(test['name'])}</a></td>"
            f"<td>{_verdict(test['passed'])}</td><td>{e(test['status'])}</td>"
            f"<td>{_number(f.get('max_abs_pitch_deg'))}</td>"
            f"<td>{_number(f.get('rms_pitch_deg'))}</td><td>{_number(f.get('drift_m'))}</td>"
            f"<td>{e('; '.join(failed)) or '-'}</td></tr>")
    sections = []
    for test in suite["tests"]:
        sub = folder / test["folder"]
        checks = "".join(
            f"<tr><td>{e(c['label'])}</td><td>{e(str(c['measured']))}</td>"
            f"<td>{e(str(c['limit']))}</td><td>{_verdict(c['passed'])}</td></tr>"
            for c in test["checks"])
        parts = [f'<h2 id="{e(test["name"])}">{e(test["name"])} {_verdict(test["passed"])}</h2>']
        parts.append(_test_does(suite.get("test_facts", {}).get(test["name"])))
        if test.get("message"):
            parts.append(f'<p class="small">{e(test["message"])}</p>')
        parts.append(f'<table class="checks" id="checks-{e(test["name"])}"><tr><th>check</th>'
                     "<th>measured</th><th>limit</th><th>verdict</th></tr>"
                     f"{checks}</table>")
        if test.get("diagnosis"):  # why it fell or failed, most likely cause first
            items = "".join(f"<li><b>{e(d['code'])}</b>: {e(d['text'])}</li>"
                            for d in test["diagnosis"])
            parts.append(f'<p>Why (most likely first):</p><ol class="diagnosis">{items}</ol>')
        parts.append((charts or {}).get(test["name"], ""))
        video = _data_uri(sub / "video.mp4", "video/mp4")
        if video:
            parts.append(f'<video controls muted src="{video}"></video>')
        plot = _data_uri(sub / "plots.png", "image/png")
        if plot:
            parts.append(f'<img alt="plots of {e(test["name"])}" src="{plot}">')
        sections.append("\n".join(parts))
    passed = sum(t["passed"] for t in suite["tests"])
    return f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<title>upright suite: {e(suite['robot'])}</title>
<style>{STYLE}</style></head>
<body>
<h1>Disturbance suite: {e(suite['robot'])} with {e(Path(suite['controller']).name)}</h1>
<p>{passed} of {len(suite['tests'])} tests passed {_verdict(suite['passed'])}.
<span class="small">Seed {suite['seed']}. Angles in degrees, distances in metres.</span></p>
{_parts_line(suite)}
{_about(suite)}
<table id="summary">
<tr><th>test</th><th>verdict</th><th>status</th><th>max |tilt|</th><th>rms tilt</th>
<th>drift</th><th>failed checks</th></tr>
{''.join(rows)}
</table>
{''.join(sections)}
</body></html>
"""


def write_report(folder: Path, suite: dict[str, Any],
                 charts: dict[str, str] | None = None) -> Path:
    path = folder / "report.html"
    path.write_text(render_report(folder, suite, charts), encoding="utf-8")
    return path


# --------------------------------------------------------------------- what was run


def _rows(pairs) -> str:
    e = html.escape
    return "".join("<tr>" + "".join(f"<td>{e(str(v))}</td>" for v in row) + "</tr>"
                   for row in pairs)


def _about(suite: dict[str, Any]) -> str:
    """The robot's key figures and the controller (file, class, hash, config, version)."""
    parts = []
    figures = suite.get("robot_figures")
    if figures:
        parts.append('<h2 id="robot">The robot</h2>'
                     '<table id="robot-figures"><tr><th>figure</th><th>value</th>'
                     f"<th>unit</th></tr>{_rows(figures)}</table>")
    if "imperfections" in suite:  # suites written before the key have no parts section
        rows = suite["imperfections"]
        parts.append('<h2 id="parts">The parts: imperfections in force</h2>' + (
            '<table id="imperfections"><tr><th>imperfection</th><th>value</th><th>unit</th>'
            f"</tr>{_rows(rows)}</table>" if rows else
            '<p id="imperfections">Ideal parts: the robot file lists no imperfections (no '
            "gearbox play, static friction, per-side differences, IMU filter, mounting or "
            "scale error, loop jitter or compute time). The real robot has them.</p>"))
    facts = suite.get("controller_facts")
    if facts:
        rows = [("script", facts.get("path", "")), ("class", facts.get("class", "")),
                ("SHA-256", facts.get("sha256") or "-"),
                ("upright version", facts.get("upright", ""))]
        config = facts.get("config") or {}
        rows += [(f"config.{k}", v) for k, v in sorted(config.items())]
        if not config:
            rows.append(("config", "none given: the script's own defaults"))
        parts.append('<h2 id="controller">The controller</h2>'
                     '<table id="controller-facts"><tr><th>item</th><th>value</th></tr>'
                     f"{_rows(rows)}</table>")
    if not parts:
        return ""
    return '<section id="about">' + "\n".join(parts) + "</section>" + (
        '<h2 id="tests">The tests</h2>' if suite.get("test_facts") else "")


def _test_does(facts: dict[str, Any] | None) -> str:
    """What one test does: its description, floor and timeline."""
    if not facts:
        return ""
    e = html.escape
    events = "".join(f"<li>{e(text)}</li>" for text in facts.get("events", []))
    return (f'<div class="does"><p>{e(facts.get("description", ""))} '
            f'<span class="small">{facts.get("duration_s", 0):g} s on '
            f'{e(facts.get("ground", ""))}.</span></p>'
            + (f"<ul>{events}</ul>" if events else "") + "</div>")


def _parts_line(suite: dict[str, Any]) -> str:
    """Above the summary table: 'ideal parts', or the imperfections the runs had."""
    if not suite.get("parts"):
        return ""
    return (f'<p id="parts-line">Parts: {html.escape(suite["parts"])}'
            + (' (<a href="#parts">listed below</a>)' if suite.get("imperfections") else "")
            + ".</p>")
