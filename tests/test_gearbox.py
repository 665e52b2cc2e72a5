"""sandbox.gearbox and its use in the world: the rotor's cross term without a lag, backlash."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
import scipy.integrate

from sandbox.analysis import PlanarParams, duty_input_model, torque_input_model
from sandbox.gearbox import CouplingGains
from sandbox.identify import Excitation, identification_spec, record_run
from sandbox.robot import load_robot

ROBOTS = Path(__file__).resolve().parents[1] / "robots"
ROBOT_NAMES = sorted(p.stem for p in ROBOTS.glob("*.yaml"))


def robot(name: str, overrides: dict | None = None):
    return load_robot(ROBOTS / f"{name}.yaml", overrides)


# ------------------------------------------------------------------ rotor coupling


@pytest.mark.parametrize("name", ROBOT_NAMES)
def test_coupling_gains_are_the_planar_models_torque_column(name):
    """The per-torque accelerations the world predicts with are B of the torque-input
    planar model (SOURCES §1 with the reflected rotor inertia terms [derived]): pitch
    acceleration B[3], and the two wheels' absolute accelerations 2·B[1]/r."""
    params = PlanarParams.from_spec(robot(name))
    gains = CouplingGains.from_params(params)
    _, B = torque_input_model(params)
    assert gains.pitch == pytest.approx(B[3, 0], rel=1e-12), "pitch acceleration per N·m"
    assert gains.wheels == pytest.approx(2 * B[1, 0] / params.wheel_radius, rel=1e-12)
    # from rest with no gravity torque, the same thing
    pitch, wheels = gains.accelerations(0.1, 0.0)
    assert pitch == pytest.approx(0.1 * B[3, 0], rel=1e-12)
    assert wheels == pytest.approx(0.2 * B[1, 0] / params.wheel_radius, rel=1e-12)


def duty_step_response(spec, physics_dt: float, period: float = 0.005, duty: float = 0.2):
    """(engine, model) state change one controller period after a duty step from balance.

    The engine runs the robot under identification conditions (sandbox.identify); the
    model is the planar duty-input model of SOURCES §1 and §5, integrated with
    scipy.integrate.solve_ivp at the duty the bridge actually drove (scaled to nominal
    voltage, as B is defined)."""
    plain = identification_spec(spec)
    steps = int(round(period / physics_dt))
    states, inputs = record_run(plain, 0.0, np.full(steps, duty), Excitation(physics_dt=physics_dt))
    A, B = duty_input_model(PlanarParams.from_spec(plain))
    applied = float(np.mean(inputs))
    solution = scipy.integrate.solve_ivp(lambda t, s: A @ s + B[:, 0] * applied, (0.0, period),
                                         np.zeros(4), rtol=1e-10, atol=1e-13)
    return states[-1] - states[0], solution.y[:, -1]


@pytest.mark.parametrize("name", ROBOT_NAMES)
def test_duty_step_response_matches_the_planar_model_at_1_ms(name):
    """One 5 ms controller period after a duty step, the engine's pitch rate and forward
    speed agree with the linearised planar Lagrange model (SOURCES §1, rotor terms
    [derived]; DC motor §5 [published]) integrated by scipy, within 2 % at a 1 ms step
    (measured: 1.0 % desk-mite, 0.5 % shelf-runner, 0.6 % tall-mast; 7-10 % before the
    cross term was predicted)."""
    engine, model = duty_step_response(robot(name), 1e-3)
    assert engine[3] == pytest.approx(model[3], rel=0.02), "pitch rate after 5 ms (rad/s)"
    assert engine[1] == pytest.approx(model[1], rel=0.02), "forward speed after 5 ms (m/s)"


def test_duty_step_without_rotor_is_unchanged_by_the_coupling():
    """With no rotor inertia the world applies no cross term, so the response is the
    engine's own and still agrees with the planar model (SOURCES §1) within 2 %."""
    engine, model = duty_step_response(robot("shelf-runner", {"motors.rotor_inertia": 0.0}), 1e-3)
    assert engine[3] == pytest.approx(model[3], rel=0.02), "pitch rate after 5 ms (rad/s)"
