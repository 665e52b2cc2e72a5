"""IMU and wheel-encoder models: true kinematics in, noisy quantised readings out.

The runner computes the true angular rate (rad/s) and the true specific force
(m/s², see :func:`specific_force`) at the sensor, both in the sensor frame
(sensor axes = body axes: x forward, y left, z up), and asks :class:`Imu` for
the readings. Each axis of each sensor gets, in this order:

1. **Turn-on bias** ``b0``: drawn once from the seed, normal with standard
   deviation ``bias``; constant for the run.
2. **Bias random walk** (IEEE Std 952 rate random walk, coefficient K =
   ``bias_walk``, units rad/s²/√Hz for the gyro, m/s³/√Hz for the
   accelerometer). The bias follows b(t) = b0 + K·W(t) with W a standard
   Wiener process, so Var[b(t) − b(0)] = K²·t. Sampled at rate f the bias
   changes per sample by a normal of standard deviation K·√(1/f); after n
   samples the change is the sum of n independent normals, one normal of
   standard deviation K·√(n/f). Its Allan deviation is K·√(τ/3).
3. **White noise** (IEEE Std 952 angle / velocity random walk, density N =
   ``noise_density``): one sample at rate f has standard deviation N·√f, so
   the Allan deviation of the samples is N/√τ.
4. **Saturation and quantisation**: the output is a signed two's-complement
   code of ``bits`` bits, LSB = 2·range / 2**bits, rounded to the nearest
   code; codes run from −2**(bits−1) to 2**(bits−1) − 1, so readings saturate
   at −range and at +range − LSB, as a real sensor's output register does.

The sensor samples at ``rate``; the controller sees the latest sample. One
:meth:`Imu.read` call returns one sample and advances the bias walk by the
number of samples elapsed since the previous call. White noise is not
averaged over the skipped samples.

Real parts (optional keys of the ``imu`` section; absent, the readings are
the ideal ones above, bit for bit):

- **Mounting and scale**: the board's axes are the body's turned by
  ``rotation`` (roll, pitch, yaw: R = Rz(yaw)·Ry(pitch)·Rx(roll)); a reading
  is (1 + ``scale_error``)·Rᵀ·v of the true body-axis vector v, before noise.
- **The sensor's own digital low-pass** (``gyro.bandwidth``,
  ``accel.bandwidth``, ``filter_order``): a Butterworth filter designed once
  as ``scipy.signal.butter(order, f_c, fs=rate)`` (sandbox.butterworth: the same
  floats, without importing scipy) and run at the sample
  rate by :meth:`Imu.feed`, which the loop calls at every sample. It filters
  the true (turned, scaled) values; bias, noise and quantisation come after,
  since a sensor's noise density is that of its output.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from .butterworth import LowPass

Vector3 = tuple[float, float, float]

# Random numbers are drawn a block of rows at a time, one row per read; blocks start small
# so a short-lived IMU is cheap to make, and grow to _BLOCK_ROWS.
_FIRST_BLOCK_ROWS = 16
_BLOCK_ROWS = 1024
# Columns of one pre-drawn row: gyro walk steps 0-2, gyro white noise 3-5,
# accelerometer walk steps 6-8, accelerometer white noise 9-11.
_COLUMNS = 12


@dataclass(frozen=True)
class AxisNoise:
    """One sensor's noise figures, SI units, the same on each of its three axes.

    ``density``: white-noise density N (unit/√Hz); ``bias_std``: standard
    deviation of the turn-on bias (unit); ``bias_walk``: rate random walk
    coefficient K (unit/s/√Hz); ``range``: full scale (±unit); ``bits``:
    output word length. The unit is rad/s for a gyro, m/s² for an accelerometer.
    """

    density: float
    bias_std: float
    bias_walk: float
    range: float
    bits: int

    def __post_init__(self) -> None:
        for name in ("density", "bias_std", "bias_walk"):
            value = getattr(self, name)
            if not (math.isfinite(value) and value >= 0):
                raise ValueError(f"{name} must be a finite number >= 0, got {value!r}")
        if not (math.isfinite(self.range) and self.range > 0):
            raise ValueError(f"range must be a finite number > 0, got {self.range!r}")
        if not (isinstance(self.bits, int) and 2 <= self.bits <= 64):
            raise ValueError(f"bits must be an integer from 2 to 64, got {self.bits!r}")

    @classmethod
    def from_section(cls, section: Any) -> AxisNoise:
        """From a robot file's ``imu.gyro`` or ``imu.accel`` section (SI values)."""
        return cls(
            density=float(section.noise_density),
            bias_std=float(section.bias),
            bias_walk=float(section.bias_walk),
            range=float(section.range),
            bits=int(section.bits),
        )

    @property
    def lsb(self) -> float:
        """Size of one output code (unit): 2·range / 2**bits."""
        return 2.0 * self.range / 2.0**self.bits

    def white_std(self, rate: float) -> float:
        """Standard deviation of the white noise on one sample at ``rate`` Hz: N·√f."""
        return self.density * math.sqrt(rate)

    def walk_std(self, rate: float) -> float:
        """Standard deviation of the bias change over one sample at ``rate`` Hz: K·√(1/f)."""
        return self.bias_walk * math.sqrt(1.0 / rate)


