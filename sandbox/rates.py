"""Controller rates a physics step can run, near the one asked for (for error messages).

A controller period must be a whole number of physics steps. When it is not,
the builder gets the round rates (whole hertz) nearest the one they asked for
that the step does divide — the nearest below and the nearest two above, since
a faster loop is the safer change for a balancing robot — and, where one
exists, a round physics step that divides the asked rate's period.
"""

from __future__ import annotations

import math

# physics steps offered instead (s): round values at or below the usual 1 ms
ROUND_STEPS = (2e-3, 1e-3, 5e-4, 2.5e-4, 2e-4, 1.25e-4, 1e-4, 5e-5)
TOLERANCE = 1e-9  # relative, as the runner checks a period against the step


def fits(physics_dt: float, rate_hz: float) -> bool:
    """Whether ``physics_dt`` (s) divides the period of ``rate_hz`` (Hz)."""
    ratio = 1.0 / (rate_hz * physics_dt)
    steps = round(ratio)
    return steps >= 1 and abs(ratio - steps) <= TOLERANCE * max(1.0, ratio)


def round_rates(physics_dt: float, limit: int = 100_000) -> list[float]:
    """Whole-hertz rates (Hz, fastest first) whose period is a whole number of steps."""
    base = 1.0 / physics_dt
    out = []
    for steps in range(1, limit + 1):
        rate = base / steps
        if rate < 1.0:
            break
        if abs(rate - round(rate)) <= TOLERANCE * rate:
            out.append(float(round(rate)))
    return out


def nearby_rates(physics_dt: float, rate_hz: float) -> str:
    """Words for an error message: rates near ``rate_hz`` the step divides, and a round
    physics step that fits ``rate_hz``, e.g. ``"25, 40 or 50 Hz"`` for 30 Hz at 1 ms."""
    rates = round_rates(physics_dt)
    if not rates:  # no whole-hertz rate fits this step: the exact nearest ones
        base = 1.0 / physics_dt
        steps = max(1, math.floor(base / rate_hz))
        rates = [base / n for n in (steps + 1, steps, max(1, steps - 1)) if n >= 1]
    below = [r for r in rates if r < rate_hz]
    above = sorted(r for r in rates if r > rate_hz)
    chosen = sorted(set(below[:1] + above[:2]))
    if len(chosen) < 3:  # at either end of the range: take the nearest others
        extra = sorted(rates, key=lambda r: abs(math.log(r / rate_hz)))
        chosen = sorted(set(chosen + [r for r in extra if r not in chosen][:3 - len(chosen)]))
    words = [f"{r:g}" for r in chosen]
    text = (", ".join(words[:-1]) + " or " + words[-1] if len(words) > 1 else words[0]) + " Hz"
    step = next((s for s in ROUND_STEPS if s < physics_dt * (1 - TOLERANCE)
                 and fits(s, rate_hz)), None)
    if step is not None:
        text += f" (or keep {rate_hz:g} Hz with --physics-step {step * 1000:g})"
    return text
