"""URDF generation: determinism, structure, and what pybullet reads back (mass, inertia, swing)."""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from pathlib import Path
from xml.sax import saxutils

import numpy as np
import pybullet as pb
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from ideal_parts import ideal_robot
from scipy.special import ellipk

from sandbox.inertia import cylinder_inertia_y
from sandbox.robot import RobotSpec, load_robot
from sandbox.urdf import BODY_LINK, WHEEL_JOINTS, quoteattr, robot_urdf
from sandbox.world import LOAD_FLAGS

ROBOTS_DIR = Path(__file__).resolve().parents[1] / "robots"
ROBOT_FILES = sorted(ROBOTS_DIR.glob("*.yaml"))
G_N = 9.80665  # m/s², standard gravity, exact (3rd CGPM 1901) [published]
# shelf-runner with its main board moved 40 mm forward: the body inertia gets an xz product.
OFFSET_OVERRIDES = {"body.parts.1.at": ["40 mm", 0, "180 mm"]}


def robots_to_check() -> list[tuple[str, RobotSpec]]:
    """Every example robot, plus one with a part offset in x (non-diagonal inertia)."""
    out = [(p.stem, ideal_robot(p.stem)) for p in ROBOT_FILES]
    out.append(("offset-x", ideal_robot("shelf-runner", OFFSET_OVERRIDES)))
    return out


ROBOTS = robots_to_check()
ROBOT_IDS = [name for name, _ in ROBOTS]


@pytest.fixture
def client():
    """A headless pybullet client, disconnected after the test."""
    cid = pb.connect(pb.DIRECT)
    yield cid
    pb.disconnect(cid)


def load(client: int, spec: RobotSpec, tmp_path: Path, position=(0.0, 0.0, 1.0),
         orientation=(0.0, 0.0, 0.0, 1.0), **urdf_options) -> int:
    """Write the robot's URDF to a file and load it with the world's flags."""
    path = tmp_path / f"{spec.name}.urdf"
    path.write_text(robot_urdf(spec, **urdf_options), encoding="utf-8")
    return pb.loadURDF(str(path), list(position), list(orientation), flags=LOAD_FLAGS,
                       physicsClientId=client)


def engine_inertia(client: int, body: int, link: int) -> tuple[float, np.ndarray, np.ndarray]:
    """Mass, 3×3 inertia in the link frame, and centre of mass, as the engine holds them.

    pybullet diagonalises an inertia: it keeps the principal moments and the inertial
    frame's orientation R, so the full tensor is R diag(I) Rᵀ.
    """
    info = pb.getDynamicsInfo(body, link, physicsClientId=client)
    rotation = np.array(pb.getMatrixFromQuaternion(info[4])).reshape(3, 3)
    return info[0], rotation @ np.diag(info[2]) @ rotation.T, np.array(info[3])


# ------------------------------------------------------------------ text and structure


@pytest.mark.parametrize("path", ROBOT_FILES, ids=lambda p: p.stem)
def test_same_description_same_bytes(path):
    """Two loads of one file give byte-identical URDF text, with and without rotor inertia."""
    first, second = load_robot(path), load_robot(path)
    assert robot_urdf(first).encode() == robot_urdf(second).encode()
    assert (robot_urdf(first, with_reflected_inertia=True).encode()
            == robot_urdf(second, with_reflected_inertia=True).encode())


