"""``upright compare RUN_DIR REAL.csv``: a real robot's log of a manoeuvre against a run.

The two are aligned by a named event (the first row whose ``event`` column holds it, in
both) or, without one, by the lag that maximises the cross-correlation of the pitch rate.
On the overlap, the RMS differences of pitch, pitch rate, speed and duty are reported.
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .logs import LogError, read_log

CHANNELS = (("pitch_rad", "pitch (rad)"), ("pitch_rate_rad_s", "pitch rate (rad/s)"),
            ("speed_m_s", "speed (m/s)"), ("duty_l", "duty"))


@dataclass(frozen=True)
class Comparison:
    lag: float                 # s: real time = simulated time + lag
    aligned_by: str
    rms: dict                  # channel -> RMS difference (SI), None where a side lacks it
    overlap: float             # s


def _trace(path: Path) -> dict[str, np.ndarray]:
    """The run's trace (``sandbox.record.read_trace``), its ``event`` texts as ``event_text``."""
    from ..record import read_trace

    try:
        out = read_trace(path)
    except (ValueError, StopIteration, csv.Error) as err:
        raise LogError(str(path), f"the run's trace cannot be read: {err}") from None
    if out.get("t_s", np.zeros(0)).size < 2:
        raise LogError(str(path), "the run's trace has fewer than two rows")
    if "event" in out:
        out["event_text"] = out.pop("event")
    return out


def compare_run(run_dir: Path, real: Path, event: str | None = None,
                scales: dict | None = None) -> tuple[Comparison, dict, dict]:
    trace_path = Path(run_dir) / "trace.csv"
    if not trace_path.is_file():
        raise LogError(str(run_dir), "no trace.csv: give a run folder written by upright run")
    sim = _trace(trace_path)
    log = read_log(real, scales)
    log.need("compare", "pitch_rate_rad_s")
    t_real = log.t
    t_sim = sim["t_s"]
    if event:
        sim_events = sim.get("event_text", np.array([]))
        hits_sim = [i for i, e in enumerate(sim_events) if event in e]
        hits_real = [i for i, e in enumerate(log.events) if event in e]
        if not hits_sim or not hits_real:
            raise LogError(str(real), f"event {event!r} not found in both the run and the log")
        lag = float(t_real[hits_real[0]] - t_sim[hits_sim[0]])
        aligned_by = f"event {event!r}"
    else:
        dt = float(np.median(np.diff(t_sim)))
        grid = np.arange(0.0, max(t_real[-1], t_sim[-1]), dt)
        a = np.interp(grid, t_sim, sim["pitch_rate_rad_s"], right=0.0)
        b = np.interp(grid, t_real, log.columns["pitch_rate_rad_s"], right=0.0)
        corr = np.correlate(b - b.mean(), a - a.mean(), mode="full")
        shift = int(np.argmax(corr)) - (grid.size - 1)
        lag = shift * dt
        aligned_by = "cross-correlation of the pitch rate"
    lo, hi = max(t_sim[0] + lag, t_real[0]), min(t_sim[-1] + lag, t_real[-1])
    if hi - lo < 0.1:
        raise LogError(str(real), "the log and the run overlap by less than 0.1 s after "
                       "alignment")
    grid = np.linspace(lo, hi, max(int((hi - lo) * 200), 20))
    rms, curves_sim, curves_real = {}, {}, {}
    for name, _label in CHANNELS:
        if name in sim and name in log.columns:
            s = np.interp(grid - lag, t_sim, sim[name])
            r = np.interp(grid, t_real, log.columns[name])
            rms[name] = float(np.sqrt(np.mean((s - r) ** 2)))
            curves_sim[name], curves_real[name] = s, r
        else:
            rms[name] = None
    curves_sim["t"] = curves_real["t"] = grid
    return Comparison(lag, aligned_by, rms, hi - lo), curves_sim, curves_real


def plot_compare(sim: dict, real: dict, path: Path) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    names = [(n, lab) for n, lab in CHANNELS if n in sim]
    fig, axes = plt.subplots(len(names), 1, figsize=(9, 2.4 * len(names)), sharex=True,
                             squeeze=False)
    for ax, (name, label) in zip(axes[:, 0], names):
        ax.plot(sim["t"], sim[name], lw=0.9, label="simulated")
        ax.plot(real["t"], real[name], lw=0.9, label="real log")
        ax.set_ylabel(label)
        ax.legend(fontsize=7)
    axes[-1, 0].set_xlabel("t in the real log (s)")
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path
