"""sandbox.identify: the linear model of sandbox.analysis against the pybullet engine."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from ideal_parts import ideal_robot

from sandbox.analysis import PlanarParams, analyze, duty_input_model
from sandbox.identify import (
    Excitation,
    check_suggested,
    check_table,
    compare,
    compare_table,
    fit_accelerations,
    identification_spec,
    identify,
    pseudo_random_duties,
)

ROBOTS = Path(__file__).resolve().parents[1] / "robots"
ROBOT_NAMES = sorted(p.stem for p in ROBOTS.glob("*.yaml"))
AGREEMENT = 0.05  # relative, on the entries that carry the physics (KEY_ENTRIES)

def robot(name: str):
    return ideal_robot(name)  # checks against the analytic model: ideal parts


def assert_agrees(result: dict, tolerance: float = AGREEMENT) -> None:
    worst = max(result["entries"], key=lambda e: e["relative_difference"])
    assert worst["relative_difference"] < tolerance, (
        f"{result['robot']}: {worst['name']} model {worst['model']:.5g}, identified "
        f"{worst['identified']:.5g} ({100 * worst['relative_difference']:.1f} %)\n"
        + compare_table(result))
    assert result["unstable_pole"]["relative_difference"] < 0.01, "unstable pole (1/s)"


# ------------------------------------------------------------------ without the engine


def test_fit_recovers_a_semi_implicit_euler_system_exactly():
    """Semi-implicit Euler (velocities from the forces at the start of the step, then
    positions from the new velocities — the integrator of the engine) makes the forward
    difference the acceleration at s_k exactly [derived], so the least-squares fit returns
    the acceleration rows of a known model to rounding (rel 1e-8)."""
    A, B = duty_input_model(PlanarParams.from_spec(robot("shelf-runner")))
    dt = 1e-3
    rng = np.random.default_rng(3)
    states, inputs = [], []
    for _ in range(4):
        s = np.array([0.0, 0.0, rng.uniform(-0.01, 0.01), 0.0])
        duties = pseudo_random_duties(rng, 0.02, Excitation(duration=0.2))
        trace = [s.copy()]
        for u in duties:
            acceleration = A @ s + B[:, 0] * u
            s = s.copy()
            s[1] += dt * acceleration[1]
            s[3] += dt * acceleration[3]
            s[0] += dt * s[1]
            s[2] += dt * s[3]
            trace.append(s)
        states.append(np.array(trace))
        inputs.append(duties)
    rows, input_column, constant = fit_accelerations(states, inputs, dt)
    np.testing.assert_allclose(rows, A[np.ix_([1, 3], [1, 2, 3])], rtol=1e-8,
                               err_msg="acceleration rows on [v, pitch, pitch_rate]")
    np.testing.assert_allclose(input_column, B[[1, 3], 0], rtol=1e-8, err_msg="B rows")
    np.testing.assert_allclose(constant, 0.0, atol=1e-9, err_msg="constant (no offset)")


def test_pseudo_random_duties_are_seeded_two_level_holds():
    """Same seed, same sequence (determinism rule); only ±amplitude; every hold but the
    last lasts at least the shortest hold; both signs appear."""
    excitation = Excitation(duration=0.4, hold=(0.005, 0.04), physics_dt=1e-3)
    first = pseudo_random_duties(np.random.default_rng(5), 0.03, excitation)
    again = pseudo_random_duties(np.random.default_rng(5), 0.03, excitation)
    np.testing.assert_array_equal(first, again)
    assert first.shape == (400,)
    assert set(np.unique(first)) <= {-0.03, 0.03} and len(np.unique(first)) == 2
    edges = np.flatnonzero(np.diff(first)) + 1
    holds = np.diff(np.concatenate([[0], edges]))
    # a repeated sign merges holds, so a run of equal levels may be longer: check the short end
    assert holds.min() >= 5, f"shortest hold {holds.min()} steps"


def test_identification_spec_turns_off_what_the_model_leaves_out():
    """Coulomb friction, rolling resistance, PWM quantisation and deadband off, bridge
    driven; mass, inertia and drive voltage unchanged (the linear model's conditions)."""
    original = robot("tall-mast")
    plain = identification_spec(original)
    assert plain.motors.friction_torque == 0.0 and plain.wheels.rolling_resistance == 0.0
    assert plain.driver.pwm_bits == 16 and plain.driver.deadband == 0.0
    assert plain.driver.off_state == "brake"
    assert plain.figures.mass == original.figures.mass
    assert plain.figures.drive_voltage == original.figures.drive_voltage
    assert PlanarParams.from_spec(plain) == PlanarParams.from_spec(original)


def test_identification_spec_takes_out_the_dead_zones_of_honest_parts():
    """The demo file as written lists gearbox play and breakaway friction: dead zones a
    small perturbation lives inside. Both go, and nothing else of the robot changes."""
    from sandbox.robot import load_robot

    honest = load_robot(ROBOTS / "tall-mast.yaml")
    assert honest.motors.backlash > 0 and honest.motors.static_friction_torque
    plain = identification_spec(honest)
    assert plain.motors.backlash == 0.0 and not plain.motors.static_friction_torque
    assert PlanarParams.from_spec(plain) == PlanarParams.from_spec(honest)


def test_tables_read_plainly():
    """check_table gives a verdict line that says whether every controller stayed up."""
    row = {"controller": "pid_tilt", "status": "completed", "fell_at_s": None,
           "max_abs_pitch_deg": 5.0, "rms_pitch_deg": 0.3, "drift_m": 1.2,
           "saturation_fraction": 0.0, "rate_hz": 200.0, "duration_s": 20.0, "tilt_deg": 5.0}
    fell = {**row, "controller": "cascade", "status": "fell", "fell_at_s": 0.795}
    assert check_table([row]).endswith("every controller stayed up")
    text = check_table([row, fell])
    assert "fell at 0.795 s" in text and text.endswith("NOT every controller stayed up")


# ------------------------------------------------------------------ against the engine


def test_identified_model_matches_for_tall_mast():
    """Identified from 1 ms engine runs, tall-mast's acceleration rows (gravity and
    back-EMF columns, B) agree with the hand-derived duty model within 5 % and the
    unstable pole within 1 % (model: SOURCES §1 Lagrangian [published class] with the
    DC-motor law of §5 [published]); the kinematic rows are x' = v, pitch' = pitch rate."""
    result = compare(robot("tall-mast"))
    assert_agrees(result)
    A = np.array(result["identified"]["A"])
    np.testing.assert_array_equal(A[[0, 2]], [[0, 1, 0, 0], [0, 0, 0, 1]])
    np.testing.assert_array_equal(A[:, 0], 0.0)


def test_identified_model_matches_for_tall_mast_as_written():
    """`upright analyze robots/tall-mast.yaml --check` on the file as written (the
    README's command): with the dead zones out (identification_spec) the key entries
    agree within the same 5 % (same sources as above); measured here 2.4 % at most, the
    two sides' differing motors and wheels being in the engine, not in the model.
    Before the dead zones were taken out, B came out with the wrong sign."""
    from sandbox.robot import load_robot

    assert_agrees(compare(load_robot(ROBOTS / "tall-mast.yaml")))


def test_identification_is_deterministic():
    """Same robot and seed give the same (A, B) bit for bit (determinism rule); another
    seed gives other runs."""
    small = Excitation(runs=2, duration=0.15)
    first = identify(robot("tall-mast"), seed=4, excitation=small)
    again = identify(robot("tall-mast"), seed=4, excitation=small)
    other = identify(robot("tall-mast"), seed=5, excitation=small)
    np.testing.assert_array_equal(first[0], again[0])
    np.testing.assert_array_equal(first[1], again[1])
    assert not np.array_equal(first[0], other[0])


@pytest.mark.slow
@pytest.mark.parametrize("name", ROBOT_NAMES)
def test_identified_model_matches_every_robot(name):
    """As above, for every demo robot at the default 1 ms physics step, rotor inertia
    included (measured: every key entry within 1.5 %, desk-mite's within 0.7 %)."""
    assert_agrees(compare(robot(name)))


@pytest.mark.slow
@pytest.mark.parametrize("name", ROBOT_NAMES)
def test_engine_converges_to_the_model_as_the_step_shrinks(name):
    """At a 0.1 ms physics step every robot agrees within 5 % too: a finer step leaves
    the agreement of the 1 ms step in place [derived: first-order convergence]."""
    assert_agrees(compare(robot(name), excitation=Excitation(physics_dt=1e-4)))


# ------------------------------------------------------------------ closed loop


@pytest.mark.parametrize("name", ROBOT_NAMES)
def test_emitted_configs_balance_every_robot(name):
    """The configs `--emit-config` writes (discrete LQR at 200 Hz) keep both example
    controllers up for 20 s from a 5° start in the full simulation (IMU, encoders, PWM,
    friction, battery) — the end-to-end check of the design [derived]."""
    spec = robot(name)
    rows = check_suggested(spec, analyze(spec, rate_hz=200.0), duration=20.0,
                           tilt=math.radians(5.0))
    assert [row["controller"] for row in rows] == ["pid_tilt", "cascade"]
    for row in rows:
        assert row["status"] == "completed", f"{name} {row['controller']}:\n{check_table(rows)}"
        assert row["max_abs_pitch_deg"] <= 5.5, f"{row['controller']} overshoot (deg)"
    cascade = rows[1]
    assert abs(cascade["drift_m"]) < 0.1, f"cascade holds its place: drift {cascade['drift_m']} m"
    assert check_table(rows).endswith("every controller stayed up")
