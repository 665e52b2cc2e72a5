"""Success rates with confidence intervals, and the pace of a sweep."""

from __future__ import annotations

import math
import time
from collections.abc import Callable
from statistics import NormalDist


def wilson_interval(successes: int, trials: int, confidence: float = 0.95) -> tuple[float, float]:
    """Wilson score interval for a binomial proportion (Wilson 1927; Agresti & Coull 1998).

    The set of p for which the score test (p̂ − p)² / (p(1 − p)/n) ≤ z² does not
    reject, in closed form:
    centre = (p̂ + z²/2n) / (1 + z²/n), half width = z/(1 + z²/n) · √(p̂(1 − p̂)/n + z²/4n²).
    Unlike p̂ ± z√(p̂(1 − p̂)/n) it stays inside [0, 1] and is not empty at 0/n or n/n.
    """
    if trials <= 0:
        raise ValueError(f"trials must be positive, got {trials}")
    if not 0 <= successes <= trials:
        raise ValueError(f"successes must be within 0..{trials}, got {successes}")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence must be between 0 and 1, got {confidence}")
    z = NormalDist().inv_cdf(0.5 + confidence / 2.0)  # 1.959964 at 95 %
    n = float(trials)
    p = successes / n
    denominator = 1.0 + z * z / n
    centre = (p + z * z / (2.0 * n)) / denominator
    half = z / denominator * math.sqrt(p * (1.0 - p) / n + z * z / (4.0 * n * n))
    # the exact ends at 0/n and n/n are 0 and 1; rounding must not push them past
    low = 0.0 if successes == 0 else max(0.0, centre - half)
    high = 1.0 if successes == trials else min(1.0, centre + half)
    return low, high


class ProgressClock:
    """Runs per second and seconds left from ``(done, total)`` updates.

    The clock starts at the first update, so points finished by an earlier
    (resumed) sweep do not inflate the rate.
    """

    def __init__(self, clock: Callable[[], float] = time.monotonic):
        self._clock = clock
        self._start: float | None = None
        self._first_done = 0

    def update(self, done: int, total: int) -> tuple[float | None, float | None]:
        """(runs per second, seconds left); None until a run has finished."""
        now = self._clock()
        if self._start is None:
            self._start, self._first_done = now, done
            return None, None
        ran = done - self._first_done
        elapsed = now - self._start
        if ran <= 0 or elapsed <= 0:
            return None, None
        rate = ran / elapsed
        return rate, max(total - done, 0) / rate
