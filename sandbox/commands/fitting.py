"""`upright fit` and `upright compare`: a robot file against logs of the real robot."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Annotated

import typer

from ..tables import fmt, table
from .common import JsonOption, RobotArg, handles_errors


@handles_errors
def fit(
    robot: RobotArg,
    out: Annotated[Path, typer.Option("-o", "--out", help="Fitted robot file to write.")],
    swing: Annotated[Path | None, typer.Option("--swing", help="Swing test log (CSV).")] = None,
    spin: Annotated[Path | None, typer.Option("--spin", help="Spin test log (CSV).")] = None,
    drop: Annotated[Path | None, typer.Option("--drop", help="Drop test log (CSV).")] = None,
    play: Annotated[Path | None, typer.Option(
        "--play", help="Play check log (CSV, wheels clamped).")] = None,
    mass: Annotated[str | None, typer.Option(
        "--mass", help="Whole robot as weighed, e.g. 0.61 or '610 g'.")] = None,
    balance_point: Annotated[str | None, typer.Option(
        "--balance-point", help="Axle to balance point, e.g. '71 mm'.")] = None,
    scale: Annotated[list[str] | None, typer.Option(
        "--scale", help="Raw column scale, e.g. gyro_y=131/deg/s.")] = None,
    json_out: JsonOption = False,
    plot: Annotated[Path | None, typer.Option("--plot", help="Write fit.png here.")] = None,
) -> None:
    """Fit a robot file to bench logs (swing, spin, drop, play check), with 95 % intervals."""
    import numpy as np

    from ..fit.logs import parse_scales
    from ..fit.plot import plot_fits
    from ..fit.robotfile import dumps
    from ..fit.run import fit_robot
    from ..units import to_si

    result = fit_robot(robot, swing=swing, spin=spin, drop=drop, play=play,
                       mass=to_si(mass, "mass") if mass is not None else None,
                       balance_point=(to_si(balance_point, "length")
                                      if balance_point is not None else None),
                       scales=parse_scales(scale))
    out.write_text(result.text, encoding="utf-8")
    if plot is not None:
        plot_fits(result.fits, plot)
    if json_out:
        typer.echo(dumps(result.as_json()))
        return
    rows = []
    for p in result.parameters:
        if isinstance(p.fitted, list):
            file_v = fmt(float(np.linalg.norm(p.file))) if p.file is not None else "-"
            fitted = float(np.linalg.norm(p.fitted))
            low, high = float(np.linalg.norm(p.low)), float(np.linalg.norm(p.high))
            change = fitted / float(np.linalg.norm(p.file)) - 1 if p.file else None
            key = p.key + " (distance)"
        else:
            file_v = fmt(p.file) if p.file is not None else "-"
            fitted, low, high, key = p.fitted, p.low, p.high, p.key
            change = fitted / p.file - 1 if p.file else None
        rows.append([key + ("" if p.written else " (check)"), file_v, fmt(fitted),
                     f"{fmt(low)} .. {fmt(high)}",
                     f"{change * 100:+.1f} %" if change is not None else "new", p.source])
    typer.echo(table(rows, ["parameter (SI)", "file", "fitted", "95 % interval", "change",
                            "from"]))
    if result.not_determined:
        typer.echo("left alone (not determined by these logs): "
                   + ", ".join(result.not_determined))
    for note in result.notes:
        typer.echo(f"note: {note}")
    typer.echo(f"wrote {out}; try it: upright inspect {out}")


@handles_errors
def compare(
    run_dir: Annotated[Path, typer.Argument(help="Run folder (upright run --out).")],
    real: Annotated[Path, typer.Argument(help="The real robot's log of the same manoeuvre.")],
    event: Annotated[str | None, typer.Option(
        "--event", help="Align on the first row whose event column holds this.")] = None,
    out: Annotated[Path | None, typer.Option("-o", "--out", help="Overlay plot path.")] = None,
    scale: Annotated[list[str] | None, typer.Option(
        "--scale", help="Raw column scale, e.g. gyro_y=131/deg/s.")] = None,
    json_out: JsonOption = False,
) -> None:
    """A real robot's log against a simulated run: lag, RMS differences, overlay plot."""
    from ..fit.compare import compare_run, plot_compare
    from ..fit.logs import parse_scales

    result, sim, real_curves = compare_run(run_dir, real, event, parse_scales(scale))
    path = out or (run_dir / "compare.png")
    plot_compare(sim, real_curves, path)
    if json_out:
        typer.echo(json.dumps({"lag_s": result.lag, "aligned_by": result.aligned_by,
                               "overlap_s": result.overlap, "rms": result.rms,
                               "plot": str(path)}, indent=2))
        return
    rows = [[name, fmt(v) if v is not None else "not in both"] for name, v in result.rms.items()]
    typer.echo(f"aligned by {result.aligned_by}: lag {result.lag * 1000:.0f} ms, "
               f"overlap {result.overlap:.2f} s")
    typer.echo(table(rows, ["channel", "RMS difference (SI)"]))
    typer.echo(f"overlay: {path}")