@pytest.mark.parametrize(("name", "spec"), ROBOTS, ids=ROBOT_IDS)
def test_urdf_structure(name, spec):
    """The URDF parses as XML: links body, wheel_left, wheel_right; two continuous joints
    about 0 1 0 from the body to each wheel at ±track/2 on the axle."""
    root = ET.fromstring(robot_urdf(spec))
    assert root.tag == "robot" and root.get("name") == spec.name
    assert sorted(link.get("name") for link in root.findall("link")) == [
        BODY_LINK, "wheel_left", "wheel_right"]
    joints = {joint.get("name"): joint for joint in root.findall("joint")}
    assert sorted(joints) == sorted(WHEEL_JOINTS)
    for joint_name, child, sign in ((WHEEL_JOINTS[0], "wheel_left", 1.0),
                                    (WHEEL_JOINTS[1], "wheel_right", -1.0)):
        joint = joints[joint_name]
        assert joint.get("type") == "continuous"
        assert joint.find("axis").get("xyz") == "0 1 0"
        assert joint.find("parent").get("link") == BODY_LINK
        assert joint.find("child").get("link") == child
        x, y, z = (float(v) for v in joint.find("origin").get("xyz").split())
        assert (x, z) == (0.0, 0.0)
        assert y == pytest.approx(sign * spec.wheels.track / 2, rel=1e-15), f"{child} at y"
    body = next(link for link in root.findall("link") if link.get("name") == BODY_LINK)
    assert len(body.findall("visual")) == len(spec.figures.boxes), "one visual per box"
    assert float(body.find("inertial/mass").get("value")) == spec.figures.body.mass


def test_name_is_escaped():
    """A name with XML-special characters stays well-formed (quoteattr)."""
    spec = load_robot(ROBOT_FILES[0]).model_copy(update={"name": 'a "quoted" & <odd> bot'})
    assert ET.fromstring(robot_urdf(spec)).get("name") == 'a "quoted" & <odd> bot'


# ------------------------------------------------------------------ what the engine reads


@pytest.mark.parametrize(("name", "spec"), ROBOTS, ids=ROBOT_IDS)
def test_engine_masses_and_inertias_equal_derived_figures(client, tmp_path, name, spec):
    """pybullet (URDF_USE_IMPLICIT_CYLINDER | URDF_USE_INERTIA_FROM_FILE) loads the URDF and
    holds the derived figures: body mass, centre of mass and full 3×3 inertia (R diag(I) Rᵀ,
    rtol 1e-6); each wheel's mass and the solid-cylinder inertia m r²/2 about the axle,
    m(3r² + h²)/12 across (Meriam & Kraige, Dynamics, appendix table) [published]."""
    fig = spec.figures
    robot = load(client, spec, tmp_path)
    mass, inertia, com = engine_inertia(client, robot, -1)
    assert mass == pytest.approx(fig.body.mass, rel=1e-9), "body mass"
    np.testing.assert_allclose(com, fig.body.com, rtol=1e-9, atol=1e-12, err_msg="body com")
    scale = np.abs(fig.body.inertia).max()
    np.testing.assert_allclose(inertia, fig.body.inertia, rtol=1e-6, atol=1e-6 * scale,
                               err_msg="body inertia (kg m^2)")
    cylinder = cylinder_inertia_y(spec.wheels.mass, spec.wheels.radius, spec.wheels.width)
    assert pb.getNumJoints(robot, physicsClientId=client) == 2
    for link in range(2):
        joint = pb.getJointInfo(robot, link, physicsClientId=client)
        assert joint[2] == pb.JOINT_REVOLUTE and tuple(joint[13]) == (0.0, 1.0, 0.0)
        wheel_mass, wheel_inertia, _ = engine_inertia(client, robot, link)
        assert wheel_mass == pytest.approx(spec.wheels.mass, rel=1e-9), "wheel mass"
        np.testing.assert_allclose(wheel_inertia, cylinder, rtol=1e-6,
                                   atol=1e-6 * cylinder.max(), err_msg="wheel inertia")
    total = mass + sum(pb.getDynamicsInfo(robot, j, physicsClientId=client)[0] for j in (0, 1))
    assert total == pytest.approx(fig.mass, rel=1e-9), "whole-robot mass"


