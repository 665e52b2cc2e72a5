"""The spin test's duty sequence: what the board drives, the same on both wheels.

Segments (start s, end s, duty at start, duty at end), linear in between:
rest, step up, step down, reversal, stop, a slow ramp up from zero (breakaway), a slow ramp
through zero to reverse (the stop, the play, the reverse breakaway), rest.
"""

from __future__ import annotations

SPIN_SEGMENTS: tuple[tuple[str, float, float, float, float], ...] = (
    ("rest", 0.0, 1.0, 0.0, 0.0),
    ("step up", 1.0, 3.0, 0.6, 0.6),
    ("step down", 3.0, 5.0, 0.3, 0.3),
    ("reversal", 5.0, 7.0, -0.6, -0.6),
    ("stop", 7.0, 8.5, 0.0, 0.0),
    ("ramp up", 8.5, 16.5, 0.0, 0.25),
    ("ramp through zero", 16.5, 28.5, 0.25, -0.25),
    ("end", 28.5, 29.5, 0.0, 0.0),
)
SPIN_DURATION = SPIN_SEGMENTS[-1][2]


def spin_duty(t: float) -> float:
    """The commanded duty at t seconds from the start of the sequence (0 after the end)."""
    for _name, start, end, first, last in SPIN_SEGMENTS:
        if start <= t < end:
            return first + (last - first) * (t - start) / (end - start)
    return 0.0


def segment(name: str) -> tuple[float, float, float, float]:
    """(start, end, first duty, last duty) of a named segment."""
    for seg_name, start, end, first, last in SPIN_SEGMENTS:
        if seg_name == name:
            return start, end, first, last
    raise KeyError(name)
