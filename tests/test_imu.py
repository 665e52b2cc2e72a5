"""IMU and encoder models: noise statistics, digitising, frames, determinism, faults."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats

from sandbox import robot
from sandbox.allan import allan_deviation, allan_deviation_from_phase
from sandbox.imu import (
    AxisNoise,
    Encoders,
    Imu,
    specific_force,
    tilt_from_accel,
)
from sandbox.units import STANDARD_GRAVITY

GRAVITY_WORLD = np.array([0.0, 0.0, -STANDARD_GRAVITY])
AT_REST_UPRIGHT = (0.0, 0.0, STANDARD_GRAVITY)
STILL = (0.0, 0.0, 0.0)

# NBS Monograph 140 / NIST SP 1065 (Riley 2008) reference data set, fractional frequency, tau0 = 1 s
NIST_DATA = [892, 809, 823, 798, 671, 644, 883, 903, 677]


def pitch_rotation(pitch: float) -> np.ndarray:
    """Sensor-to-world rotation for a body pitched by ``pitch`` about +y (top forward)."""
    c, s = math.cos(pitch), math.sin(pitch)
    return np.array([[c, 0.0, s], [0.0, 1.0, 0.0], [-s, 0.0, c]])


def imu_spec(
    rate: float = 1000.0,
    gyro_density: float = 0.0,
    gyro_bias: float = 0.0,
    gyro_walk: float = 0.0,
    gyro_range: float = 1000.0,
    gyro_bits: int = 32,
    accel_density: float = 0.0,
    accel_bias: float = 0.0,
    accel_walk: float = 0.0,
    accel_range: float = 1000.0,
    accel_bits: int = 32,
) -> robot.Imu:
    """A robot-file ``imu`` section; defaults: no noise, wide range, fine resolution."""
    return robot.Imu(
        rate=rate,
        gyro=robot.Gyro(
            range=gyro_range, noise_density=gyro_density, bias=gyro_bias,
            bias_walk=gyro_walk, bits=gyro_bits,
        ),
        accel=robot.Accel(
            range=accel_range, noise_density=accel_density, bias=accel_bias,
            bias_walk=accel_walk, bits=accel_bits,
        ),
    )


# ----------------------------------------------------------------- Allan deviation


def test_allan_nist_reference_non_overlapping():
    """NIST SP 1065 / NBS Monograph 140 [published]: ADEV(1) = 91.22945, ADEV(2) = 115.8082.

    Fractional-frequency data with tau0 = 1 s are rate samples at 1 Hz; relative 1e-6.
    """
    adev = allan_deviation(np.array(NIST_DATA, float), 1.0, [1.0, 2.0], overlapping=False)
    assert adev[0] == pytest.approx(91.22945, rel=1e-6), "ADEV(tau=1) of the NIST data set"
    assert adev[1] == pytest.approx(115.8082, rel=1e-6), "ADEV(tau=2) of the NIST data set"


def test_allan_nist_reference_overlapping():
    """NIST SP 1065 [published]: overlapping ADEV(2) = 85.95287 (relative 1e-6).

    The phase entry point on x_k = sum of the first k frequency values gives the same figure.
    """
    oadev = allan_deviation(np.array(NIST_DATA, float), 1.0, [2.0])
    assert oadev[0] == pytest.approx(85.95287, rel=1e-6), "OADEV(tau=2) of the NIST data set"
    phase = np.concatenate(([0.0], np.cumsum(NIST_DATA)))
    from_phase = allan_deviation_from_phase(phase, 1.0, [1.0, 2.0])
    assert from_phase[1] == pytest.approx(85.95287, rel=1e-6), "OADEV(tau=2) from phase data"
    # At m = 1 overlapping and non-overlapping estimators are the same sum.
    assert from_phase[0] == pytest.approx(91.22945, rel=1e-6), "OADEV(tau=1) from phase data"


def test_allan_rejects_tau_outside_record():
    """A tau below one sample period or above half the record has no Allan estimate."""
    with pytest.raises(ValueError, match="tau"):
        allan_deviation(np.array(NIST_DATA, float), 1.0, [5.0])
    with pytest.raises(ValueError, match="tau"):
        allan_deviation(np.array(NIST_DATA, float), 1.0, [0.2])


def _white_noise_run(seconds: float, rate: float, density: float) -> tuple[np.ndarray, np.ndarray]:
    """Gyro x and accelerometer z readings of a still, upright IMU with only white noise."""
    imu = Imu(imu_spec(rate=rate, gyro_density=density, accel_density=density), seed=7)
    count = int(seconds * rate)
    gyro_x = np.empty(count)
    accel_z = np.empty(count)
    for k in range(count):
        gyro, accel = imu.read(STILL, AT_REST_UPRIGHT)
        gyro_x[k] = gyro[0]
        accel_z[k] = accel[2]
    return gyro_x, accel_z


def test_white_noise_allan_deviation_is_density_over_root_tau():
    """IEEE Std 952 angle random walk [published; SOURCES.md §4]: ADEV(tau) = N / sqrt(tau).

    Ten minutes at 100 Hz; tau = 0.1..1 s within 10 %. The estimator's relative
    standard error at tau = 1 s is about 1/sqrt(2 * 3 * 60000 / 200) = 2.4 % [derived],
    so 10 % is about four standard errors. Also checks the per-sample std N*sqrt(f).
    """
    density, rate = 1e-3, 100.0
    gyro_x, accel_z = _white_noise_run(600.0, rate, density)
    taus = np.array([0.1, 0.2, 0.5, 1.0])
    expected = density / np.sqrt(taus)
    for name, samples in (("gyro x", gyro_x), ("accel z", accel_z)):
        adev = allan_deviation(samples, rate, taus)
        np.testing.assert_allclose(
            adev, expected, rtol=0.10, err_msg=f"{name} Allan deviation vs N/sqrt(tau)"
        )
        slope = np.polyfit(np.log(taus), np.log(adev), 1)[0]
        assert slope == pytest.approx(-0.5, abs=0.06), f"{name} Allan slope (log-log)"
        assert np.std(samples) == pytest.approx(density * math.sqrt(rate), rel=0.02), (
            f"{name} per-sample standard deviation vs N*sqrt(f)"
        )


@pytest.mark.slow
def test_white_noise_allan_one_hour():
    """SOURCES.md §4 [published: IEEE Std 952]: one hour at 100 Hz, OADEV(1 s) / N within 3 %."""
    density, rate = 2e-3, 100.0
    gyro_x, _ = _white_noise_run(3600.0, rate, density)
    adev = allan_deviation(gyro_x, rate, [1.0])[0]
    assert adev / density == pytest.approx(1.0, rel=0.03), "OADEV(1 s) / N over one hour"


@pytest.mark.slow
def test_bias_walk_allan_deviation_is_k_root_tau_over_three():
    """IEEE Std 952 rate random walk [published; SOURCES.md §4]: ADEV(tau) = K sqrt(tau / 3).

    One hour of readings taken every 10th sample of a 1 kHz IMU (white noise off),
    tau = 1..10 s within 15 % (about 4 standard errors at 10 s [derived]).
    """
    walk, rate, every = 1e-4, 1000.0, 10
    imu = Imu(imu_spec(rate=rate, gyro_walk=walk), seed=11)
    count = 3600 * int(rate) // every
    gyro_y = np.empty(count)
    for k in range(count):
        gyro_y[k] = imu.read(STILL, AT_REST_UPRIGHT, samples_elapsed=every)[0][1]
    taus = np.array([1.0, 3.0, 10.0])
    adev = allan_deviation(gyro_y, rate / every, taus)
    np.testing.assert_allclose(
        adev, walk * np.sqrt(taus / 3.0), rtol=0.15, err_msg="Allan deviation of the bias walk"
    )


# ----------------------------------------------------------------- frames and tilt


def test_specific_force_static_tilt():
    """SOURCES.md §4 [derived]: at 10 deg pitch, at rest, f_x = -1.702907, f_z = 9.657665 m/s².

    f = R^T (a - g) with g = 9.80665 m/s² (standard gravity, exact by definition).
    """
    force = specific_force(np.zeros(3), GRAVITY_WORLD, pitch_rotation(math.radians(10.0)))
    np.testing.assert_allclose(
        force, [-1.702907, 0.0, 9.657665], atol=1e-6, err_msg="specific force at 10 deg (m/s²)"
    )
    assert math.degrees(tilt_from_accel(force)) == pytest.approx(10.0, abs=1e-9), "tilt (deg)"


def test_specific_force_upright_and_free_fall():
    """Accelerometer principle [published: any inertial navigation text, e.g. Titterton &
    Weston, Strapdown Inertial Navigation Technology — chapter from memory]: at rest upright
    it reads +g up; in free fall (a = g) it reads zero; a forward acceleration reads forward.
    """
    upright = np.eye(3)
    at_rest = specific_force(np.zeros(3), GRAVITY_WORLD, upright)
    np.testing.assert_allclose(at_rest, AT_REST_UPRIGHT, atol=1e-12, err_msg="at rest (m/s²)")
    falling = specific_force(GRAVITY_WORLD, GRAVITY_WORLD, pitch_rotation(0.7))
    np.testing.assert_allclose(falling, np.zeros(3), atol=1e-12, err_msg="free fall (m/s²)")
    speeding_up = specific_force(np.array([2.0, 0.0, 0.0]), GRAVITY_WORLD, upright)
    np.testing.assert_allclose(
        speeding_up, [2.0, 0.0, STANDARD_GRAVITY], atol=1e-12, err_msg="forward acceleration"
    )


def test_imu_tilt_reading_within_one_code():
    """A noise-free accelerometer at 10 deg reports the specific force to within half an LSB
    (round to nearest [common practice]); the tilt from it is 10 deg to within 0.01 deg."""
    spec = imu_spec(accel_range=2 * STANDARD_GRAVITY, accel_bits=16)
    imu = Imu(spec, seed=0)
    force = tuple(specific_force(np.zeros(3), GRAVITY_WORLD, pitch_rotation(math.radians(10.0))))
    _, accel = imu.read(STILL, force)
    lsb = 4 * STANDARD_GRAVITY / 2**16
    np.testing.assert_allclose(accel, force, atol=lsb / 2 + 1e-12, err_msg="accel (m/s²)")
    assert math.degrees(tilt_from_accel(accel)) == pytest.approx(10.0, abs=0.01), "tilt (deg)"


# ----------------------------------------------------------------- digitising


def test_saturation_and_quantisation():
    """Two's-complement output word [common practice, sensor datasheets]: LSB = 2 range / 2^bits,
    round to nearest, codes -2^(bits-1)..2^(bits-1)-1, so the output saturates at -range and
    +range - LSB. range 1, 8 bits: LSB = 1/128; 0.3 -> code 38 -> 0.296875 [derived]."""
    imu = Imu(imu_spec(gyro_range=1.0, gyro_bits=8, accel_range=8.0, accel_bits=4), seed=0)
    gyro, accel = imu.read((0.3, 5.0, -5.0), (0.74, 100.0, -1e9))
    assert gyro == (0.296875, 1.0 - 1 / 128, -1.0), "gyro codes (rad/s)"
    # accel LSB = 16 / 16 = 1 m/s²: 0.74 rounds to 1; saturates at 7 and -8.
    assert accel == (1.0, 7.0, -8.0), "accel codes (m/s²)"
    assert all(isinstance(v, float) for v in gyro + accel), "readings are plain floats"


def test_quantisation_error_bounded_by_half_lsb():
    """Rounding to nearest [common practice]: |reading - input| <= LSB / 2 inside the range."""
    imu = Imu(imu_spec(gyro_range=4.0, gyro_bits=12), seed=0)
    lsb = 8.0 / 2**12
    for value in np.linspace(-3.9, 3.9, 997):
        gyro, _ = imu.read((value, -value, 0.5 * value), STILL)
        error = np.abs(np.array(gyro) - [value, -value, 0.5 * value])
        assert error.max() <= lsb / 2 + 1e-12, f"quantisation error at {value} rad/s"
        assert all(abs(g / lsb - round(g / lsb)) < 1e-9 for g in gyro), "reading on a code"


def test_axis_noise_from_robot_defaults():
    """The robot file's default gyro (16 bits, 250 deg/s) has LSB = 500 deg/s / 65536 [derived]."""
    gyro = AxisNoise.from_section(robot.Gyro())
    assert gyro.lsb == pytest.approx(math.radians(500.0) / 65536, rel=1e-12), "gyro LSB (rad/s)"
    assert gyro.white_std(1000.0) == pytest.approx(math.radians(0.005) * math.sqrt(1000.0)), (
        "white-noise std per sample, N sqrt(f) (rad/s)"
    )
    with pytest.raises(ValueError, match="range"):
        AxisNoise(density=0.0, bias_std=0.0, bias_walk=0.0, range=0.0, bits=16)
    with pytest.raises(ValueError, match="density"):
        AxisNoise(density=-1.0, bias_std=0.0, bias_walk=0.0, range=1.0, bits=16)