@dataclass(frozen=True)
class _OutputWord:
    """Saturation limits and code size of one sensor's output word (unit)."""

    low: float  # -range
    high: float  # +range - LSB
    lsb: float

    @classmethod
    def of(cls, noise: AxisNoise) -> _OutputWord:
        half_codes = 2 ** (noise.bits - 1)
        return cls(-half_codes * noise.lsb, (half_codes - 1) * noise.lsb, noise.lsb)


def mount_rotation(roll: float, pitch: float, yaw: float) -> np.ndarray:
    """The board's axes in body coordinates (3×3, columns), R = Rz(yaw)·Ry(pitch)·Rx(roll);
    angles in rad. A body-axis vector v reads Rᵀ·v in the board's axes."""
    cr, sr = math.cos(roll), math.sin(roll)
    cp, sp = math.cos(pitch), math.sin(pitch)
    cy, sy = math.cos(yaw), math.sin(yaw)
    rx = np.array([[1.0, 0.0, 0.0], [0.0, cr, -sr], [0.0, sr, cr]])
    ry = np.array([[cp, 0.0, sp], [0.0, 1.0, 0.0], [-sp, 0.0, cp]])
    rz = np.array([[cy, -sy, 0.0], [sy, cy, 0.0], [0.0, 0.0, 1.0]])
    return rz @ ry @ rx


def _times(m: tuple[float, ...], v: Vector3) -> Vector3:
    """The row-major 3x3 matrix ``m`` times the vector ``v``."""
    x, y, z = float(v[0]), float(v[1]), float(v[2])
    return (m[0] * x + m[1] * y + m[2] * z, m[3] * x + m[4] * y + m[5] * z,
            m[6] * x + m[7] * y + m[8] * z)


