"""Mass properties of boxes and cylinders, Steiner's theorem, and combining pieces."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from sandbox.inertia import (
    MassProperties,
    box_inertia,
    combine,
    cylinder_inertia_y,
    parallel_axis,
)

RTOL = 1e-12  # the formulas are exact; only float rounding separates code and hand values


def test_box_inertia_formula():
    """Solid box a×b×c about its centre: Ixx = m(b²+c²)/12, Iyy = m(a²+c²)/12,
    Izz = m(a²+b²)/12 (Meriam & Kraige, Dynamics, appendix table) [published].
    m = 1.2 kg, sides 0.3 × 0.2 × 0.1 m -> 0.005, 0.010, 0.013 kg·m²."""
    inertia = box_inertia(1.2, (0.3, 0.2, 0.1))
    np.testing.assert_allclose(
        inertia, np.diag([0.005, 0.010, 0.013]), rtol=RTOL, atol=0, err_msg="box inertia"
    )


def test_solid_cylinder_inertia_formula():
    """Solid cylinder, axis along y: axial m r²/2, across m(3r² + h²)/12 (Meriam & Kraige,
    Dynamics, appendix table) [published]. m = 2 kg, r = 0.1 m, h = 0.3 m -> 0.01, 0.02."""
    inertia = cylinder_inertia_y(2.0, 0.1, 0.3)
    np.testing.assert_allclose(
        inertia, np.diag([0.02, 0.01, 0.02]), rtol=RTOL, atol=0, err_msg="cylinder inertia"
    )


def test_parallel_axis_offset_along_two_axes_gives_product_term():
    """Steiner: I_P = I_C + m(|d|² E − d dᵀ) (Meriam & Kraige, Dynamics, §B/1) [published].
    m = 2 kg, d = (0.1, 0, 0.2) m from the point to the centre of mass:
    ΔIxx = m dz² = 0.08, ΔIyy = m(dx² + dz²) = 0.10, ΔIzz = m dx² = 0.02,
    ΔIxz = −m dx dz = −0.04 (tensor element, as URDF's ixz)."""
    centre = np.diag([0.01, 0.02, 0.03])
    moved = parallel_axis(centre, 2.0, (0.1, 0.0, 0.2))
    expected = np.array(
        [
            [0.01 + 0.08, 0.0, -0.04],
            [0.0, 0.02 + 0.10, 0.0],
            [-0.04, 0.0, 0.03 + 0.02],
        ]
    )
    np.testing.assert_allclose(moved, expected, rtol=RTOL, atol=1e-15, err_msg="Steiner 3x3")


def test_parallel_axis_of_point_mass_matches_definition():
    """A point mass at r has I = m(|r|² E − r rᵀ), the definition of the inertia tensor
    (any dynamics text, e.g. Meriam & Kraige §7/7) [published]; offsets along all three axes."""
    r = np.array([0.3, -0.2, 0.5])
    mass = 0.7
    x, y, z = r
    by_definition = mass * np.array(
        [
            [y * y + z * z, -x * y, -x * z],
            [-x * y, x * x + z * z, -y * z],
            [-x * z, -y * z, x * x + y * y],
        ]
    )
    np.testing.assert_allclose(
        parallel_axis(np.zeros((3, 3)), mass, r), by_definition, rtol=RTOL, err_msg="point mass"
    )


def test_combine_two_boxes_against_hand_computation():
    """Two boxes combined, worked by hand with the box formula and Steiner's theorem
    (Meriam & Kraige, Dynamics, appendix and §B/1) [published].

    A: m 1 kg, sides 0.2 × 0.1 × 0.1 m at (0, 0, 0).  B: m 3 kg, sides 0.1 × 0.1 × 0.2 m
    at (0.1, 0, 0.2).  Total 4 kg; centre of mass (3·0.1/4, 0, 3·0.2/4) = (0.075, 0, 0.15).
    Offsets from it: dA = (−0.075, 0, −0.15), |dA|² = 0.028125; dB = (0.025, 0, 0.05),
    |dB|² = 0.003125.
    """
    a = MassProperties(1.0, np.zeros(3), box_inertia(1.0, (0.2, 0.1, 0.1)))
    b = MassProperties(3.0, np.array([0.1, 0.0, 0.2]), box_inertia(3.0, (0.1, 0.1, 0.2)))
    combined = combine([a, b])

    # A about its own centre: 1/12·(0.1²+0.1², 0.2²+0.1², 0.2²+0.1²)
    a_own = (0.02 / 12, 0.05 / 12, 0.05 / 12)
    # A moved: m(|d|² − dx², |d|², |d|² − dz²), product −m dx dz
    a_moved = (0.028125 - 0.005625, 0.028125, 0.028125 - 0.0225)
    a_xz = -1.0 * (-0.075) * (-0.15)  # −0.01125
    # B about its own centre: 3/12·(0.1²+0.2², 0.1²+0.2², 0.1²+0.1²)
    b_own = (0.0125, 0.0125, 0.005)
    # B moved: 3·(0.003125 − 0.000625, 0.003125, 0.003125 − 0.0025), product −3·0.025·0.05
    b_moved = (0.0075, 0.009375, 0.001875)
    b_xz = -3.0 * 0.025 * 0.05  # −0.00375
    ixx = a_own[0] + a_moved[0] + b_own[0] + b_moved[0]  # 0.0441667
    iyy = a_own[1] + a_moved[1] + b_own[1] + b_moved[1]  # 0.0541667
    izz = a_own[2] + a_moved[2] + b_own[2] + b_moved[2]  # 0.0166667
    ixz = a_xz + b_xz  # −0.015
    expected = np.array([[ixx, 0.0, ixz], [0.0, iyy, 0.0], [ixz, 0.0, izz]])

    assert combined.mass == pytest.approx(4.0, rel=RTOL), "combined mass"
    np.testing.assert_allclose(combined.com, [0.075, 0.0, 0.15], rtol=RTOL, err_msg="com")
    np.testing.assert_allclose(
        combined.inertia, expected, rtol=1e-12, atol=1e-15, err_msg="combined inertia"
    )
    assert ixz == pytest.approx(-0.015, rel=RTOL)
    assert ixx == pytest.approx(0.0441666666667, rel=1e-10)


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_two_halves_of_a_box_make_the_whole_box(axis):
    """Exact oracle: a box cut in two equal halves along any axis and recombined has the
    whole box's mass, centre and inertia (box formula + Steiner, Meriam & Kraige) [published]."""
    mass, size = 0.9, np.array([0.08, 0.12, 0.22])
    centre = np.array([0.01, -0.02, 0.11])
    half_size = size.copy()
    half_size[axis] /= 2
    shift = np.zeros(3)
    shift[axis] = size[axis] / 4
    halves = [
        MassProperties(mass / 2, centre + sign * shift, box_inertia(mass / 2, half_size))
        for sign in (-1.0, 1.0)
    ]
    whole = combine(halves)
    assert whole.mass == pytest.approx(mass, rel=RTOL), "mass"
    np.testing.assert_allclose(whole.com, centre, rtol=RTOL, err_msg="centre of mass")
    np.testing.assert_allclose(
        whole.inertia, box_inertia(mass, size), rtol=1e-12, atol=1e-18, err_msg="inertia"
    )


def test_combine_single_piece_is_unchanged():
    """One piece combined with nothing is itself (Steiner with zero offset)."""
    piece = MassProperties(0.5, np.array([0.1, 0.2, 0.3]), box_inertia(0.5, (0.1, 0.2, 0.3)))
    result = combine([piece])
    assert result.mass == 0.5
    np.testing.assert_allclose(result.com, piece.com, rtol=RTOL)
    np.testing.assert_allclose(result.inertia, piece.inertia, rtol=RTOL, atol=1e-18)


def test_combine_needs_positive_mass():
    """No pieces (or no mass) is a ValueError, not a division by zero."""
    with pytest.raises(ValueError, match="positive mass"):
        combine([])


positions = st.tuples(*[st.floats(-0.5, 0.5, allow_nan=False)] * 3)
sizes = st.tuples(*[st.floats(1e-3, 0.5, allow_nan=False)] * 3)
masses = st.floats(1e-3, 5.0, allow_nan=False)
pieces = st.lists(st.tuples(masses, sizes, positions), min_size=1, max_size=6)


@settings(max_examples=200, deadline=None, derandomize=True)
@given(pieces)
def test_combined_inertia_is_a_valid_rigid_body_inertia(parts):
    """For any set of boxes: the combined inertia is symmetric positive definite and its
    principal moments satisfy the triangle inequalities I1 + I2 ≥ I3; so do the diagonal
    terms (Ixx + Iyy − Izz = 2∫z² dm ≥ 0) (any rigid-body dynamics text) [published].
    The centre of mass is the mass-weighted average of the pieces' centres."""
    props = [MassProperties(m, np.array(at), box_inertia(m, size)) for m, size, at in parts]
    result = combine(props)
    inertia = result.inertia
    scale = np.abs(inertia).max()
    np.testing.assert_allclose(inertia, inertia.T, rtol=0, atol=1e-14 * scale, err_msg="symmetry")
    moments = np.linalg.eigvalsh(inertia)
    assert moments.min() > 0, f"principal moments {moments} not positive"
    slack = 1e-12 * scale
    for i in range(3):
        j, k = (i + 1) % 3, (i + 2) % 3
        assert moments[j] + moments[k] >= moments[i] - slack, f"principal triangle {moments}"
        assert inertia[j, j] + inertia[k, k] >= inertia[i, i] - slack, "diagonal triangle"
    total = sum(m for m, _, _ in parts)
    weighted = sum(m * np.array(at) for m, _, at in parts) / total
    assert result.mass == pytest.approx(total, rel=1e-12), "mass"
    np.testing.assert_allclose(result.com, weighted, rtol=1e-12, atol=1e-15, err_msg="com")