# ----------------------------------------------------------------- randomness


def _readings(imu: Imu, count: int) -> list:
    return [imu.read((0.1, -0.2, 0.3), AT_REST_UPRIGHT, 1 + k % 3) for k in range(count)]


def test_same_seed_same_readings_different_seed_different():
    """Determinism contract (DESIGN.md): same seed -> identical readings, across pre-drawn
    blocks (3000 calls > 1024 rows) and whatever other IMUs do in between."""
    spec = robot.Imu(gyro=robot.Gyro(bias_walk=1e-3), accel=robot.Accel(bias_walk=1e-3))
    first = _readings(Imu(spec, seed=42), 3000)
    again = Imu(spec, seed=42)
    other = Imu(spec, seed=43)
    interleaved, others = [], []
    for k in range(3000):
        interleaved.append(again.read((0.1, -0.2, 0.3), AT_REST_UPRIGHT, 1 + k % 3))
        others.append(other.read((0.1, -0.2, 0.3), AT_REST_UPRIGHT, 1 + k % 3))
    assert interleaved == first, "same seed gave different readings"
    differing = sum(a != b for a, b in zip(first, others, strict=True))
    assert differing == 3000, "different seeds gave some identical readings"


def test_turn_on_bias_std_matches_spec():
    """Turn-on bias std = ``bias`` (DESIGN.md). Over 2000 seeds x 3 axes the sample std has a
    relative standard error 1/sqrt(2 n) = 0.9 % [textbook statistics]; tolerance 5 %. The mean
    is within 4 standard errors (bias / sqrt(n)) of zero."""
    gyro_bias, accel_bias = 0.01, 0.05
    spec = imu_spec(gyro_bias=gyro_bias, accel_bias=accel_bias)
    imus = [Imu(spec, seed=seed) for seed in range(2000)]
    gyro = np.array([imu.gyro_bias for imu in imus]).ravel()
    accel = np.array([imu.accel_bias for imu in imus]).ravel()
    for name, draws, std in (("gyro", gyro, gyro_bias), ("accel", accel, accel_bias)):
        assert np.std(draws, ddof=1) == pytest.approx(std, rel=0.05), f"{name} turn-on bias std"
        assert abs(np.mean(draws)) < 4 * std / math.sqrt(draws.size), f"{name} bias mean"