def test_offset_part_gives_a_product_of_inertia_the_engine_keeps(client, tmp_path):
    """A part 40 mm forward of the centre line gives Ixz ≠ 0 (Steiner, Meriam & Kraige);
    pybullet's principal axes and moments rebuild it (rtol 1e-6)."""
    spec = ideal_robot("shelf-runner", OFFSET_OVERRIDES)
    ixz = spec.figures.body.inertia[0, 2]
    assert abs(ixz) > 0.01 * spec.figures.body.inertia[1, 1], "expected a clear xz product"
    _, inertia, _ = engine_inertia(client, load(client, spec, tmp_path), -1)
    assert inertia[0, 2] == pytest.approx(ixz, rel=1e-6), "Ixz"
    assert inertia[2, 0] == pytest.approx(ixz, rel=1e-6), "Izx"


def urdf_inertias(text: str) -> dict[str, np.ndarray]:
    """Each link's 3×3 inertia as written in the URDF text."""
    out = {}
    for link in ET.fromstring(text).findall("link"):
        i = {k: float(v) for k, v in link.find("inertial/inertia").attrib.items()}
        out[link.get("name")] = np.array([[i["ixx"], i["ixy"], i["ixz"]],
                                          [i["ixy"], i["iyy"], i["iyz"]],
                                          [i["ixz"], i["iyz"], i["izz"]]])
    return out


@pytest.mark.parametrize("path", ROBOT_FILES, ids=lambda p: p.stem)
def test_reflected_inertia_urdf_is_valid_for_the_engine(client, tmp_path, path):
    """With rotor inertia: wheel Iyy + J G², body Iyy + 2 J G² (SOURCES.md §1, [derived]).
    Where that breaks the triangle inequality Ixx + Izz ≥ Iyy (required of any rigid body,
    any dynamics text) Ixx and Izz are raised equally, to just above the minimum (≤ 1 % of
    the shortfall extra). The engine must hold exactly the written values (rtol 1e-6)."""
    spec = ideal_robot(path.stem)  # ideal parts: backlash would leave the rotor off the wheels
    fig = spec.figures
    written = urdf_inertias(robot_urdf(spec, with_reflected_inertia=True))
    robot = load(client, spec, tmp_path, with_reflected_inertia=True)
    for link, name, base, added in ((-1, BODY_LINK, fig.body.inertia, 2 * fig.reflected_inertia),
                                    (0, "wheel_left", fig.wheel_inertia, fig.reflected_inertia),
                                    (1, "wheel_right", fig.wheel_inertia, fig.reflected_inertia)):
        inertia = written[name]
        assert inertia[1, 1] == pytest.approx(base[1, 1] + added, rel=1e-12), f"{name} Iyy"
        shortfall = max(0.0, base[1, 1] + added - base[0, 0] - base[2, 2])
        raised_x, raised_z = inertia[0, 0] - base[0, 0], inertia[2, 2] - base[2, 2]
        assert raised_x == pytest.approx(raised_z, rel=1e-9, abs=1e-18), f"{name} raised equally"
        assert shortfall / 2 <= raised_x <= 0.505 * shortfall + 1e-18, f"{name} raise"
        assert inertia[0, 0] + inertia[2, 2] >= inertia[1, 1], f"{name} triangle"
        off_diagonal = ~np.eye(3, dtype=bool)
        np.testing.assert_array_equal(inertia[off_diagonal], base[off_diagonal])
        _, engine, _ = engine_inertia(client, robot, link)
        np.testing.assert_allclose(engine, inertia, rtol=1e-6, atol=1e-6 * np.abs(inertia).max(),
                                   err_msg=f"{name} inertia held by the engine")


# ------------------------------------------------------------------ compound pendulum


