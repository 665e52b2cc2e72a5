"""Small inline SVG charts of a run for report.html: tilt, and position against the
setpoint path, with the disturbances marked. Plain numpy and text: a few
milliseconds a chart, where a matplotlib figure costs a few hundred.
"""

from __future__ import annotations

import html
from collections.abc import Iterable, Sequence

import numpy as np

from .plots import setpoint_path

WIDTH, PANEL_HEIGHT, LEFT, RIGHT, GAP = 640, 110, 58, 10, 26
BUCKETS = 320  # the curve keeps each bucket's lowest and highest point: peaks survive


def _envelope(t: np.ndarray, y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """At most 2·BUCKETS points of (t, y) keeping each bucket's extremes, in time order."""
    if t.size <= 2 * BUCKETS:
        return t, y
    edges = np.linspace(0, t.size, BUCKETS + 1).astype(int)
    keep = []
    for a, b in zip(edges[:-1], edges[1:]):
        part = y[a:b]
        low, high = a + int(np.argmin(part)), a + int(np.argmax(part))
        keep += sorted({low, high})
    keep = np.array(keep)
    return t[keep], y[keep]


def _polyline(t, y, t_span, y_span, top: float, style: str) -> str:
    t, y = _envelope(np.asarray(t, float), np.asarray(y, float))
    x = LEFT + (t - t_span[0]) / (t_span[1] - t_span[0]) * (WIDTH - LEFT - RIGHT)
    row = top + (y_span[1] - y) / (y_span[1] - y_span[0]) * PANEL_HEIGHT
    points = " ".join(f"{a:.1f},{b:.1f}" for a, b in zip(x, row) if np.isfinite(b))
    return f'<polyline fill="none" {style} points="{points}"/>'


def _span(*series: np.ndarray) -> tuple[float, float]:
    values = np.concatenate([np.asarray(s, float)[np.isfinite(s)] for s in series])
    low, high = (float(values.min()), float(values.max())) if values.size else (0.0, 1.0)
    pad = max(1e-6, 0.08 * (high - low), 0.02 * max(abs(low), abs(high)))
    return low - pad, high + pad


def chart_svg(trace: dict[str, np.ndarray], marks: Iterable[Sequence] = (),
              setpoints: Iterable[Sequence[float]] = (), title: str = "") -> str:
    """An SVG element: tilt (deg) above position (m, robot solid, setpoint path dashed),
    sharing a time axis (s), disturbances as orange lines. Empty for an empty trace."""
    t = np.asarray(trace.get("t_s", ()), float)
    if t.size < 2:
        return ""
    t_span = (float(t[0]), float(t[-1]) if t[-1] > t[0] else float(t[0]) + 1.0)
    tilt = np.degrees(np.asarray(trace["pitch_rad"], float))
    x = np.asarray(trace["x_m"], float) - float(trace["x_m"][0])
    path = setpoint_path(t, trace, setpoints)
    height = 2 * PANEL_HEIGHT + 2 * GAP + 10
    parts = [f'<svg class="chart" width="{WIDTH}" '
             f'height="{height}" viewBox="0 0 {WIDTH} {height}" role="img" '
             f'aria-label="{html.escape(title or "tilt and position")}">',
             '<style>text{font:11px sans-serif;fill:#333}</style>']
    panels = (("tilt (deg)", [(tilt, 'stroke="#111" stroke-width="1.2"')]),
              ("position (m)", [(path, 'stroke="#888" stroke-width="1" '
                                       'stroke-dasharray="5,3"'),
                                (x, 'stroke="#1f77b4" stroke-width="1.2"')]))
    right = WIDTH - RIGHT
    for k, (label, curves) in enumerate(panels):
        top = GAP / 2 + k * (PANEL_HEIGHT + GAP)
        y_span = _span(*(c for c, _ in curves))
        parts.append(f'<rect x="{LEFT}" y="{top:.1f}" width="{right - LEFT}" '
                     f'height="{PANEL_HEIGHT}" fill="#fafafa" stroke="#bbb"/>')
        parts.append(f'<text x="4" y="{top - 3:.1f}">{label}</text>')
        for value, y in ((y_span[1], top + 10), (y_span[0], top + PANEL_HEIGHT)):
            parts.append(f'<text x="4" y="{y:.1f}">{value:.3g}</text>')
        if y_span[0] < 0 < y_span[1]:
            zero = top + y_span[1] / (y_span[1] - y_span[0]) * PANEL_HEIGHT
            parts.append(f'<line x1="{LEFT}" x2="{right}" y1="{zero:.1f}" y2="{zero:.1f}" '
                         'stroke="#ccc"/>')
        for when, _label in marks:
            xm = LEFT + (float(when) - t_span[0]) / (t_span[1] - t_span[0]) * (right - LEFT)
            parts.append(f'<line class="mark" x1="{xm:.1f}" x2="{xm:.1f}" y1="{top:.1f}" '
                         f'y2="{top + PANEL_HEIGHT:.1f}" stroke="#f39c12" '
                         'stroke-dasharray="3,2"/>')
        for series, style in curves:
            parts.append(_polyline(t, series, t_span, y_span, top, style))
    bottom = GAP / 2 + 2 * PANEL_HEIGHT + GAP + 12
    parts.append(f'<text x="{LEFT}" y="{bottom:.1f}">{t_span[0]:g} s</text>')
    parts.append(f'<text x="{right}" y="{bottom:.1f}" text-anchor="end">{t_span[1]:g} s'
                 '</text>')
    parts.append(f'<text x="{(LEFT + right) / 2:.0f}" y="{bottom:.1f}" text-anchor="middle">'
                 'time; dashed: the setpoint path; orange: disturbances</text>')
    parts.append("</svg>")
    return "\n".join(parts)