def test_turn_on_bias_constant_without_walk():
    """With no rate random walk the bias stays at its turn-on value and the still sensor's
    readings average to it (mean of 5000 samples within 5 standard errors N sqrt(f) / sqrt(n))."""
    imu = Imu(imu_spec(gyro_density=1e-3, gyro_bias=0.02), seed=3)
    turn_on = imu.gyro_bias
    gyro = np.array([imu.read(STILL, AT_REST_UPRIGHT)[0] for _ in range(5000)])
    assert imu.gyro_bias == turn_on, "bias moved without a walk"
    error = 1e-3 * math.sqrt(1000.0) / math.sqrt(5000)
    np.testing.assert_allclose(gyro.mean(axis=0), turn_on, atol=5 * error, err_msg="mean reading")


def _walk_after(samples_per_call: int, calls: int, seeds: range, checkpoints=()) -> dict:
    """Gyro bias (all axes) after each checkpoint count of calls, over many seeds."""
    spec = imu_spec(rate=1000.0, gyro_walk=2e-3, accel_walk=2e-3)
    found: dict[int, list] = {c: [] for c in (*checkpoints, calls)}
    for seed in seeds:
        imu = Imu(spec, seed=seed)
        for call in range(1, calls + 1):
            imu.read(STILL, AT_REST_UPRIGHT, samples_per_call)
            if call in found:
                found[call].extend(imu.gyro_bias + imu.accel_bias)
    return {c: np.array(v) for c, v in found.items()}


