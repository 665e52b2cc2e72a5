"""Wheels of their own size on each side: the URDF and the world (per-side figures)."""

from __future__ import annotations

import math
from pathlib import Path

import pytest
from ideal_parts import ideal_robot

from sandbox.urdf import robot_urdf, wheel_of
from sandbox.world import World

ROBOTS = Path(__file__).resolve().parents[1] / "robots"


class Sided:
    """A robot description with per-side wheel figures, as ``RobotSpec.wheel_side`` gives
    them (stands in for the description's ``wheels.left``/``wheels.right`` overrides)."""

    def __init__(self, spec, **sides: dict):
        self._spec, self._sides = spec, sides

    def __getattr__(self, name: str):
        return getattr(self._spec, name)

    def wheel_side(self, side: str):
        return self._spec.wheels.model_copy(update=self._sides.get(side, {}))


def test_shared_wheels_without_per_side_figures():
    """A description without per-side figures uses its one wheels section for both."""
    spec = ideal_robot("shelf-runner")
    assert wheel_of(spec, "left") == spec.wheels and wheel_of(spec, "right") == spec.wheels


def test_urdf_gives_each_wheel_its_own_radius_width_and_mass():
    """Each wheel link carries its side's cylinder and a solid cylinder's inertia about
    its axle, m r²/2 (standard formula); equal sides give the same text as no sides."""
    spec = ideal_robot("shelf-runner")
    sided = Sided(spec, left={"radius": 0.0335, "mass": 0.040}, right={"width": 0.020})
    text = robot_urdf(sided)
    left, right = text.split('<link name="wheel_left">')[1].split('<link name="wheel_right">')
    assert 'radius="0.0335"' in left and 'length="0.025"' in left
    assert f'iyy="{0.5 * 0.040 * 0.0335 * 0.0335!r}"' in left, "left axle inertia m r²/2"
    assert 'radius="0.034"' in right and 'length="0.02"' in right
    assert f'iyy="{0.5 * 0.035 * 0.034 * 0.034!r}"' in right, "right axle inertia m r²/2"
    assert robot_urdf(Sided(spec)) == robot_urdf(spec)
    assert (robot_urdf(Sided(spec), with_reflected_inertia=True)
            == robot_urdf(spec, with_reflected_inertia=True))


def test_unequal_radii_turn_the_robot_as_differential_drive_kinematics_say():
    """Equal torques on wheels of 49 and 50 mm: the yaw angle turned over 0.12 s equals
    the integral of (v_r − v_l)/track with v = (wheel rate relative to the body + pitch
    rate) × radius, within 3 % (differential-drive kinematics, SOURCES §11 [published]);
    the robot starts level on both wheels (rolled by asin(Δr/track))."""
    base = ideal_robot("tall-mast")
    spec = Sided(base, left={"radius": 0.049})
    track = base.wheels.track
    with World(spec, tilt=0.0) as world:
        start = world.body_state()
        roll = math.asin(start.rotation[7])
        assert roll == pytest.approx(math.asin(-0.001 / track), rel=1e-6), "roll at spawn (rad)"
        kinematic = 0.0
        for _ in range(120):
            world.step(0.02, 0.02)
            state = world.body_state()
            _, _, rate_left, rate_right = world.wheel_state()
            pitch_rate = state.pitch_rate
            kinematic += ((rate_right + pitch_rate) * 0.050
                          - (rate_left + pitch_rate) * 0.049) / track * world.dt
        turned = state.yaw - start.yaw
    assert abs(kinematic) > 1e-3, "the wheels turned the robot"
    assert turned == pytest.approx(kinematic, rel=0.03), "yaw turned (rad)"
