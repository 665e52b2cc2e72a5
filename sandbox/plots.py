"""PNG plots of a run from its trace (matplotlib, no screen needed).

Speed: a process keeps one figure and redraws it for each run (new data in
the same axes, a layout fixed once) rather than building a figure, laying it
out and throwing it away every time: the build and ``tight_layout`` cost
about as much as drawing. See DEVELOPERS.md, "Plots and the suite".
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from pathlib import Path

import numpy as np

PANELS = ("tilt", "position", "pitch rate", "duty", "speed", "motor current", "battery")
FIGURE_SIZE = (9.0, 13.5)  # inches; at DPI: 810 × 1215 px
DPI = 90
LABEL_LEVELS = 3  # disturbance labels take turns over this many heights, so neighbours part
MARK_COLOUR = "tab:orange"
PNG_COMPRESSION = 1  # zlib level (PIL's default 6): fastest, the same pixels

_figure_cache: dict[str, tuple] = {}  # one figure per process, reused


def _estimate_channels(trace: dict[str, np.ndarray]) -> list[str]:
    """Controller channels that look like a tilt estimate (radians)."""
    return [k for k in trace if k.startswith("log.") and ("tilt" in k or "pitch" in k)
            and k.endswith("_rad")]


def setpoint_path(t: np.ndarray, trace: dict[str, np.ndarray] | None = None,
                  setpoints: Iterable[Sequence[float]] = ()) -> np.ndarray:
    """Distance (m) from the start a robot following its speed setpoint exactly would have
    covered at each ``t``: ∫ v dt of the trace's ``setpoint_speed_m_s`` column where there
    is one, else of the timed ``(t, speed, ...)`` setpoint changes; zero for none (the
    robot should hold its place)."""
    t = np.asarray(t, float)
    if trace is not None and "setpoint_speed_m_s" in trace:
        speed = np.nan_to_num(np.asarray(trace["setpoint_speed_m_s"], float))
    else:
        speed = np.zeros_like(t)
        for change in sorted(setpoints, key=lambda c: c[0]):
            speed[t >= float(change[0]) - 1e-9] = float(change[1])
    if t.size == 0:
        return t
    return np.concatenate(([0.0], np.cumsum(speed[:-1] * np.diff(t))))


def _figure():
    """The process's plot figure: (figure, events axes, panel axes), built once."""
    if "plots" not in _figure_cache:
        import matplotlib

        matplotlib.use("Agg")
        from matplotlib.figure import Figure

        fig = Figure(figsize=FIGURE_SIZE)
        grid = fig.add_gridspec(len(PANELS) + 1, 1,
                                height_ratios=[0.45] + [1.0] * len(PANELS),
                                left=0.1, right=0.97, top=0.955, bottom=0.04, hspace=0.14)
        events = fig.add_subplot(grid[0])
        panels = [fig.add_subplot(grid[k + 1], sharex=events) for k in range(len(PANELS))]
        events.set_yticks([])
        events.set_ylim(0, 1)
        for side in ("left", "right", "top"):
            events.spines[side].set_visible(False)
        events.tick_params(labelbottom=False, bottom=False)
        for ax in panels[:-1]:
            ax.tick_params(labelbottom=False)
        for ax in panels:
            ax.grid(True, alpha=0.3)
        _figure_cache["plots"] = (fig, events, panels)
    return _figure_cache["plots"]


def _clear(axes) -> None:
    for ax in axes:
        for artist in [*ax.lines, *ax.texts, *ax.collections]:
            artist.remove()
        if ax.get_legend() is not None:
            ax.get_legend().remove()
        ax.set_prop_cycle(None)  # each run's lines start from the first colour again


def plot_run(trace: dict[str, np.ndarray], path: Path, title: str = "",
             marks: Iterable[tuple[float, str]] = (),
             setpoints: Iterable[Sequence[float]] = ()) -> Path:
    """Write a PNG of seven panels: tilt (true and estimated), position with the setpoint
    path, pitch rate, duties, speed, motor currents and battery voltage; disturbances
    marked on every panel and labelled in a strip above them, clear of the curves.

    ``setpoints``: the test's timed speed setpoints ``(t s, speed m/s, ...)``, used
    when the trace has no ``setpoint_speed_m_s`` column.
    """
    fig, events, axes = _figure()
    _clear([events, *axes])
    t = trace["t_s"]
    ax = axes[0]
    ax.plot(t, np.degrees(trace["pitch_rad"]), label="true tilt", color="black", lw=1.2)
    for name in _estimate_channels(trace):
        # plotted in degrees: the legend drops the channel's "_rad"
        ax.plot(t, np.degrees(trace[name]), label=name[4:].removesuffix("_rad"), lw=1.0,
                alpha=0.8)
    ax.set_ylabel("tilt (deg)")
    ax.legend(loc="upper right", fontsize=8)
    x = trace["x_m"] - (trace["x_m"][0] if t.size else 0.0)
    axes[1].plot(t, x, label="robot", color="tab:blue", lw=1.2)
    axes[1].plot(t, setpoint_path(t, trace, setpoints), label="setpoint path",
                 color="tab:gray", lw=1.0, ls="--")
    axes[1].set_ylabel("position (m)")
    axes[1].legend(loc="upper right", fontsize=8)
    axes[2].plot(t, np.degrees(trace["pitch_rate_rad_s"]), color="tab:purple", lw=1.0)
    axes[2].set_ylabel("pitch rate (deg/s)")
    axes[3].plot(t, trace["duty_l"], label="left", lw=1.0)
    axes[3].plot(t, trace["duty_r"], label="right", lw=1.0, alpha=0.8)
    axes[3].set_ylabel("duty (-1..1)")
    axes[3].set_ylim(-1.05, 1.05)
    axes[3].legend(loc="upper right", fontsize=8)
    axes[4].plot(t, trace["speed_m_s"], color="tab:green", lw=1.0)
    axes[4].set_ylabel("speed (m/s)")
    axes[5].plot(t, trace["current_l_a"], label="left", lw=1.0)
    axes[5].plot(t, trace["current_r_a"], label="right", lw=1.0, alpha=0.8)
    axes[5].set_ylabel("motor current (A)")
    axes[5].legend(loc="upper right", fontsize=8)
    axes[6].plot(t, trace["battery_v"], color="tab:red", lw=1.0)
    axes[6].set_ylabel("battery (V)")
    axes[6].set_xlabel("time (s)")
    _mark(events, axes, marks)
    for a in axes:
        if a is not axes[3]:
            a.relim()
            a.autoscale_view()
    if t.size:
        events.set_xlim(float(t[0]), float(t[-1]) if t[-1] > t[0] else float(t[0]) + 1.0)
    fig.suptitle(title)
    # zlib level 1: the PNG about 15 % larger, its encoding 0.05 s shorter (of ~0.2 s)
    fig.savefig(path, dpi=DPI, pil_kwargs={"compress_level": PNG_COMPRESSION})
    return path


def _mark(events, axes: Sequence, marks: Iterable[tuple[float, str]]) -> None:
    """A dashed line on every panel at each disturbance; its label in the events strip,
    the levels taking turns so close neighbours do not print over each other."""
    for k, (time, label) in enumerate(sorted(marks, key=lambda m: float(m[0]))):
        time = float(time)
        for a in (events, *axes):
            a.axvline(time, color=MARK_COLOUR, lw=0.8, ls="--")
        level = 1.0 - (k % LABEL_LEVELS + 0.5) / LABEL_LEVELS
        events.text(time, level, " " + str(label).replace("N*s", "N·s"), fontsize=7,
                    va="center", ha="left", color="tab:brown", clip_on=False)