def test_bias_walk_variance_grows_linearly():
    """Rate random walk (IEEE Std 952 [published]): after n samples at rate f the bias has
    variance n K² / f. 800 seeds x 6 axes: the sample variance has relative standard error
    sqrt(2 / 4800) = 2 % [textbook statistics]; tolerance 10 %."""
    walk, rate = 2e-3, 1000.0
    variances = _walk_after(1, 40, range(800), checkpoints=(10, 20))
    for samples, values in variances.items():
        expected = samples * walk**2 / rate
        assert np.var(values) == pytest.approx(expected, rel=0.10), (
            f"bias walk variance after {samples} samples"
        )


def test_samples_elapsed_matches_single_calls_in_distribution():
    """A read with samples_elapsed = n advances the walk like n single reads: the sum of n
    independent normals is one normal of sqrt(n) times the std [textbook statistics]. Both
    variances within 10 % of n K² / f, and a two-sample Kolmogorov-Smirnov test (scipy)
    does not tell them apart (p > 0.001)."""
    walk, rate, n = 2e-3, 1000.0, 40
    one_jump = _walk_after(n, 1, range(10_000, 10_800))[1]
    many_steps = _walk_after(1, n, range(800))[n]
    expected = n * walk**2 / rate
    assert np.var(one_jump) == pytest.approx(expected, rel=0.10), "variance after one jump of n"
    assert np.var(many_steps) == pytest.approx(expected, rel=0.10), "variance after n steps"
    assert stats.ks_2samp(one_jump, many_steps).pvalue > 1e-3, "jump vs steps distribution"


