"""PNG plots of a run from its trace (matplotlib, no screen needed)."""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from pathlib import Path

import numpy as np

PANELS = ("tilt", "pitch rate", "duty", "speed", "motor current", "battery")


def _estimate_channels(trace: dict[str, np.ndarray]) -> list[str]:
    """Controller channels that look like a tilt estimate (radians)."""
    return [k for k in trace if k.startswith("log.") and ("tilt" in k or "pitch" in k)
            and k.endswith("_rad")]


def plot_run(trace: dict[str, np.ndarray], path: Path, title: str = "",
             marks: Iterable[tuple[float, str]] = ()) -> Path:
    """Write a six-panel PNG: tilt (true and estimated), pitch rate, duties, speed,
    motor currents and battery voltage, with disturbance times marked."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    t = trace["t_s"]
    fig, axes = plt.subplots(len(PANELS), 1, figsize=(9, 12), sharex=True)
    ax = axes[0]
    ax.plot(t, np.degrees(trace["pitch_rad"]), label="true tilt", color="black", lw=1.2)
    for name in _estimate_channels(trace):
        # plotted in degrees: the legend drops the channel's "_rad"
        ax.plot(t, np.degrees(trace[name]), label=name[4:].removesuffix("_rad"), lw=1.0,
                alpha=0.8)
    ax.set_ylabel("tilt (deg)")
    ax.legend(loc="upper right", fontsize=8)
    axes[1].plot(t, np.degrees(trace["pitch_rate_rad_s"]), color="tab:purple", lw=1.0)
    axes[1].set_ylabel("pitch rate (deg/s)")
    axes[2].plot(t, trace["duty_l"], label="left", lw=1.0)
    axes[2].plot(t, trace["duty_r"], label="right", lw=1.0, alpha=0.8)
    axes[2].set_ylabel("duty (-1..1)")
    axes[2].set_ylim(-1.05, 1.05)
    axes[2].legend(loc="upper right", fontsize=8)
    axes[3].plot(t, trace["speed_m_s"], color="tab:green", lw=1.0)
    axes[3].set_ylabel("speed (m/s)")
    axes[4].plot(t, trace["current_l_a"], label="left", lw=1.0)
    axes[4].plot(t, trace["current_r_a"], label="right", lw=1.0, alpha=0.8)
    axes[4].set_ylabel("motor current (A)")
    axes[4].legend(loc="upper right", fontsize=8)
    axes[5].plot(t, trace["battery_v"], color="tab:red", lw=1.0)
    axes[5].set_ylabel("battery (V)")
    axes[5].set_xlabel("time (s)")
    _mark(axes, marks)
    for a in axes:
        a.grid(True, alpha=0.3)
    if title:
        fig.suptitle(title)
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path


def _mark(axes: Sequence, marks: Iterable[tuple[float, str]]) -> None:
    for time, label in marks:
        for a in axes:
            a.axvline(time, color="tab:orange", lw=0.8, ls="--")
        axes[0].annotate(label, (time, 1.0), xycoords=("data", "axes fraction"), fontsize=7,
                         rotation=90, va="top", ha="right", color="tab:orange")