class Imu:
    """A 3-axis gyro and 3-axis accelerometer sampled at one rate, from one seed.

    ``imu_spec`` is a robot description's ``imu`` section (``rate``, ``gyro``,
    ``accel``; SI). The same seed gives the same readings for the same inputs.

    Random numbers come a block of reads at a time. For each read of a block
    the bias walk's running sum and the white noise are added up ahead, in
    numpy, assuming the number of samples between reads stays what it was
    (``_block_scale`` is its square root); a read that differs, and a bias
    fault, go into ``_correction``. So a read is a few additions and the
    rounding to the output code.
    """

    def __init__(self, imu_spec: Any, seed: int):
        rate = float(imu_spec.rate)
        if not (math.isfinite(rate) and rate > 0):
            raise ValueError(f"imu rate must be > 0 Hz, got {rate!r}")
        self.rate = rate
        self.gyro_noise = AxisNoise.from_section(imu_spec.gyro)
        self.accel_noise = AxisNoise.from_section(imu_spec.accel)
        self.accel_dropout = False
        self._gyro_word = _OutputWord.of(self.gyro_noise)
        self._accel_word = _OutputWord.of(self.accel_noise)
        self._rng = np.random.default_rng(seed)
        # The turn-on bias comes first from the generator, so it depends on the seed only.
        turn_on = self._rng.standard_normal(6)
        # bias (gyro x, y, z, accel x, y, z) at the start of the present block
        self._block_base = np.concatenate([turn_on[:3] * self.gyro_noise.bias_std,
                                           turn_on[3:] * self.accel_noise.bias_std])
        self._scale = np.repeat(
            [
                self.gyro_noise.walk_std(rate),
                self.gyro_noise.white_std(rate),
                self.accel_noise.walk_std(rate),
                self.accel_noise.white_std(rate),
            ],
            3,
        )
        self._walk = np.zeros((0, 6))  # this block's walk steps, one sample each
        self._walk_sum = np.zeros((0, 6))  # their running sum, times _block_scale
        self._offsets: list[list[float]] = []  # base + walk sum + white noise, per read
        self._next_row = 0
        self._block_rows = _FIRST_BLOCK_ROWS
        self._block_scale = 1.0
        self._usual_scale = 1.0
        self._correction = [0.0] * 6
        self._corrected = False
        self._last: tuple[Vector3, Vector3] | None = None
        self._real_parts(imu_spec, rate)

    def _real_parts(self, imu_spec: Any, rate: float) -> None:
        """Mounting, scale errors and the sensor's own filters (all absent: none of them)."""
        gyro, accel = imu_spec.gyro, imu_spec.accel
        rotation = tuple(float(v) for v in getattr(imu_spec, "rotation", (0.0, 0.0, 0.0)))
        scales = (1.0 + float(getattr(gyro, "scale_error", 0.0)),
                  1.0 + float(getattr(accel, "scale_error", 0.0)))
        self._turn: tuple[tuple[float, ...], tuple[float, ...]] | None = None
        if any(rotation) or scales != (1.0, 1.0):
            to_board = mount_rotation(*rotation).T
            # row-major floats: a 3x3 product in plain Python is a fifth of numpy's cost
            # at one sample a physics step (measured: 26 -> 5 us a call)
            self._turn = (tuple(float(v) for v in (scales[0] * to_board).ravel()),
                          tuple(float(v) for v in (scales[1] * to_board).ravel()))
        order = int(getattr(imu_spec, "filter_order", 2))
        self._filters = tuple(
            None if getattr(section, "bandwidth", None) is None
            else LowPass(order, float(section.bandwidth), rate)
            for section in (gyro, accel))
        self.filtering = any(f is not None for f in self._filters)
        self._fed: tuple[Vector3, Vector3] | None = None
        self._fresh = False  # fed since the last read
        # set by a loop that feeds every sample and passes read() the fed values of the
        # sample it reads (with sensor latency not always the last one fed)
        self.fed_by_loop = False

    def _turned(self, true_rate: Vector3, true_force: Vector3) -> tuple[Vector3, Vector3]:
        """The true vectors in the board's axes, scale errors applied."""
        if self._turn is None:
            return true_rate, true_force
        return _times(self._turn[0], true_rate), _times(self._turn[1], true_force)

    def feed(self, true_rate: Vector3, true_force: Vector3) -> tuple[Vector3, Vector3]:
        """One sensor sample of the true rate (rad/s) and specific force (m/s²), body axes,
        into the sensor's own filters; call at every sample when ``filtering``. Returns the
        filtered values (board axes, before bias, noise and quantisation), which the next
        :meth:`read` reports."""
        rate, force = self._turned(true_rate, true_force)
        gyro_filter, accel_filter = self._filters
        if gyro_filter is not None:
            rate = gyro_filter(rate)
        if accel_filter is not None:
            force = accel_filter(force)
        self._fed = (rate, force)
        self._fresh = True
        return self._fed

    def _bias(self) -> list[float]:
        """The present bias of the six axes (gyro rad/s, then accel m/s²)."""
        bias = self._block_base.copy()
        if self._next_row:
            bias += self._walk_sum[self._next_row - 1]
        return [float(b + c) for b, c in zip(bias, self._correction)]

    @property
    def gyro_bias(self) -> Vector3:
        """The gyro's current bias (rad/s, sensor axes)."""
        bias = self._bias()
        return (bias[0], bias[1], bias[2])

    @property
    def accel_bias(self) -> Vector3:
        """The accelerometer's current bias (m/s², sensor axes)."""
        bias = self._bias()
        return (bias[3], bias[4], bias[5])

    def add_gyro_bias(self, step: Vector3) -> None:
        """Sensor fault: add ``step`` (rad/s, sensor axes) to the gyro bias from now on."""
        for axis in range(3):
            self._correction[axis] += float(step[axis])
        self._corrected = True

    def read(
        self,
        true_rate: Vector3,
        true_specific_force: Vector3,
        samples_elapsed: int = 1,
    ) -> tuple[Vector3, Vector3]:
        """The latest sample: ``(gyro rad/s, accel m/s²)``, each three floats, sensor axes.

        ``samples_elapsed`` is how many sensor samples were taken since the
        previous call; the bias walk advances by that many samples. With 0 no
        new sample exists and the previous reading is returned again.

        With a filter (``filtering``) the values reported are those of the last
        :meth:`feed` (feed the samples in time order, up to the one read). If
        nothing was fed since the previous read, the arguments are fed
        ``samples_elapsed`` times (at least once): the truth held over the
        samples, for loops that do not feed every sample. With a mounting
        rotation or scale error the values are turned and scaled first.
        """
        if samples_elapsed == 1:
            walk_scale = 1.0
        elif samples_elapsed > 1:
            walk_scale = math.sqrt(samples_elapsed)
        elif samples_elapsed == 0 and self._last is not None:
            return self._last
        elif samples_elapsed == 0:
            walk_scale = 0.0  # first call: the sensor's first sample, no walk yet
        else:
            raise ValueError(f"samples_elapsed must be >= 0, got {samples_elapsed!r}")
        if samples_elapsed:
            self._usual_scale = walk_scale
        if self.filtering and self.fed_by_loop:
            pass  # the loop passes the values feed() returned for the sample it reads
        elif self.filtering:
            if not self._fresh:  # a loop that does not feed: hold this truth over the samples
                for _ in range(max(samples_elapsed, 1)):
                    self.feed(true_rate, true_specific_force)
            self._fresh = False
            true_rate, true_specific_force = self._fed
        elif self._turn is not None:
            true_rate, true_specific_force = self._turned(true_rate, true_specific_force)

        k = self._next_row
        if k >= len(self._offsets):
            self._draw_block()
            k = 0
        self._next_row = k + 1
        row = self._offsets[k]
        if walk_scale != self._block_scale:  # not the elapsed count the block assumed
            extra = (walk_scale - self._block_scale) * self._walk[k]
            self._correction = [c + float(e) for c, e in zip(self._correction, extra)]
            self._corrected = True
        if self._corrected:
            row = [r + c for r, c in zip(row, self._correction)]

        # saturate, then round to the nearest code (NaN fails in math.floor)
        word = self._gyro_word
        low, high, lsb = word.low, word.high, word.lsb
        try:
            x = true_rate[0] + row[0]
            y = true_rate[1] + row[1]
            z = true_rate[2] + row[2]
            gyro = (
                math.floor((low if x < low else high if x > high else x) / lsb + 0.5) * lsb,
                math.floor((low if y < low else high if y > high else y) / lsb + 0.5) * lsb,
                math.floor((low if z < low else high if z > high else z) / lsb + 0.5) * lsb,
            )
            if self.accel_dropout:
                accel = (0.0, 0.0, 0.0)
            else:
                word = self._accel_word
                low, high, lsb = word.low, word.high, word.lsb
                x = true_specific_force[0] + row[3]
                y = true_specific_force[1] + row[4]
                z = true_specific_force[2] + row[5]
                accel = (
                    math.floor((low if x < low else high if x > high else x) / lsb + 0.5) * lsb,
                    math.floor((low if y < low else high if y > high else y) / lsb + 0.5) * lsb,
                    math.floor((low if z < low else high if z > high else z) / lsb + 0.5) * lsb,
                )
        except ValueError:  # math.floor of NaN
            raise ValueError(
                f"IMU input is not a number: rate {tuple(true_rate)}, "
                f"specific force {tuple(true_specific_force)}"
            ) from None
        self._last = (gyro, accel)
        return self._last

    def _draw_block(self) -> None:
        """Draw the next block's numbers; fold the last block's walk and corrections in."""
        self._block_base = np.asarray(self._bias())
        self._correction = [0.0] * 6
        self._corrected = False
        self._block_scale = self._usual_scale
        # columns: gyro walk 0-2, gyro white 3-5, accel walk 6-8, accel white 9-11
        block = self._rng.standard_normal((self._block_rows, _COLUMNS)) * self._scale
        self._walk = block[:, [0, 1, 2, 6, 7, 8]]
        white = block[:, [3, 4, 5, 9, 10, 11]]
        self._walk_sum = np.cumsum(self._walk * self._block_scale, axis=0)
        self._offsets = (self._block_base + self._walk_sum + white).tolist()
        self._next_row = 0
        self._block_rows = min(2 * self._block_rows, _BLOCK_ROWS)