def test_zero_samples_elapsed_repeats_last_reading():
    """No new sample since the last read: the sensor's output register still holds the last one."""
    imu = Imu(robot.Imu(), seed=5)
    first = imu.read((0.1, 0.0, 0.0), AT_REST_UPRIGHT)
    assert imu.read((9.0, 9.0, 9.0), STILL, samples_elapsed=0) == first, "held reading"
    with pytest.raises(ValueError, match="samples_elapsed"):
        imu.read(STILL, AT_REST_UPRIGHT, samples_elapsed=-1)


def test_not_a_number_input_is_an_error():
    """A NaN from a diverged simulation is reported, not turned into a reading."""
    imu = Imu(robot.Imu(), seed=5)
    with pytest.raises(ValueError, match="not a number"):
        imu.read((math.nan, 0.0, 0.0), AT_REST_UPRIGHT)


# ----------------------------------------------------------------- sensor faults


def test_gyro_bias_step():
    """A bias-step fault adds to the bias and shows in the reading (noise-free, within one LSB)."""
    imu = Imu(imu_spec(gyro_range=10.0, gyro_bits=20), seed=0)
    before, _ = imu.read((0.2, 0.0, 0.0), AT_REST_UPRIGHT)
    imu.add_gyro_bias((0.05, -0.01, 0.0))
    after, _ = imu.read((0.2, 0.0, 0.0), AT_REST_UPRIGHT)
    lsb = 20.0 / 2**20
    np.testing.assert_allclose(
        np.subtract(after, before), [0.05, -0.01, 0.0], atol=lsb, err_msg="gyro step (rad/s)"
    )
    np.testing.assert_allclose(imu.gyro_bias, [0.05, -0.01, 0.0], atol=1e-15, err_msg="bias")


def test_accel_dropout_reads_zero_and_keeps_the_noise_sequence():
    """A dropped-out accelerometer reads (0, 0, 0); the gyro is unaffected, and after the fault
    the readings match a sensor that never dropped out (faults do not shift the random stream)."""
    spec = robot.Imu()
    faulty, healthy = Imu(spec, seed=9), Imu(spec, seed=9)
    for k in range(30):
        faulty.accel_dropout = 10 <= k < 20
        gyro_f, accel_f = faulty.read((0.1, 0.0, 0.0), AT_REST_UPRIGHT)
        gyro_h, accel_h = healthy.read((0.1, 0.0, 0.0), AT_REST_UPRIGHT)
        assert gyro_f == gyro_h, f"gyro changed by the accel fault at call {k}"
        assert accel_f == ((0.0, 0.0, 0.0) if 10 <= k < 20 else accel_h), f"accel at call {k}"


# ----------------------------------------------------------------- encoders


def test_encoder_ticks_known_angles():
    """Counts = floor(angle / 2 pi * counts_per_rev * gear_ratio) [derived from the contract].
    Robot defaults: 360 counts per motor turn, gear ratio 48 -> 17280 counts per wheel turn;
    1 rad -> 2750.197 -> 2750; -1 rad -> -2751 (floor, not truncation)."""
    encoders = Encoders(robot.Encoders().counts_per_rev, robot.Motors().gear_ratio)
    assert encoders.ticks(2 * math.pi, 0.0) == (17280, 0), "one wheel turn forward"
    assert encoders.ticks(1.0, -1.0) == (2750, -2751), "counts for +-1 rad"
    assert all(isinstance(t, int) for t in encoders.ticks(0.3, 0.4)), "counts are ints"


