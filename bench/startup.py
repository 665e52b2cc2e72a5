"""Start-up of `upright` as whole processes: --help, inspect, and a 10 s run without video.

Each command runs N times (default 10) as a fresh process; the median wall time is printed
beside `python -c pass` measured in the same run, and their ratio. Not a timed test.

    python bench/startup.py [--repeat 10]
"""

from __future__ import annotations

import argparse
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


def median_seconds(argv: list[str], repeat: int) -> float:
    """Median wall-clock seconds of ``argv`` run ``repeat`` times as a new process."""
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        subprocess.run(argv, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, check=False)
        times.append(time.perf_counter() - start)
    return statistics.median(times)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeat", type=int, default=10)
    args = parser.parse_args()
    upright = shutil.which("upright") or ""
    cli = [upright] if upright else [sys.executable, "-m", "sandbox.cli"]
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
