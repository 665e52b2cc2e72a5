"""fit.png: each bench log against its fitted model, residuals below."""

from __future__ import annotations

from pathlib import Path

import numpy as np


def plot_fits(fits: dict, path: Path) -> Path:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    panels = []
    for name in ("swing", "drop"):
        if name in fits:
            c = fits[name].curves
            panels.append((name, c["t"], c["log"], c["model"], "pitch rate (rad/s)"))
    if "spin" in fits:
        for side in fits["spin"].sides:
            c = side.curves
            panels.append((f"spin {side.side}", c["t"], c["speed"], c["line"],
                           "wheel speed (rad/s)"))
    if not panels:
        return path
    fig, axes = plt.subplots(2, len(panels), figsize=(4.5 * len(panels), 6), squeeze=False)
    for k, (name, t, log, model, label) in enumerate(panels):
        axes[0, k].plot(t, log, lw=0.8, label="log")
        axes[0, k].plot(t, model, lw=0.8, label="fitted model")
        axes[0, k].set_title(name)
        axes[0, k].set_ylabel(label)
        axes[0, k].legend(fontsize=7)
        axes[1, k].plot(t, np.asarray(log) - np.asarray(model), lw=0.6, color="tab:red")
        axes[1, k].set_ylabel("residual")
        axes[1, k].set_xlabel("t (s)")
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)
    return path