class Encoders:
    """Quadrature encoders on the two motor shafts, counting the wheels' turn relative to the body.

    ``counts_per_rev`` counts per motor-shaft turn; the wheel turns once per
    ``gear_ratio`` motor turns. With ``shaft="wheel"`` the encoders sit on the gearbox
    output: ``counts_per_rev`` per wheel turn, whatever the gear ratio. ``gear_ratio_right``
    is the right motor's, when it differs.
    """

    def __init__(self, counts_per_rev: int, gear_ratio: float, *, shaft: str = "motor",
                 gear_ratio_right: float | None = None):
        if not (isinstance(counts_per_rev, (int, np.integer)) and counts_per_rev >= 1):
            raise ValueError(f"counts_per_rev must be an integer >= 1, got {counts_per_rev!r}")
        if not (math.isfinite(gear_ratio) and gear_ratio > 0):
            raise ValueError(f"gear_ratio must be > 0, got {gear_ratio!r}")
        if shaft not in ("motor", "wheel"):
            raise ValueError(f"shaft must be 'motor' or 'wheel', got {shaft!r}")
        right = gear_ratio if gear_ratio_right is None else gear_ratio_right
        if not (math.isfinite(right) and right > 0):
            raise ValueError(f"gear_ratio_right must be > 0, got {gear_ratio_right!r}")
        self.counts_per_rev = int(counts_per_rev)
        self.gear_ratio = float(gear_ratio)
        self.shaft = shaft
        ratios = {"left": self.gear_ratio, "right": float(right)}
        if shaft == "wheel":
            ratios = {"left": 1.0, "right": 1.0}
        self._side_counts_per_radian = {
            side: self.counts_per_rev * ratio / (2.0 * math.pi) for side, ratio in ratios.items()}
        self._counts_per_radian = self._side_counts_per_radian["left"]
        self._lost = {"left": 0, "right": 0}  # counts the encoder failed to register
        self._raw = {"left": 0, "right": 0}
        self._direction = {"left": 1, "right": 1}  # sign of the last change; forward at first

    @classmethod
    def from_spec(cls, spec: Any) -> Encoders:
        """The encoders of a validated RobotSpec: its ``encoders`` section and each side's
        gear ratio."""
        section = spec.encoders
        return cls(section.counts_per_rev, spec.motor_side("left").gear_ratio,
                   shaft=getattr(section, "shaft", "motor"),
                   gear_ratio_right=spec.motor_side("right").gear_ratio)

    @property
    def counts_per_wheel_rev(self) -> float:
        """Counts of one wheel turn relative to the body (the left wheel's)."""
        return self._counts_per_radian * 2.0 * math.pi

    def ticks(self, angle_left: float, angle_right: float) -> tuple[int, int]:
        """Counts for the wheels' angles relative to the body (rad, + forward).

        floor(angle / 2π · counts_per_rev · gear_ratio), less any missed counts.
        """
        return self._count("left", angle_left), self._count("right", angle_right)

    def miss(self, side: str, counts: int) -> None:
        """Sensor fault: the ``side`` ('left'/'right') encoder fails to register ``counts``.

        The lost counts fall in the direction the wheel last turned (forward if
        it has not turned yet), so the reading lags the true count by them from now on.
        """
        if side not in self._lost:
            raise ValueError(f"side must be 'left' or 'right', got {side!r}")
        if not (isinstance(counts, (int, np.integer)) and counts >= 0):
            raise ValueError(f"counts must be an integer >= 0, got {counts!r}")
        self._lost[side] += self._direction[side] * int(counts)

    def _count(self, side: str, angle: float) -> int:
        try:
            raw = math.floor(angle * self._side_counts_per_radian[side])
        except (ValueError, OverflowError):
            raise ValueError(f"{side} wheel angle is not a finite number: {angle!r}") from None
        change = raw - self._raw[side]
        if change:
            self._direction[side] = 1 if change > 0 else -1
            self._raw[side] = raw
        return raw - self._lost[side]


def specific_force(
    accel_world: np.ndarray, gravity_world: np.ndarray, world_to_sensor: np.ndarray
) -> np.ndarray:
    """Specific force in the sensor frame (m/s²): f = Rᵀ (a − g).

    ``accel_world``: the mount point's acceleration, world axes (m/s²).
    ``gravity_world``: gravity, world axes, e.g. (0, 0, −9.80665).
    ``world_to_sensor``: the 3×3 rotation R of the sensor's pose in the world:
    its columns are the sensor axes in world coordinates (it maps sensor
    coordinates to world ones, as pybullet's getMatrixFromQuaternion of the
    body orientation does); Rᵀ takes world vectors into sensor axes.
    """
    rotation = np.asarray(world_to_sensor, dtype=float).reshape(3, 3)
    difference = np.asarray(accel_world, dtype=float) - np.asarray(gravity_world, dtype=float)
    return rotation.T @ difference


def tilt_from_accel(accel: Vector3 | np.ndarray) -> float:
    """Pitch (rad, + top forward) from a specific-force reading at rest: atan2(−a_x, a_z)."""
    return math.atan2(-float(accel[0]), float(accel[2]))
