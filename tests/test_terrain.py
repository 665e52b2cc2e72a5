"""The floor the World builds and the disturbances it applies, against mechanics.

Slopes and rolling against SOURCES.md §3 (statics and rolling down an incline),
pushes against Newton's second law (an impulse J changes the momentum by J),
payloads against the definition of the centre of mass, and the floor's
features (patches, thresholds, rough ground, slope) against what the Ground
asked for, read back from the engine with ray tests.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from sandbox.actuators import DriveTrain
from sandbox.events import EventSpec, Timeline
from sandbox.ground import (
    FLOOR_EXTENT,
    ROUGH_EXTENT,
    Ground,
    Patch,
    Rough,
    Step,
    floor_pieces,
    ground_from_record,
    ground_record,
    rough_heights,
)
from sandbox.robot import load_robot
from sandbox.world import World, pb

ROOT = Path(__file__).resolve().parents[1]
SHELF_RUNNER = ROOT / "robots" / "shelf-runner.yaml"
SIDE = 2.0  # m along y: free bodies are dropped here, well clear of the robot at y = 0


@pytest.fixture(scope="module")
def spec():
    return load_robot(SHELF_RUNNER)


@pytest.fixture(scope="module")
def coasting_spec():
    """shelf-runner with an open bridge at zero duty: the motors pass no current."""
    return load_robot(SHELF_RUNNER, {"driver.off_state": "coast"})


def slope_axes(slope: float) -> tuple[np.ndarray, np.ndarray]:
    """(up-slope unit vector, floor normal) of a floor tilted by ``slope`` about y."""
    return (np.array([math.cos(slope), 0.0, math.sin(slope)]),
            np.array([-math.sin(slope), 0.0, math.cos(slope)]))


def slope_quaternion(slope: float) -> tuple:
    return pb.getQuaternionFromEuler([0.0, -slope, 0.0])


def free_body(world: World, shape: int, mass: float, position, orientation) -> int:
    """A free body in the world's client, no damping, friction coefficient 1 (Bullet
    multiplies the two bodies' coefficients, so the floor's value is the pair's)."""
    c = world.client
    body = pb.createMultiBody(mass, shape, basePosition=list(position),
                              baseOrientation=orientation, physicsClientId=c)
    pb.changeDynamics(body, -1, lateralFriction=1.0, rollingFriction=0.0, spinningFriction=0.0,
                      linearDamping=0.0, angularDamping=0.0, physicsClientId=c)
    return body


def track(world: World, body: int, seconds: float) -> tuple[np.ndarray, np.ndarray]:
    """Times (s) and positions (m, world) of ``body`` stepped for ``seconds``."""
    c = world.client
    times, positions = [], []
    for k in range(int(round(seconds / world.dt)) + 1):
        times.append(k * world.dt)
        positions.append(pb.getBasePositionAndOrientation(body, physicsClientId=c)[0])
        pb.stepSimulation(physicsClientId=c)
    return np.array(times), np.array(positions)


def fitted_acceleration(t: np.ndarray, s: np.ndarray) -> float:
    """Second derivative (m/s²) of a least-squares parabola through s(t)."""
    return float(2.0 * np.polyfit(t, s, 2)[0])


# ------------------------------------------------------------------ slope: impending slip

MU = 0.8
CRITICAL_DEG = math.degrees(math.atan(MU))  # 38.6598° (SOURCES.md §3)


