"""Start-up of `upright` as whole processes: --help, inspect, and a 10 s run without video.

Each command runs N times (default 10) as a fresh process; the median wall time is printed
beside `python -c pass` measured in the same run, and their ratio. Not a timed test.
The commands run the `upright` console script of the venv with PYTHONPATH set to this
tree, so they import this tree's `sandbox` (checked before timing), not the installed one.

    python bench/startup.py [--repeat 10]
"""

from __future__ import annotations

import argparse
import os
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
ROBOT = ROOT / "robots" / "desk-mite.yaml"
CONTROLLER = ROOT / "controllers" / "cascade.py"


ENV = {**os.environ, "PYTHONPATH": os.pathsep.join(
    [str(ROOT), *filter(None, [os.environ.get("PYTHONPATH")])])}


def median_seconds(argv: list[str], repeat: int) -> float:
    """Median wall-clock seconds of ``argv`` run ``repeat`` times as a new process."""
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        subprocess.run(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=False,
                       env=ENV, cwd=ROOT)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def _python_of(script: str) -> str:
    """The interpreter named on a console script's first line (#!...)."""
    first = Path(script).read_text(encoding="utf-8", errors="replace").splitlines()[0]
    return first[2:].strip() if first.startswith("#!") else sys.executable


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=10)
    args = parser.parse_args()
    upright = shutil.which("upright") or ""
    cli = [upright] if upright else [sys.executable, "-m", "sandbox.cli"]
    script = upright or sys.executable
    where = subprocess.run([sys.executable if not upright else _python_of(script), "-P", "-c",
                            "import sandbox; print(sandbox.__file__)"], env=ENV,
                           capture_output=True, text=True, check=True).stdout.strip()
    if Path(where).resolve().parent.parent != ROOT:
        raise SystemExit(f"the commands would import {where}, not this tree ({ROOT})")
    print(f"sandbox from {Path(where).parent}")
    out = Path(tempfile.mkdtemp(prefix="upright-startup-"))
    cases = [
        ("python -c pass", [sys.executable, "-c", "pass"], None),
        ("upright --help", [*cli, "--help"], 0.12),
        ("upright inspect desk-mite", [*cli, "inspect", str(ROBOT)], 0.3),
        ("upright run 10 s, no video, no plots",
         [*cli, "run", str(ROBOT), str(CONTROLLER), "--duration", "10", "--no-plots",
          "--out", str(out / "run")], 0.8),
        ("upright run 10 s, no video, plots",
         [*cli, "run", str(ROBOT), str(CONTROLLER), "--duration", "10",
          "--out", str(out / "run-plots")], None),
    ]
    baseline = None
    print(f"{'command':40s} {'median s':>9s} {'x pass':>7s} {'target s':>9s}")
    for label, argv, target in cases:
        seconds = median_seconds(argv, args.repeat)
        baseline = baseline or seconds
        shown = f"{target:.2f}" if target else "-"
        print(f"{label:40s} {seconds:9.3f} {seconds / baseline:7.1f} {shown:>9s}")
    shutil.rmtree(out, ignore_errors=True)


if __name__ == "__main__":
    main()
