"""Mass properties of simple solids and their combination (SI units).

Formulas from any rigid-body dynamics text (e.g. Meriam & Kraige,
*Engineering Mechanics: Dynamics*, appendix table of mass moments of inertia).
"""

from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class MassProperties:
    """Mass (kg), centre of mass (m, 3-vector) and inertia about it (kg·m², 3×3)."""

    mass: float
    com: np.ndarray
    inertia: np.ndarray


def box_inertia(mass: float, size: Iterable[float]) -> np.ndarray:
    """Solid box of sides (a, b, c) along x, y, z about its centre: m(b²+c²)/12, …"""
    a, b, c = (float(s) for s in size)
    return (mass / 12.0) * np.diag([b * b + c * c, a * a + c * c, a * a + b * b])


def cylinder_inertia_y(mass: float, radius: float, length: float) -> np.ndarray:
    """Solid cylinder with its axis along y, about its centre.

    Axis: m r²/2; across: m (3 r² + h²)/12.
    """
    axial = 0.5 * mass * radius * radius
    across = mass * (3.0 * radius * radius + length * length) / 12.0
    return np.diag([across, axial, across])


def parallel_axis(inertia: np.ndarray, mass: float, offset: Iterable[float]) -> np.ndarray:
    """Move an inertia about the centre of mass to a point at ``-offset`` from it.

    I_P = I_C + m (|d|² E − d dᵀ), d the vector from the new point to the centre
    of mass (Steiner's theorem).
    """
    d = np.asarray(offset, dtype=float)
    return np.asarray(inertia, dtype=float) + mass * (np.dot(d, d) * np.eye(3) - np.outer(d, d))


def combine(pieces: Iterable[MassProperties]) -> MassProperties:
    """One rigid body made of several pieces: total mass, centre of mass, inertia about it."""
    pieces = list(pieces)
    mass = sum(p.mass for p in pieces)
    if mass <= 0.0:
        raise ValueError("a body needs a positive mass")
    com = sum(p.mass * np.asarray(p.com, dtype=float) for p in pieces) / mass
    inertia = np.zeros((3, 3))
    for p in pieces:
        inertia += parallel_axis(p.inertia, p.mass, np.asarray(p.com, dtype=float) - com)
    return MassProperties(mass=float(mass), com=np.asarray(com), inertia=inertia)
