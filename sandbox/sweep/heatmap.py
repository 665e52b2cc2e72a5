"""Pictures of a grid sweep: pass rate and one figure over one or two varied keys."""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import numpy as np

from ..tables import fmt
from .plan import Axis


def plot_grid(axes: Sequence[Axis], pass_rate: np.ndarray, figure: np.ndarray,
              figure_name: str, path: Path, title: str = "") -> Path:
    """Write a PNG: pass rate (0 to 1) and ``figure`` per grid cell.

    Two axes give two heatmaps (first key down, second key across; cells that
    did not run are grey), one axis gives two line plots. ``pass_rate`` and
    ``figure`` hold one value per cell in point order (NaN where missing).
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    if len(axes) == 2:
        shape = (len(axes[0].values), len(axes[1].values))
        fig, panels = plt.subplots(1, 2, figsize=(12, 5), constrained_layout=True)
        for ax, data, label, cmap, limits in (
                (panels[0], pass_rate, "pass rate", "RdYlGn", (0.0, 1.0)),
                (panels[1], figure, figure_name, "viridis", (None, None))):
            grid = np.ma.masked_invalid(np.asarray(data, dtype=float).reshape(shape))
            colours = plt.get_cmap(cmap).with_extremes(bad="#cccccc")
            image = ax.imshow(grid, origin="lower", aspect="auto", cmap=colours,
                              vmin=limits[0], vmax=limits[1])
            fig.colorbar(image, ax=ax, label=label)
            ax.set_xticks(range(shape[1]), [fmt(v) for v in axes[1].values], rotation=45)
            ax.set_yticks(range(shape[0]), [fmt(v) for v in axes[0].values])
            ax.set_xlabel(axes[1].key)
            ax.set_ylabel(axes[0].key)
            ax.set_title(label)
            if shape[0] * shape[1] <= 150:  # numbers stay readable on small grids
                for (i, j), value in np.ndenumerate(grid.filled(np.nan)):
                    if np.isfinite(value):  # dark text on the light end of viridis
                        light = cmap == "RdYlGn" or image.norm(value) > 0.6
                        ax.text(j, i, fmt(value, 3), ha="center", va="center", fontsize=7,
                                color="black" if light else "white")
    elif len(axes) == 1:
        values = np.asarray(axes[0].values, dtype=float)
        fig, panels = plt.subplots(2, 1, figsize=(8, 6), sharex=True, constrained_layout=True)
        panels[0].plot(values, pass_rate, "o-", color="#55a868")
        panels[0].set_ylim(-0.05, 1.05)
        panels[0].set_ylabel("pass rate")
        panels[1].plot(values, figure, "o-", color="#4c72b0")
        panels[1].set_ylabel(figure_name)
        panels[1].set_xlabel(axes[0].key)
        for ax in panels:
            ax.grid(alpha=0.3)
    else:
        raise ValueError(f"plot_grid draws one or two axes, got {len(axes)}")
    if title:
        fig.suptitle(title)
    fig.savefig(path, dpi=100)
    plt.close(fig)
    return path
