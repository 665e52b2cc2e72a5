"""The loop of a controller and the robot's linear model, sampled as a run samples it.

The plant is the planar model of :mod:`sandbox.analysis` (state ``[x, v, pitch,
pitch_rate]``, input the duty on both motors), stepped exactly (zero-order hold)
at the physics step and read at each controller tick the way the runner reads it:

- the duty computed at tick k reaches the bridge ``duty_delay_steps`` physics steps
  after the tick (``--latency`` plus the board's compute time; 0 = at the tick) and
  is held until the next duty arrives;
- the gyro reads the pitch rate of the newest IMU sample, taken
  ``sample_delay_steps`` before the tick;
- the accelerometer's tilt ``atan2(-a_x, a_z)`` linearises to
  ``pitch - a/g``, with ``a`` the mount point's forward acceleration over the
  physics step before the sample (the runner differences the point's velocity);
- each encoder counts ``counts_per_radian · (x/r - pitch)`` at the tick itself
  (quantisation left out).

Sensor states at earlier steps come from the tick's state by stepping back
(the step matrix is invertible), so the sampled plant needs only the duties
still in the pipeline as extra states. Everything here is linear algebra on
small matrices; nothing touches the physics engine.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import scipy.optimize

from ..analysis import zoh_discretise
from ..units import STANDARD_GRAVITY

SENSOR_NAMES = ("tilt", "gyro", "ticks_left", "ticks_right")
POLE_AT_ONE = 1e-6  # |z - 1| below this (e-fold time over 1e6 periods): the free position mode


@dataclass(frozen=True)
class SensorGeometry:
    """Where the sensors sit and what they count, SI units.

    ``counts_per_radian``: encoder counts per rad of wheel turn relative to the
    body (per side); ``imu_height``: the IMU's z above the axle (m);
    ``accel_feels_motion``: whether the accelerometer's tilt includes the robot's
    own acceleration (a real sensor's does; False is the textbook ideal tilt sensor).
    """

    wheel_radius: float
    counts_per_radian: float
    imu_height: float
    gravity: float = STANDARD_GRAVITY
    accel_feels_motion: bool = True


@dataclass(frozen=True)
class Timing:
    """Physics step (s), physics steps per controller tick, and the delays in physics steps."""

    physics_dt: float
    steps_per_tick: int
    duty_delay_steps: int = 0
    sample_delay_steps: int = 0

    @property
    def period(self) -> float:
        return self.physics_dt * self.steps_per_tick


@dataclass(frozen=True)
class SampledPlant:
    """``X_{k+1} = F X_k + G w_k``, sensors ``y_k = H X_k`` (rows: SENSOR_NAMES).

    ``X = [x, v, pitch, pitch_rate, w_{k-1}, ..., w_{k-P}]``: the state at the tick and
    the duties still to act; ``w_k`` the duty computed at tick k; ``period`` in s.
    """

    F: np.ndarray
    G: np.ndarray
    H: np.ndarray
    period: float


def sampled_plant(A: np.ndarray, B: np.ndarray, geometry: SensorGeometry,
                  timing: Timing) -> SampledPlant:
    """The robot's linear model (A, B continuous, input one duty) as the controller sees it."""
    dt, spt = timing.physics_dt, timing.steps_per_tick
    delay, sample = timing.duty_delay_steps, timing.sample_delay_steps
    if spt < 1 or delay < 0 or sample < 0:
        raise ValueError("steps per tick must be >= 1 and the delays >= 0 steps")
    phi, gamma = zoh_discretise(A, B, dt)
    gamma = gamma[:, 0]

    def lag(e: int) -> int:
        """The duty in force at the physics step e steps before a tick is w_{k - lag}."""
        return -(-(e + delay) // spt)

    deepest = sample + (1 if geometry.accel_feels_motion else 0)
    pipeline = max([lag(e) for e in range(1, deepest + 1)]
                   + [lag(e) - 1 for e in range(1, spt + 1)] + [0])
    size = 4 + pipeline

    def slot(j: int) -> int:  # column of w_{k-j}, j >= 1
        return 3 + j

    powers = [np.eye(4)]
    for _ in range(max(spt, deepest) + 1):
        powers.append(phi @ powers[-1])
    back = np.linalg.inv(phi)

    def state_before(e: int) -> np.ndarray:
        """4 x size map from X_k to the plant state e physics steps before tick k."""
        out = np.zeros((4, size))
        out[:, :4] = np.eye(4)
        for i in range(1, e + 1):
            out[:, slot(lag(i))] -= powers[i - 1] @ gamma
        return np.linalg.matrix_power(back, e) @ out

    F = np.zeros((size, size))
    G = np.zeros(size)
    F[:4, :4] = powers[spt]
    for e in range(1, spt + 1):
        j = lag(e) - 1
        term = powers[e - 1] @ gamma
        if j == 0:
            G[:4] += term
        else:
            F[:4, slot(j)] += term
    if pipeline:
        G[slot(1)] = 1.0
        for j in range(2, pipeline + 1):
            F[slot(j), slot(j - 1)] = 1.0

    at_sample = state_before(sample)
    gyro = at_sample[3]
    tilt = at_sample[2].copy()
    if geometry.accel_feels_motion:
        mount_speed = np.array([0.0, 1.0, 0.0, geometry.imu_height])
        change = mount_speed @ (at_sample - state_before(sample + 1))
        tilt -= change / (geometry.gravity * dt)
    relative = np.array([1.0 / geometry.wheel_radius, 0.0, -1.0, 0.0])
    ticks = geometry.counts_per_radian * relative @ state_before(0)
    H = np.vstack([tilt, gyro, ticks, ticks])
    return SampledPlant(F=F, G=G, H=H, period=timing.period)


# ------------------------------------------------------------------ the controller


@dataclass(frozen=True)
class ControllerModel:
    """A linear controller from the four sensor inputs to the duty, one common denominator.

    In the delay operator q = z⁻¹: ``w = Σ_j (num[j](q) / den(q)) · y_j``, ``den[0] = 1``;
    ``num`` has one row per input of SENSOR_NAMES, coefficients of q⁰, q¹, ...
    """

    den: np.ndarray
    num: np.ndarray

    @property
    def order(self) -> int:
        return len(self.den) - 1

    def realise(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(Ac, Bc, Cc, Dc) in observer canonical form (observable by construction)."""
        a = np.asarray(self.den, dtype=float)
        b = np.asarray(self.num, dtype=float)
        n = self.order
        direct = b[:, 0]
        Ac = np.zeros((n, n))
        Bc = np.zeros((n, b.shape[0]))
        if n:
            Ac[:, 0] = -a[1:]
            Ac[:-1, 1:] = np.eye(n - 1)
            Bc[:, :] = (b[:, 1:] - np.outer(direct, a[1:])).T
        Cc = np.zeros(n)
        if n:
            Cc[0] = 1.0
        return Ac, Bc, Cc, direct

    def response(self, q: np.ndarray) -> np.ndarray:
        """Transfer of each input at delay-operator values q: shape (inputs, len(q))."""
        poly = np.polynomial.polynomial.polyval
        return np.array([poly(q, row) for row in self.num]) / poly(q, self.den)


def closed_loop_matrix(plant: SampledPlant, controller: ControllerModel) -> np.ndarray:
    """State matrix of the closed loop [plant with pipeline; controller]."""
    Ac, Bc, Cc, Dc = controller.realise()
    F, G, H = plant.F, plant.G[:, None], plant.H
    top = np.hstack([F + G @ (Dc @ H)[None, :], G @ Cc[None, :]])
    bottom = np.hstack([Bc @ H, Ac])
    return np.vstack([top, bottom])


def closed_loop_poles(plant: SampledPlant, controller: ControllerModel) -> np.ndarray:
    """Closed-loop poles (z-plane), largest magnitude first."""
    poles = np.linalg.eigvals(closed_loop_matrix(plant, controller))
    return np.array(sorted(poles, key=lambda z: (-abs(z), -z.imag)))


def is_stable(poles: np.ndarray) -> bool:
    """All poles inside the unit circle, but for at most one at z = 1 (the free position).

    A pole at exactly 1 is the robot's position when nothing feeds it back: it
    drifts, but balances; a second one (or one outside) is a runaway or a fall.
    """
    at_one = np.abs(poles - 1.0) < POLE_AT_ONE
    return bool(at_one.sum() <= 1 and np.all(np.abs(poles[~at_one]) < 1.0 - 1e-12))


def loop_state_space(plant: SampledPlant, controller: ControllerModel
                     ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(A, B, C) of the loop broken at the duty, in the negative-feedback sign.

    L = −K·P: the duty injected, through the plant and the controller, back to the
    duty; the closed loop is 1 + L = 0. D = 0 (a duty never acts on the same tick's
    readings).
    """
    Ac, Bc, Cc, Dc = controller.realise()
    F, G, H = plant.F, plant.G, plant.H
    n_p, n_c = F.shape[0], Ac.shape[0]
    A = np.zeros((n_p + n_c, n_p + n_c))
    A[:n_p, :n_p] = F
    A[n_p:, :n_p] = Bc @ H
    A[n_p:, n_p:] = Ac
    B = np.concatenate([G, np.zeros(n_c)])
    C = -np.concatenate([Dc @ H, Cc])
    return A, B, C


def loop_response(plant: SampledPlant, controller: ControllerModel) -> Callable:
    """L(ω) for ω in rad/s (array in, complex array out): L = −K(z)·P(z), z = e^{jωT}."""
    F, G, H = plant.F, plant.G, plant.H
    eye = np.eye(F.shape[0])

    def at(omega: np.ndarray) -> np.ndarray:
        omega = np.atleast_1d(np.asarray(omega, dtype=float))
        z = np.exp(1j * omega * plant.period)
        out = np.empty(z.shape, dtype=complex)
        for start in range(0, z.size, 2000):
            zs = z[start:start + 2000]
            lhs = zs[:, None, None] * eye - F
            states = np.linalg.solve(lhs, np.broadcast_to(G, (zs.size, G.size))[..., None])
            sensors = (H @ states)[..., 0]  # (freqs, inputs)
            gains = controller.response(1.0 / zs).T
            out[start:start + 2000] = -np.sum(gains * sensors, axis=1)
        return out

    return at


# ------------------------------------------------------------------ margins


@dataclass(frozen=True)
class Margins:
    """Stability margins of the loop broken at the duty (python-control's conventions).

    gain_margin: 1/|L| at the phase crossover whose |log| is smallest (below 1: the
    loop goes unstable if the gain is lowered that much); phase_margin_deg:
    (arg L mod 360°) − 180° at the gain crossover with the smallest |margin|;
    delay_margin_s: the least added delay that puts a gain crossover onto −1, over all
    crossovers (None when the loop is unstable or never crosses |L| = 1);
    crossover_hz: the gain crossover of phase_margin_deg. ``*_all``: every crossing.
    """

    gain_margin: float | None
    phase_crossover_hz: float | None
    phase_margin_deg: float | None
    crossover_hz: float | None
    delay_margin_s: float | None
    gain_margins_all: tuple[float, ...]
    phase_crossovers_hz: tuple[float, ...]
    phase_margins_all: tuple[float, ...]
    gain_crossovers_hz: tuple[float, ...]

    @property
    def gain_margin_db(self) -> float | None:
        if self.gain_margin is None or not math.isfinite(self.gain_margin):
            return None
        return 20.0 * math.log10(self.gain_margin) if self.gain_margin > 0 else None


GRID_POINTS = 20000


def _roots(f: Callable[[float], float], grid: np.ndarray, values: np.ndarray) -> list[float]:
    out = []
    signs = np.sign(values)
    for i in np.nonzero(signs[:-1] * signs[1:] < 0)[0]:
        out.append(scipy.optimize.brentq(f, grid[i], grid[i + 1], xtol=1e-13, rtol=1e-15,
                                         maxiter=200))
    out += [float(grid[i]) for i in np.nonzero(values == 0)[0]]
    return sorted(out)


def dc_value(loop: Callable, period: float) -> complex | None:
    """L at z = 1 when finite (a pole there shows as |L| growing as ω falls), else None."""
    low, lower = loop(np.array([1e-5 / period, 1e-6 / period]))  # lower: rounding grows
    if abs(lower) > 3.0 * abs(low) or abs(lower.imag) > 1e-3 * abs(lower):
        return None
    return complex(lower.real)


def stability_margins(loop: Callable, period: float, stable: bool) -> Margins:
    """Gain, phase and delay margins of ``loop`` (L(ω), ω rad/s) sampled at ``period`` (s).

    Crossings are bracketed on a log grid from 1e-5/T to the Nyquist frequency π/T
    (excluded, as python-control's discrete-time margins exclude it) and refined by
    Brent's method; a real, negative L at ω = 0 counts as a phase crossover.
    """
    nyquist = math.pi / period
    grid = np.geomspace(1e-5 / period, nyquist * (1 - 1e-9), GRID_POINTS)
    values = loop(grid)

    def gain_minus_one(w: float) -> float:
        return float(abs(loop(np.array([w]))[0]) - 1.0)

    def imaginary(w: float) -> float:
        return float(loop(np.array([w]))[0].imag)

    crossings = _roots(gain_minus_one, grid, np.abs(values) - 1.0)
    phase_w = [w for w in _roots(imaginary, grid, values.imag)
               if loop(np.array([w]))[0].real < 0]
    gms = [1.0 / abs(loop(np.array([w]))[0]) for w in phase_w]
    dc = dc_value(loop, period)
    if dc is not None and dc.real <= 0:
        phase_w.insert(0, 0.0)
        gms.insert(0, 1.0 / abs(dc.real) if dc.real else math.inf)
    crossing_values = loop(np.array(crossings)) if crossings else np.array([])
    pms = [float(np.remainder(np.angle(v, deg=True), 360.0) - 180.0) for v in crossing_values]

    gm = w_gm = None
    finite = [i for i, g in enumerate(gms) if 0 < g < math.inf]
    if finite:
        i = min(finite, key=lambda k: abs(math.log(gms[k])))
        gm, w_gm = gms[i], phase_w[i]
    pm = w_pm = None
    if pms:
        i = min(range(len(pms)), key=lambda k: abs(pms[k]))
        pm, w_pm = pms[i], crossings[i]
    delay = None
    if stable and crossings:
        delay = min(math.radians(p % 360.0) / w for p, w in zip(pms, crossings))
    hz = 1.0 / (2.0 * math.pi)
    return Margins(
        gain_margin=gm, phase_crossover_hz=None if w_gm is None else w_gm * hz,
        phase_margin_deg=pm, crossover_hz=None if w_pm is None else w_pm * hz,
        delay_margin_s=delay, gain_margins_all=tuple(gms),
        phase_crossovers_hz=tuple(w * hz for w in phase_w),
        phase_margins_all=tuple(pms), gain_crossovers_hz=tuple(w * hz for w in crossings))
