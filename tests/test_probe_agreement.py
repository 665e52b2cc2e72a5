"""The delay margin `analyze --controller` predicts against full nonlinear runs.

On the demo robots with ideal parts (tests/ideal_parts.py): the linear loop knows no
gearbox play, static friction or IMU filter, so those would blur the comparison.

Slow: each check bisects on the loop delay with complete runs in the physics engine.
"""

from __future__ import annotations

import math
from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
from ideal_parts import ideal_robot

from sandbox.analysis import analyze, emit_config, equivalent_poles
from sandbox.margins import Bracket, Stress, find_margins
from sandbox.probe import analyze_controller
from sandbox.runner import RunSettings
from sandbox.session import run_once

ROOT = Path(__file__).resolve().parents[1]
ROBOTS = sorted(p.stem for p in (ROOT / "robots").glob("*.yaml"))
CASCADE = str(ROOT / "controllers" / "cascade.py")
SATURATED = 0.01  # a run with the duty at full for more than 1 % of its ticks: not small-signal
GROWING = 1.5  # the pitch rate's rms over the last second against that over the second one

pytestmark = pytest.mark.slow


def _settings(spec) -> RunSettings:
    """The cascade example with the gains `analyze --emit-config` writes (the constructed
    case of tests/test_margins.py), 4 s from 0.5 deg."""
    config = emit_config(analyze(spec), CASCADE)
    return RunSettings(controller=CASCADE, config=config, duration=4.0, tilt=math.radians(0.5))


def _small_signal_stable(spec, settings: RunSettings, latency: float) -> bool:
    """Stays up, the duty hardly saturates, and the swing (kept going by the IMU's noise)
    does not grow from the second second to the last."""
    run = run_once(spec, replace(settings, latency=latency), write=False)
    if run.summary["status"] != "completed" or run.summary["saturation_fraction"] > SATURATED:
        return False
    t = np.asarray(run.trace["t_s"], dtype=float)
    rate = np.asarray(run.trace["pitch_rate_rad_s"], dtype=float)
    early = np.std(rate[(t >= 1.0) & (t < 2.0)])
    late = np.std(rate[t >= t[-1] - 1.0])
    return bool(late <= GROWING * early)


def _simulated_delay_margin(spec, settings: RunSettings) -> float:
    """The largest added latency (1 ms steps, bisection) at which the run stays small-signal."""
    bracket = Bracket(Stress("delay", "s", "", limit=0.1, resolution=0.001, quantum=0.001), 0.0)
    while (amount := bracket.next_probe()) is not None:
        bracket.record(amount, _small_signal_stable(spec, settings, amount))
    assert bracket.failing is not None, "the search range holds the margin"
    return bracket.passing


@pytest.mark.parametrize("robot", ROBOTS)
def test_predicted_delay_margin_matches_the_simulation(robot: str) -> None:
    """The delay margin of the sampled linear loop (phase margin over crossover, the
    classical delay margin: Åström & Murray, *Feedback Systems*, 2nd ed., §10.3)
    [memory] against bisection on `--latency` with full runs (motors, friction, contacts,
    quantised encoders, IMU noise), within 25 % (the issue's figure). A run counts as stable
    when it stays up with the duty saturated on at most 1 % of its ticks and its swing
    does not grow by half from the second second to the last: beyond the
    linear margin the loop grows an oscillation until the duty clips (common practice:
    saturation turns linear instability into a bounded limit cycle)."""
    spec = ideal_robot(robot)
    settings = _settings(spec)
    predicted = analyze_controller(spec, CASCADE, settings.config)["delay_margin_s"]
    simulated = _simulated_delay_margin(spec, settings)
    assert abs(simulated - predicted) <= 0.25 * predicted, (
        f"{robot}: delay margin predicted {predicted * 1000:.2f} ms, "
        f"simulated {simulated * 1000:.0f} ms")


@pytest.mark.parametrize("robot", ROBOTS)
def test_margins_command_agrees_with_the_prediction(robot: str) -> None:
    """`upright margins` (the push test passed with the duty at full on at most
    `margins.SATURATED_SHARE` of its ticks) finds the predicted delay margin (phase margin
    over crossover: Åström & Murray, *Feedback Systems*, 2nd ed., §10.3 [memory]) within
    25 % (the issue's figure), on every demo robot with the emitted gains."""
    spec = ideal_robot(robot)
    settings = _settings(spec)
    predicted = analyze_controller(spec, CASCADE, settings.config)["delay_margin_s"]
    result = find_margins(spec, replace(settings, duration=10.0, tilt=0.0),
                          stresses=("delay",), workers=1)
    (entry,) = result.margins
    assert abs(entry["margin"] - predicted) <= 0.25 * predicted, (
        f"{robot}: margins found {entry['margin'] * 1000:.0f} ms, "
        f"predicted {predicted * 1000:.2f} ms")


def test_past_the_margin_a_saturated_limit_cycle_at_the_predicted_frequency() -> None:
    """Why `upright margins` can report more delay than the linear loop stands: on
    shelf-runner at 15 ms the linear loop has an unstable pair (analyze --controller); the
    full run does not fall but swings at that pair's frequency (within 15 %, the issue's
    figure for a predicted oscillation) with the duty saturated on a fifth of the ticks or
    more, and a test that only asks "did it stay up" passes it."""
    spec = ideal_robot("shelf-runner")
    settings = _settings(spec)
    probed = analyze_controller(spec, CASCADE, settings.config, latency=0.015)
    assert not probed["stable"]
    poles = [complex(a, b) for a, b in probed["closed_loop_poles"]]
    worst = max((z for z in poles if z.imag > 0), key=abs)
    s = complex(equivalent_poles(np.array([worst]), 1.0 / probed["controller_rate_hz"])[0])
    predicted_hz = s.imag / (2 * math.pi)
    run = run_once(spec, replace(settings, latency=0.015), write=False)
    assert run.summary["status"] == "completed"
    assert run.summary["saturation_fraction"] >= 0.2
    trace = run.trace
    t = np.asarray(trace["t_s"], dtype=float)
    rate = np.asarray(trace["pitch_rate_rad_s"], dtype=float)[t >= 1.0]
    rate = (rate - rate.mean()) * np.hanning(rate.size)
    freqs = np.fft.rfftfreq(rate.size, t[1] - t[0])
    seen_hz = freqs[1:][np.argmax(np.abs(np.fft.rfft(rate))[1:])]
    assert seen_hz == pytest.approx(predicted_hz, rel=0.15), (seen_hz, predicted_hz)
