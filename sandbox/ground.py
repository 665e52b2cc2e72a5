"""The floor a run stands on, as data: friction patches, steps, rough stretches, slope.

:class:`Ground` says what the floor is; :mod:`sandbox.world` builds it in the engine
(boxes for flat pieces, a heightfield for rough ground). Here also the pieces a flat
floor is cut into, the rough stretch's heights (plain numpy) and the ground's record
in run.yaml. No engine calls.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Patch:
    """A stretch of floor with its own friction, from ``start`` to ``end`` m along x."""

    start: float
    end: float
    friction: float


@dataclass(frozen=True)
class Step:
    """A raised strip across the floor (a door threshold): its near edge at ``at`` m."""

    at: float
    height: float
    length: float = 0.03


@dataclass(frozen=True)
class Rough:
    """Uneven floor: smoothed random heights of about ``amplitude`` m, bumps ``wavelength`` m."""

    amplitude: float
    wavelength: float
    seed: int = 0


@dataclass(frozen=True)
class Ground:
    """The floor: friction (wheel on floor), rolling resistance coefficient, slope and features.

    ``slope`` (rad) tilts the floor about the world y axis so that driving
    forward (+x) climbs it. Positions of patches and steps are along the floor.
    """

    friction: float = 0.9
    rolling_resistance: float = 0.0
    slope: float = 0.0
    # Bullet's torsional friction on the wheels' line contacts skews the pitch dynamics
    # (tall-mast's free fall 7 % fast at 0.001): off unless a test asks for it.
    spinning_friction: float = 0.0
    patches: tuple[Patch, ...] = ()
    steps: tuple[Step, ...] = ()
    rough: Rough | None = None


def ground_record(ground: Ground) -> dict:
    """Plain data describing a Ground (SI units), for run.yaml and replay."""
    return {
        "friction": ground.friction,
        "rolling_resistance": ground.rolling_resistance,
        "slope_rad": ground.slope,
        "patches": [[p.start, p.end, p.friction] for p in ground.patches],
        "steps": [[s.at, s.height, s.length] for s in ground.steps],
        "rough": None if ground.rough is None else [ground.rough.amplitude,
                                                    ground.rough.wavelength, ground.rough.seed],
    }


def ground_from_record(data: dict | None) -> Ground | None:
    """The Ground that :func:`ground_record` described (None if no record)."""
    if not data:
        return None
    rough = data.get("rough")
    return Ground(
        friction=float(data.get("friction", 0.9)),
        rolling_resistance=float(data.get("rolling_resistance", 0.0)),
        slope=float(data.get("slope_rad", 0.0)),
        patches=tuple(Patch(*p) for p in data.get("patches", [])),
        steps=tuple(Step(*s) for s in data.get("steps", [])),
        rough=None if not rough else Rough(rough[0], rough[1], int(rough[2])),
    )


FLOOR_COLOUR = (0.82, 0.80, 0.74, 1.0)
PATCH_COLOUR = (0.55, 0.72, 0.86, 1.0)
STEP_COLOUR = (0.45, 0.40, 0.36, 1.0)
FLOOR_HALF_WIDTH = 5.0  # m across the robot's path
FLOOR_EXTENT = (-20.0, 40.0)  # m along the path
ROUGH_EXTENT = (-1.0, 8.0)
ROUGH_HALF_WIDTH = 0.6


def floor_pieces(ground: Ground) -> list[tuple[float, float, float]]:
    """The flat floor split at patch edges: (start m, end m, friction) along x, in order."""
    cuts = {FLOOR_EXTENT[0], FLOOR_EXTENT[1]}
    for patch in ground.patches:
        cuts.update((patch.start, patch.end))
    edges = sorted(c for c in cuts if FLOOR_EXTENT[0] <= c <= FLOOR_EXTENT[1])
    pieces = []
    for a, b in zip(edges[:-1], edges[1:]):
        if b - a < 1e-6:
            continue
        middle = 0.5 * (a + b)
        friction = ground.friction
        for patch in ground.patches:  # a later patch wins where patches overlap
            if patch.start <= middle <= patch.end:
                friction = patch.friction
        pieces.append((a, b, friction))
    return pieces


def gaussian_smooth_wrapped(values: np.ndarray, sigma: float, truncate: float = 4.0) -> np.ndarray:
    """Gaussian smoothing of a grid along each axis in turn, wrapping at the edges.

    The same numbers, to the last bit, as ``scipy.ndimage.gaussian_filter(values,
    sigma, mode="wrap", truncate=truncate)`` (its kernel, its order of sums; tested),
    in plain numpy: importing scipy.ndimage costs a fifth of a second of every run on
    rough floor. ``sigma`` in grid cells.
    """
    radius = int(truncate * float(sigma) + 0.5)
    x = np.arange(-radius, radius + 1)
    weights = np.exp(-0.5 / (sigma * sigma) * x ** 2)
    weights = weights / weights.sum()
    out = np.asarray(values, dtype=float)
    for axis in range(out.ndim):
        source, out = out, out * weights[radius]
        for j in range(radius, 0, -1):  # outermost taps first, as scipy sums them
            out = out + (np.roll(source, j, axis) + np.roll(source, -j, axis)) * weights[radius - j]
    return out


def rough_heights(rough: Rough, spacing: float, extent=ROUGH_EXTENT,
                  half_width: float = ROUGH_HALF_WIDTH) -> np.ndarray:
    """Heights (m) on a grid, rows along x: smoothed seeded noise scaled to ±amplitude.

    The first half metre ramps up from flat so the robot starts on level floor.
    """
    rng = np.random.default_rng(rough.seed)
    nx = int(round((extent[1] - extent[0]) / spacing)) + 1
    ny = int(round(2 * half_width / spacing)) + 1
    noise = rng.standard_normal((nx, ny))
    heights = gaussian_smooth_wrapped(noise, rough.wavelength / (4.0 * spacing))
    peak = float(np.max(np.abs(heights)))
    heights *= rough.amplitude / peak if peak > 0 else 0.0
    x = extent[0] + spacing * np.arange(nx)
    ramp = np.clip((x - 0.1) / 0.4, 0.0, 1.0)
    return heights * ramp[:, None]