def swing_period(spec: RobotSpec, tmp_path: Path, amplitude: float, dt: float = 1e-4,
                 periods: int = 3) -> tuple[float, float]:
    """Hang the body from its axle in pybullet and time its swing by zero crossings.

    Returns (measured period, measured starting angle). The axle is pinned to the world
    at (0, 0, 1) by a point-to-point constraint; the wheels spin freely on the axle.
    """
    fig = spec.figures
    com_x, _, com_z = fig.body.com
    distance = math.hypot(com_x, com_z)
    inertia = fig.body.inertia[1, 1] + fig.body.mass * distance**2
    guess = 2 * math.pi * math.sqrt(inertia / (fig.body.mass * G_N * distance))
    client = pb.connect(pb.DIRECT)
    try:
        pitch = math.pi - math.atan2(com_x, com_z) + amplitude  # com below the axle, + amplitude
        orientation = pb.getQuaternionFromEuler([0.0, pitch, 0.0])
        robot = load(client, spec, tmp_path, orientation=orientation)
        pb.setGravity(0, 0, -G_N, physicsClientId=client)
        pb.setTimeStep(dt, physicsClientId=client)
        for joint in range(pb.getNumJoints(robot, physicsClientId=client)):
            pb.setJointMotorControl2(robot, joint, pb.VELOCITY_CONTROL, force=0,
                                     physicsClientId=client)
        for link in range(-1, pb.getNumJoints(robot, physicsClientId=client)):
            pb.changeDynamics(robot, link, linearDamping=0, angularDamping=0, jointDamping=0,
                              physicsClientId=client)
        info = pb.getDynamicsInfo(robot, -1, physicsClientId=client)
        axle_in_inertial_frame = pb.invertTransform(info[3], info[4])[0]
        pin = pb.createConstraint(robot, -1, -1, -1, pb.JOINT_POINT2POINT, [0, 0, 0],
                                  axle_in_inertial_frame, [0, 0, 1], physicsClientId=client)
        pb.changeConstraint(pin, maxForce=1e6, physicsClientId=client)
        crossings: list[float] = []
        previous = start = None
        for step in range(int((periods + 0.3) * guess / dt)):
            position, _ = pb.getBasePositionAndOrientation(robot, physicsClientId=client)
            angle = math.atan2(position[0], -(position[2] - 1.0))
            if start is None:
                start = angle
            if previous is not None and (previous < 0) != (angle < 0):
                crossings.append((step - 1 + previous / (previous - angle)) * dt)
            previous = angle
            pb.stepSimulation(physicsClientId=client)
    finally:
        pb.disconnect(client)
    assert len(crossings) >= 2 * periods, f"only {len(crossings)} zero crossings"
    half_periods = len(crossings) - 1
    return 2 * (crossings[-1] - crossings[0]) / half_periods, start


@pytest.mark.parametrize(("name", "spec"), ROBOTS, ids=ROBOT_IDS)
def test_hanging_body_swings_with_the_compound_pendulum_period(tmp_path, name, spec):
    """The body hung from its axle and released at 5° swings with the compound-pendulum
    period T = 4 √(I/(m g d)) K(sin²(θ₀/2)), I = I_cm + m d² about the axle
    (SOURCES.md §2: Halliday & Resnick, oscillations chapter [published]; K from
    scipy.special.ellipk, parameter m = k²). Tolerance 0.5 % (SOURCES.md §2)."""
    amplitude = math.radians(5.0)
    fig = spec.figures
    com_x, _, com_z = fig.body.com
    distance = math.hypot(com_x, com_z)
    inertia = fig.body.inertia[1, 1] + fig.body.mass * distance**2
    expected = (4 * math.sqrt(inertia / (fig.body.mass * G_N * distance))
                * ellipk(math.sin(amplitude / 2) ** 2))
    measured, start = swing_period(spec, tmp_path, amplitude)
    assert abs(start) == pytest.approx(amplitude, abs=1e-9), "starting swing angle"
    assert measured == pytest.approx(expected, rel=5e-3), (
        f"{name}: swing period {measured:.6f} s, compound pendulum {expected:.6f} s")


@settings(max_examples=300, deadline=None, derandomize=True)
@given(st.text(alphabet=st.sampled_from(list("ab <>&\"'\n\r\t;#x")), max_size=12) | st.text())
def test_attribute_quoting_is_the_standard_librarys(text):
    """sandbox.urdf.quoteattr is xml.sax.saxutils.quoteattr (the reference), string for
    string."""
    assert quoteattr(text) == saxutils.quoteattr(text)