def test_encoder_missed_counts():
    """A missed-count fault makes that side's reading lag the true count, in the direction the
    wheel last turned, from then on; the other side is untouched."""
    encoders = Encoders(100, 1.0)  # 100 counts per wheel turn: 1 count = 2 pi / 100 rad
    step = 2 * math.pi / 100
    assert encoders.ticks(10.5 * step, 10.5 * step) == (10, 10), "before the fault"
    encoders.miss("left", 3)
    assert encoders.ticks(20.5 * step, 20.5 * step) == (17, 20), "3 left counts lost going forward"
    encoders.ticks(15.5 * step, 15.5 * step)  # now turning backwards
    encoders.miss("right", 2)
    assert encoders.ticks(5.5 * step, 5.5 * step) == (2, 7), "2 right counts lost going back"
    with pytest.raises(ValueError, match="side"):
        encoders.miss("middle", 1)
    with pytest.raises(ValueError, match="counts"):
        encoders.miss("left", -1)


def _model_draws(spec: robot.Imu, seed: int, count: int) -> tuple[np.ndarray, list]:
    """Turn-on bias (6) and ``count`` scaled rows of 12 normals, drawn as the model draws them."""
    rng = np.random.default_rng(seed)
    gyro, accel = AxisNoise.from_section(spec.gyro), AxisNoise.from_section(spec.accel)
    turn_on = rng.standard_normal(6)
    bias = np.concatenate([turn_on[:3] * gyro.bias_std, turn_on[3:] * accel.bias_std])
    scale = np.repeat([gyro.walk_std(spec.rate), gyro.white_std(spec.rate),
                       accel.walk_std(spec.rate), accel.white_std(spec.rate)], 3)
    rows, size = [], 16
    while len(rows) < count:
        rows.extend(rng.standard_normal((size, 12)) * scale)
        size = min(2 * size, 1024)
    return bias, rows


def _sequential_readings(spec: robot.Imu, seed: int, elapsed: list[int],
                         fault_at: int, fault: tuple[float, float, float]) -> np.ndarray:
    """The bias walk summed read by read, as IEEE Std 952's model states it:
    b_k = b_(k-1) + K·√(n_k / f)·w_k, output = true + b_k + white_k (no rounding)."""
    bias, rows = _model_draws(spec, seed, len(elapsed))
    out = []
    for k, n in enumerate(elapsed):
        row = rows[k]
        if k == fault_at:
            bias[:3] += fault
        bias += math.sqrt(n) * row[[0, 1, 2, 6, 7, 8]]
        out.append(bias + row[[3, 4, 5, 9, 10, 11]])
    return np.array(out)


def test_precomputed_walk_matches_read_by_read_sum():
    """Reads with irregular sample counts, a bias fault and several blocks give the readings of
    the walk summed read by read (IEEE Std 952 rate random walk), to float rounding."""
    spec = imu_spec(gyro_density=0.01, gyro_bias=0.02, gyro_walk=0.05,
                    accel_density=0.03, accel_bias=0.1, accel_walk=0.2)
    rng = np.random.default_rng(3)
    elapsed = [0] + [5] * 60 + list(rng.integers(1, 7, size=200)) + [5] * 300
    fault = (0.01, -0.02, 0.03)
    imu = Imu(spec, seed=11)
    got = []
    for k, n in enumerate(elapsed):
        if k == 100:
            imu.add_gyro_bias(fault)
        gyro, accel = imu.read(STILL, STILL, int(n))
        got.append(gyro + accel)
    expected = _sequential_readings(spec, 11, elapsed, 100, fault)
    lsb = 2000.0 / 2**32
    np.testing.assert_allclose(got, expected, rtol=0, atol=2 * lsb + 1e-12,
                               err_msg="readings against the read-by-read walk")
    last_white = _model_draws(spec, 11, len(elapsed))[1][len(elapsed) - 1][[3, 4, 5, 9, 10, 11]]
    np.testing.assert_allclose(imu.gyro_bias + imu.accel_bias, expected[-1] - last_white,
                               atol=1e-12, err_msg="bias after the last read")
