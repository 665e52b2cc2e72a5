"""Sweeps, robustness and tuning: many runs, on this machine or a Dask cluster.

- :func:`run_sweep` / :func:`sweep_command`: grids (``--vary``) and Monte Carlo
  draws within tolerances (``--samples`` with ``--spread``), with resume.
- :func:`tune` / :func:`tune_command`: gain search with scipy's Nelder–Mead or Powell.
- :func:`open_executor`: this process, local processes, or a Dask scheduler.
"""

from .executors import open_executor
from .grid import SweepReport, TextTable, run_sweep, sweep_command
from .jobs import FIGURES, PointJob, RunCommon, run_point
from .plan import Axis, Point, Spread, SweepError, make_points, parse_spread, parse_vary
from .stats import ProgressClock, wilson_interval
from .tune import CostWeights, TuneResult, run_cost, tune, tune_command

__all__ = [
    "FIGURES",
    "Axis",
    "CostWeights",
    "Point",
    "PointJob",
    "ProgressClock",
    "RunCommon",
    "Spread",
    "SweepError",
    "SweepReport",
    "TextTable",
    "TuneResult",
    "make_points",
    "open_executor",
    "parse_spread",
    "parse_vary",
    "run_cost",
    "run_point",
    "run_sweep",
    "sweep_command",
    "tune",
    "tune_command",
    "wilson_interval",
]