def box_on_slope(spec, slope: float, seconds: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
    """A 10 cm cube set down 0.1 mm above the World's sloped floor (μ = 0.8) at y = 2 m;
    returns times (s) and its travel up the slope (m)."""
    with World(spec, ground=Ground(slope=slope, friction=MU)) as world:
        along, normal = slope_axes(slope)
        assert np.allclose(normal, world.floor_normal(), atol=1e-12)
        half = 0.05
        shape = pb.createCollisionShape(pb.GEOM_BOX, halfExtents=[half] * 3,
                                        physicsClientId=world.client)
        start = np.array([0.0, SIDE, 0.0]) + normal * (half + 1e-4)
        box = free_body(world, shape, 1.0, start, slope_quaternion(slope))
        t, p = track(world, box, seconds + 0.05)
    settled = t >= 0.05  # after touching down
    return t[settled] - 0.05, (p[settled] - p[settled][0]) @ along


def test_the_critical_angle_of_the_check_is_38_66_degrees():
    """SOURCES.md §3: tan θ = μ_s; μ = 0.8 gives θ = 38.6598°."""
    assert CRITICAL_DEG == pytest.approx(38.6598, abs=1e-4)


def test_box_holds_on_a_slope_one_degree_below_atan_mu(spec):
    """At atan μ − 1° a resting box stays put over 1 s.

    Source: SOURCES.md §3, impending slip on an incline, tan θ = μ_s (any statics text).
    Friction 0.8 on the World's floor × 1.0 on the box (Bullet multiplies them);
    the World uses the direct LCP solver. Limit 0.1 mm: three orders below a slide.
    """
    _, travel = box_on_slope(spec, math.radians(CRITICAL_DEG - 1.0))
    assert np.max(np.abs(travel)) < 1e-4, (
        f"box crept {np.max(np.abs(travel)) * 1000:.3f} mm at atan(mu) - 1 deg")


def test_box_slides_on_a_slope_one_degree_above_atan_mu(spec):
    """At atan μ + 1° the box slides down with a = g (sin θ − μ cos θ), within 3 %.

    Source: SOURCES.md §3, tan θ = μ_s (statics) and Coulomb friction on an
    incline (standard mechanics texts). Bullet has one coefficient for both
    static and kinetic friction, so μ_k = μ_s = 0.8 here.
    """
    slope = math.radians(CRITICAL_DEG + 1.0)
    t, travel = box_on_slope(spec, slope)
    expected = 9.80665 * (math.sin(slope) - MU * math.cos(slope))  # down the slope
    assert travel[-1] < -0.05, f"box moved only {travel[-1] * 1000:.1f} mm at atan(mu) + 1 deg"
    measured = -fitted_acceleration(t, travel)
    assert measured == pytest.approx(expected, rel=0.03), "sliding acceleration (m/s^2)"


# ------------------------------------------------------------------ rolling down an incline

def roll_cylinder(spec, friction: float, slope: float = math.radians(30.0), radius: float = 0.05,
                  width: float = 0.04, mass: float = 1.0, seconds: float = 0.8):
    """A solid cylinder (axis across the slope) released on the World's floor at y = 2 m.

    Returns (times s, travel up the slope m, final spin rate about the axis rad/s,
    the engine's inertia about the axis kg·m²).
    """
    with World(spec, ground=Ground(slope=slope, friction=friction)) as world:
        c = world.client
        along, normal = slope_axes(slope)
        # GEOM_CYLINDER is an exact cylinder in Bullet (not a polygon); its axis is z.
        shape = pb.createCollisionShape(pb.GEOM_CYLINDER, radius=radius, height=width,
                                        physicsClientId=c)
        axis_to_y = pb.getQuaternionFromEuler([math.pi / 2, 0.0, 0.0])
        orientation = pb.multiplyTransforms([0, 0, 0], slope_quaternion(slope), [0, 0, 0],
                                            axis_to_y)[1]
        start = np.array([0.0, SIDE, 0.0]) + normal * (radius + 1e-5)
        body = free_body(world, shape, mass, start, orientation)
        axial_inertia = pb.getDynamicsInfo(body, -1, physicsClientId=c)[2][2]
        t, p = track(world, body, seconds)
        spin = pb.getBaseVelocity(body, physicsClientId=c)[1][1]
    return t, (p - p[0]) @ along, spin, axial_inertia


def test_solid_cylinder_rolls_with_two_thirds_of_g_sin_theta(spec):
    """Rolling without slip at 30°: a = g sin θ / (1 + I/(m r²)) = 2/3 g sin θ, within 1 %.

    Source: SOURCES.md §3 (standard mechanics texts): 3.2700 m/s² at g = 9.81,
    3.26888 m/s² at the World's g = 9.80665. Friction 1.0 is well above
    μ_min = tan θ · k/(1+k) = 0.19245. Also checks the engine's cylinder inertia
    is ½ m r² and that the contact point does not slip (ω r = v).
    """
    radius, mass = 0.05, 1.0
    t, travel, spin, inertia = roll_cylinder(spec, friction=1.0, radius=radius, mass=mass)
    assert inertia == pytest.approx(0.5 * mass * radius**2, rel=1e-9), "cylinder axial inertia"
    assert 9.81 * 0.5 / 1.5 == pytest.approx(3.2700, abs=1e-4)  # the SOURCES.md figure
    expected = 9.80665 * math.sin(math.radians(30.0)) / (1.0 + 0.5)
    moving = t > 0.05  # after the 10 µm drop onto the floor
    measured = -fitted_acceleration(t[moving], travel[moving])
    assert measured == pytest.approx(expected, rel=0.01), "rolling acceleration (m/s^2)"
    speed = expected * t[-1]
    assert abs(spin) * radius == pytest.approx(speed, rel=0.01), "rim speed vs centre speed"


# ------------------------------------------------------------------ pushes: impulse = Δ momentum

def linear_momentum(world: World) -> np.ndarray:
    """Σ m v over the robot's links (kg·m/s): base and wheels at their centres of mass."""
    c, robot = world.client, world.robot_id
    total = np.array(pb.getBaseVelocity(robot, physicsClientId=c)[0]) * pb.getDynamicsInfo(
        robot, -1, physicsClientId=c)[0]
    for link in range(pb.getNumJoints(robot, physicsClientId=c)):
        mass = pb.getDynamicsInfo(robot, link, physicsClientId=c)[0]
        velocity = pb.getLinkState(robot, link, computeLinkVelocity=1, physicsClientId=c)[6]
        total += mass * np.array(velocity)
    return total


def floating_world(spec) -> World:
    """The robot with gravity off, lifted 0.5 m clear of the floor: a free body."""
    world = World(spec, gravity=0.0)
    state = world.body_state()
    world.set_state((state.com[0], state.com[1], state.com[2] + 0.5), state.com_orientation)
    return world


@pytest.mark.parametrize("impulse", [(0.3, 0.0, 0.0), (-0.2, 0.1, 0.05), (0.0, 0.4, 0.0)],
                         ids=["forward", "oblique", "sideways"])
def test_push_changes_momentum_by_its_impulse(coasting_spec, impulse):
    """`world.push(J/dt, point, steps=1)` then one step changes Σ m v by J, within 1 % of |J|.

    Source: Newton's second law (SOURCES.md §3, momentum: exact). Gravity off, the
    robot lifted clear of the floor (no contact forces), the bridge open at zero
    duty; wheel torques and the rotor coupling are internal and cannot change
    the total. Afterwards the momentum stays put (no external force) for 0.2 s.
    """
    j = np.array(impulse)
    with floating_world(coasting_spec) as world:
        drive = DriveTrain(coasting_spec)
        before = linear_momentum(world)
        assert np.linalg.norm(before) < 1e-9, "robot at rest before the push"
        world.push(tuple(j / world.dt), (0.0, 0.01, 0.18), steps=1)
        world.advance(1, drive)
        change = linear_momentum(world) - before
        error = np.linalg.norm(change - j) / np.linalg.norm(j)
        assert error < 0.01, f"momentum change {change} vs impulse {j} (N*s): {error:.2%}"
        world.advance(200, drive)
        later = linear_momentum(world) - before
        assert np.linalg.norm(later - j) / np.linalg.norm(j) < 0.01, "momentum after 0.2 s"


def test_timeline_push_event_delivers_its_impulse(coasting_spec):
    """An `impulse: 0.25 N*s, direction: left` event fired by a Timeline changes Σ m v by
    0.25 N·s to the robot's left, within 1 %.

    Source: Newton's second law (SOURCES.md §3). Checks the event's conversion of an
    impulse into a one-step force (J/dt) and its direction from the heading.
    """
    timeline = Timeline((EventSpec.model_validate(
        {"at": 0.0, "push": {"impulse": "0.25 N*s", "direction": "left"}}),))
    with floating_world(coasting_spec) as world:
        drive = DriveTrain(coasting_spec)
        before = linear_momentum(world)
        timeline.fire(0.0, 0.0, world, drive, None, None)
        world.advance(1, drive)
        change = linear_momentum(world) - before
    np.testing.assert_allclose(change, [0.0, 0.25, 0.0], atol=0.0025,
                               err_msg="momentum change (N*s) of a 0.25 N*s push to the left")


# ------------------------------------------------------------------ payloads: centre of mass

def engine_centre_of_mass(world: World) -> tuple[float, np.ndarray]:
    """(total mass kg, centre of mass m world) from the engine's bodies: robot links and
    payloads, masses from getDynamicsInfo, positions of each link's centre of mass."""
    c, robot = world.client, world.robot_id
    masses = [pb.getDynamicsInfo(robot, -1, physicsClientId=c)[0]]
    centres = [pb.getBasePositionAndOrientation(robot, physicsClientId=c)[0]]
    for link in range(pb.getNumJoints(robot, physicsClientId=c)):
        masses.append(pb.getDynamicsInfo(robot, link, physicsClientId=c)[0])
        centres.append(pb.getLinkState(robot, link, physicsClientId=c)[0])
    for payload in world.payload_ids:
        masses.append(pb.getDynamicsInfo(payload, -1, physicsClientId=c)[0])
        centres.append(pb.getBasePositionAndOrientation(payload, physicsClientId=c)[0])
    m = np.array(masses)
    return float(m.sum()), m @ np.array(centres) / m.sum()


def described_centre_of_mass(spec, world: World, payloads) -> np.ndarray:
    """(Σ mᵢ cᵢ)/Σ mᵢ from the robot's derived figures plus the payloads at their body
    points, placed in the world with the body's present pose (m)."""
    f = spec.figures
    mass = f.mass + sum(m for m, _ in payloads)
    moment = f.mass * np.asarray(f.com) + sum(m * np.asarray(at) for m, at in payloads)
    state = world.body_state()
    rotation = np.array(state.rotation).reshape(3, 3)
    return np.array(state.axle) + rotation @ (moment / mass)


@pytest.mark.parametrize("tilt", [0.0, 0.2], ids=["upright", "leaning"])
def test_payload_moves_the_centre_of_mass_to_the_weighted_average(spec, tilt):
    """After add_payload the engine's centre of mass is (Σ mᵢ cᵢ)/Σ mᵢ within 1e-6 m.

    Source: the definition of the centre of mass (exact). Two payloads, one off
    the centre line; the robot upright and leaning 0.2 rad. After 50 ms of falling
    the payloads are still where they were fixed (within 0.1 mm).
    """
    payloads = [(0.12, (0.01, -0.02, 0.23)), (0.05, (-0.03, 0.04, 0.10))]
    with World(spec, tilt=tilt) as world:
        for mass, at in payloads:
            world.add_payload(mass, (0.05, 0.04, 0.02), at)
        total, engine = engine_centre_of_mass(world)
        assert total == pytest.approx(spec.figures.mass + 0.17, rel=1e-12), "total mass (kg)"
        assert world.payload_mass() == pytest.approx(0.17, rel=1e-12), "payload mass (kg)"
        expected = described_centre_of_mass(spec, world, payloads)
        np.testing.assert_allclose(engine, expected, rtol=0, atol=1e-6,
                                   err_msg="centre of mass with payloads (m)")
        for _ in range(50):
            world.step(0.0, 0.0)
        _, engine = engine_centre_of_mass(world)
        np.testing.assert_allclose(engine, described_centre_of_mass(spec, world, payloads),
                                   rtol=0, atol=1e-4, err_msg="centre of mass after 50 ms (m)")


# ------------------------------------------------------------------ floor features

def ray_down(world: World, x: float, y: float, top: float = 1.0):
    """(body id, hit point) of a vertical ray from z = top down to z = -1 m."""
    hit = pb.rayTest([x, y, top], [x, y, -1.0], physicsClientId=world.client)[0]
    return hit[0], np.array(hit[3]), np.array(hit[4])


def test_floor_pieces_split_at_patch_edges_with_their_friction():
    """floor_pieces: the floor is cut at every patch edge, each piece with its friction;
    a later patch wins where two overlap; patches beyond the floor are cut to it."""
    ground = Ground(friction=0.9, patches=(Patch(1.0, 2.0, 0.2), Patch(1.5, 3.0, 0.5),
                                            Patch(35.0, 50.0, 0.1)))
    assert floor_pieces(ground) == [
        (FLOOR_EXTENT[0], 1.0, 0.9), (1.0, 1.5, 0.2), (1.5, 2.0, 0.5), (2.0, 3.0, 0.5),
        (3.0, 35.0, 0.9), (35.0, FLOOR_EXTENT[1], 0.1)]
    assert floor_pieces(Ground(friction=0.4)) == [(*FLOOR_EXTENT, 0.4)]


def test_world_floor_has_the_pieces_extents_and_frictions(spec):
    """The World builds one box per piece, top face at z = 0, with the piece's friction;
    set_friction then changes every piece."""
    ground = Ground(friction=0.9, patches=(Patch(0.5, 1.5, 0.15),))
    with World(spec, ground=ground) as world:
        c = world.client
        pieces = floor_pieces(ground)
        assert len(world.floor_ids) == len(pieces)
        for body, (start, end, friction) in zip(world.floor_ids, pieces):
            low, high = pb.getAABB(body, physicsClientId=c)
            assert (low[0], high[0]) == pytest.approx((start, end), abs=1e-9), "piece extent"
            assert high[2] == pytest.approx(0.0, abs=1e-9), "floor top at z = 0"
            assert pb.getDynamicsInfo(body, -1, physicsClientId=c)[1] == pytest.approx(friction)
            middle = 0.5 * (max(start, -5.0) + min(end, 5.0))
            hit_body, point, _ = ray_down(world, middle, 1.0)
            assert hit_body == body and point[2] == pytest.approx(0.0, abs=1e-9)
        world.set_friction(0.3)
        for body in world.floor_ids:
            assert pb.getDynamicsInfo(body, -1, physicsClientId=c)[1] == pytest.approx(0.3)


def test_threshold_is_a_raised_strip_of_its_height(spec):
    """A Step(at=0.5 m, height=5 mm, length=30 mm) on the flat floor: vertical rays meet
    its top 5 mm up from 0.5 to 0.53 m and the floor itself before and after it."""
    step = Step(at=0.5, height=0.005, length=0.03)
    with World(spec, ground=Ground(steps=(step,))) as world:
        strip = world.floor_ids[-1]
        for x, expected_body, expected_height in [
                (0.45, "floor", 0.0), (0.499, "floor", 0.0), (0.501, strip, 0.005),
                (0.515, strip, 0.005), (0.529, strip, 0.005), (0.531, "floor", 0.0),
                (0.6, "floor", 0.0)]:
            for y in (-1.0, 0.0, 3.0):
                body, point, _ = ray_down(world, x, y)
                if expected_body == "floor":
                    assert body in world.floor_ids[:-1], f"ray at x = {x} m meets the floor"
                else:
                    assert body == strip, f"ray at x = {x} m meets the threshold"
                assert point[2] == pytest.approx(expected_height, abs=1e-9), (
                    f"height (m) at x = {x} m, y = {y} m")


@pytest.mark.parametrize("slope_deg", [0.0, 8.0, -5.0])
def test_floor_boxes_lie_along_the_slope(spec, slope_deg):
    """Every floor box (pieces and a threshold) has the slope's orientation, its size, and
    its centre where the floor coordinates put it: pieces with their top face in the
    floor plane, the threshold standing its height proud of it at 0.5–0.53 m along it.
    (Read from the engine's pose and shape data: Bullet's ray test against a rotated
    box is off by up to 0.5 mm near its edges, so rays are used on flat floor only.)"""
    slope = math.radians(slope_deg)
    along, normal = slope_axes(slope)
    ground = Ground(slope=slope, patches=(Patch(1.0, 2.0, 0.3),),
                    steps=(Step(at=0.5, height=0.005, length=0.03),))
    with World(spec, ground=ground) as world:
        c = world.client
        expected = [((a + b) / 2, -0.05, (b - a, 10.0, 0.1)) for a, b, _ in floor_pieces(ground)]
        expected.append((0.515, 0.0025, (0.03, 10.0, 0.005)))
        assert len(world.floor_ids) == len(expected)
        for body, (middle, height, size) in zip(world.floor_ids, expected):
            centre, orientation = pb.getBasePositionAndOrientation(body, physicsClientId=c)
            centre = np.array(centre)
            assert centre @ along == pytest.approx(middle, abs=1e-9), "centre along the floor"
            assert centre[1] == pytest.approx(0.0, abs=1e-12)
            assert centre @ normal == pytest.approx(height, abs=1e-9), "centre above the floor"
            rotation = np.array(pb.getMatrixFromQuaternion(orientation)).reshape(3, 3)
            np.testing.assert_allclose(rotation[:, 0], along, atol=1e-9, err_msg="box x axis")
            np.testing.assert_allclose(rotation[:, 2], normal, atol=1e-9, err_msg="box z axis")
            shape = pb.getCollisionShapeData(body, -1, physicsClientId=c)[0]
            assert shape[2] == pb.GEOM_BOX
            np.testing.assert_allclose(shape[3], size, atol=1e-9, err_msg="box size (m)")


def test_rough_heights_are_seeded_bounded_and_ramp_from_flat():
    """rough_heights: the same seed gives the same grid, another seed another; every
    height within ±amplitude and the tallest at least half of it; flat up to x = 0.1 m,
    then at most amplitude·(x − 0.1)/0.4 up to x = 0.5 m (the robot starts on level floor)."""
    rough = Rough(amplitude=0.004, wavelength=0.12, seed=3)
    spacing = 0.02
    heights = rough_heights(rough, spacing)
    np.testing.assert_array_equal(heights, rough_heights(rough, spacing))
    other = rough_heights(Rough(0.004, 0.12, seed=4), spacing)
    assert np.max(np.abs(other - heights)) > 1e-3, "another seed, other heights"
    assert np.max(np.abs(heights)) <= rough.amplitude * (1 + 1e-12)
    assert np.max(np.abs(heights)) >= 0.5 * rough.amplitude
    x = ROUGH_EXTENT[0] + spacing * np.arange(heights.shape[0])
    assert x[-1] == pytest.approx(ROUGH_EXTENT[1])
    flat = x <= 0.1 + 1e-9
    assert np.max(np.abs(heights[flat])) < 1e-12, "flat before the ramp (m)"
    ramp = np.clip((x - 0.1) / 0.4, 0.0, 1.0)
    assert np.all(np.abs(heights) <= rough.amplitude * ramp[:, None] + 1e-12), "ramp"
    assert np.max(np.abs(heights[x > 1.0])) > 0.3 * rough.amplitude, "bumps after the ramp"


def test_rough_floor_in_the_world_has_the_seeded_heights(spec):
    """The World's heightfield has rough_heights' values at its grid points (ray tests at
    200 random interior points, within 1 µm): the engine's centring of heightfields is
    undone correctly."""
    rough = Rough(amplitude=0.004, wavelength=0.12, seed=3)
    spacing = max(min(rough.wavelength / 6.0, 0.05), 0.01)  # the World's grid spacing
    heights = rough_heights(rough, spacing)
    rng = np.random.default_rng(11)
    with World(spec, ground=Ground(rough=rough)) as world:
        for _ in range(200):
            i = int(rng.integers(1, heights.shape[0] - 1))
            j = int(rng.integers(1, heights.shape[1] - 1))
            x, y = ROUGH_EXTENT[0] + i * spacing, -0.6 + j * spacing
            body, point, _ = ray_down(world, x, y)
            assert body == world.floor_ids[0], f"ray at ({x:.2f}, {y:.2f}) m hits the floor"
            assert point[2] == pytest.approx(heights[i, j], abs=1e-6), (
                f"height (m) at ({x:.2f}, {y:.2f})")


@pytest.mark.parametrize("slope_deg", [-6.0, 10.0])
def test_slope_surface_normal_is_the_worlds_floor_normal(spec, slope_deg):
    """On a sloped floor the surface normal the engine reports (ray tests) equals
    world.floor_normal() = (−sin θ, 0, cos θ), and the surface passes through the
    origin rising tan θ per metre of x (driving forward climbs a positive slope)."""
    slope = math.radians(slope_deg)
    with World(spec, ground=Ground(slope=slope)) as world:
        normal = np.array(world.floor_normal())
        np.testing.assert_allclose(normal, [-math.sin(slope), 0.0, math.cos(slope)], atol=1e-12)
        for x in (-1.0, 0.3, 2.0):
            _, point, hit_normal = ray_down(world, x, 1.0)
            np.testing.assert_allclose(hit_normal, normal, atol=1e-9,
                                       err_msg=f"surface normal at x = {x} m")
            assert point[2] == pytest.approx(x * math.tan(slope), abs=1e-9), "surface height (m)"


def test_ground_record_round_trips():
    """ground_record → ground_from_record gives back the same Ground (run.yaml replay)."""
    ground = Ground(friction=0.7, rolling_resistance=0.02, slope=0.05,
                    patches=(Patch(1.0, 2.0, 0.2),), steps=(Step(0.5, 0.004, 0.02),),
                    rough=Rough(0.003, 0.1, 9))
    assert ground_from_record(ground_record(ground)) == ground
    assert ground_from_record(None) is None
