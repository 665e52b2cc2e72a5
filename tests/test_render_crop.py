"""The engine renders only the window around what it draws: the same pixels as a full frame.

The window's projection is an off-axis frustum (glFrustum, OpenGL 2.1 reference
pages [memory]); pybullet matrices are column-major 4×4 as
computeProjectionMatrixFOV returns them (float32 values).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from sandbox import render
from sandbox.render.scene import EMPTY_DEPTH, sub_projection
from sandbox.robot import load_robot
from sandbox.runner import RunSettings, run
from sandbox.world import pb

ROOT = Path(__file__).resolve().parents[1]
ROBOT = ROOT / "robots" / "shelf-runner.yaml"
CONTROLLER = ROOT / "controllers" / "cascade.py"
SIZE = (320, 240)
FPS = 10.0


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory) -> Path:
    """A recorded 1.5 s run of shelf-runner (5° start tilt, so it rolls and pitches)."""
    folder = tmp_path_factory.mktemp("crop") / "run"
    settings = RunSettings(controller=str(CONTROLLER), duration=1.5, tilt=math.radians(5.0))
    result = run(load_robot(ROBOT), settings, folder=folder)
    assert result.status == "completed", result.message
    return folder


def test_full_window_is_the_fov_projection_and_a_window_is_the_frustum():
    """For the whole frame sub_projection gives computeProjectionMatrixFOV's 16 values bit for
    bit; for a window it equals glFrustum(l, r, b, t, n, f) built here in double from the
    same field of view and near/far planes, to float32 precision (pybullet's own values are
    float32, so 1e-6 relative)."""
    width, height, near, far = 320, 240, 0.02, 32.0
    full = pb.computeProjectionMatrixFOV(render.FIELD_OF_VIEW_DEG, width / height, near, far)
    assert sub_projection(full, (0, 0, width, height), (width, height)) == list(full)
    c0, r0, c1, r1 = 37, 11, 201, 190
    top = near * math.tan(math.radians(render.FIELD_OF_VIEW_DEG / 2))
    side = top * width / height
    left, right = side * (2 * c0 / width - 1), side * (2 * c1 / width - 1)
    upper, lower = top * (1 - 2 * r0 / height), top * (1 - 2 * r1 / height)
    frustum = np.zeros((4, 4))
    frustum[0, 0], frustum[0, 2] = 2 * near / (right - left), (right + left) / (right - left)
    frustum[1, 1], frustum[1, 2] = 2 * near / (upper - lower), (upper + lower) / (upper - lower)
    frustum[2, 2], frustum[2, 3] = (far + near) / (near - far), 2 * far * near / (near - far)
    frustum[3, 2] = -1.0
    window = np.asarray(sub_projection(full, (c0, r0, c1, r1), (width, height)))
    np.testing.assert_allclose(window.reshape(4, 4).T, frustum, rtol=1e-6, atol=1e-9)


def _compare(renderer, frames) -> list[float]:
    """Each frame rendered cropped and full: assert they agree; the windows' shares of the
    frame."""
    shares = []
    total = SIZE[0] * SIZE[1]
    for i in frames:
        eye, _ = renderer.pose(i)
        window = renderer.engine_window(eye)
        assert window is not None and window[2] > window[0], f"frame {i}: no crop {window}"
        shares.append((window[2] - window[0]) * (window[3] - window[1]) / total)
        full = renderer.render(i, crop=False).astype(int)
        cropped = renderer.render(i, crop=True).astype(int)
        differs = (full != cropped).any(axis=2)
        # The engine works in float32: for the shifted window its edge tests and shading
        # round differently now and then. Measured at 640x480 over 46 frames of each
        # camera: none to one pixel in all, a triangle's edge pixel covered in one and not
        # the other (up to 110 levels) or a shade off by 1. So: a few pixels at most, each
        # on an edge of the full frame (a 4-neighbour of another colour).
        assert differs.sum() <= max(2, 1e-4 * total), f"frame {i}: {differs.sum()} differ"
        padded = np.pad(full, ((1, 1), (1, 1), (0, 0)), mode="edge")
        for row, col in np.argwhere(differs):
            around = padded[[row, row + 2, row + 1, row + 1], [col + 1, col + 1, col, col + 2]]
            assert (around != full[row, col]).any(axis=1).any(), (
                f"frame {i}: pixel {row, col} differs off an edge")
    return shares


@pytest.mark.parametrize("camera", ["side", "follow", "three-quarter"])
def test_cropped_frames_equal_full_frames(run_folder, camera):
    """Several frames of a recorded run, cropped render against full render (the same pixels
    but for the few edge pixels _compare allows), with the window well under the frame."""
    job = render.load_job(run_folder, FPS, SIZE, camera)
    renderer = render.FrameRenderer(job)
    try:
        count = len(job.table)
        shares = _compare(renderer, sorted({0, 3, count // 2, count - 1}))
        assert max(shares) < 0.5, f"windows' shares of the frame {shares}"
    finally:
        renderer.close()


def test_a_step_in_view_is_rendered_too(run_folder):
    """With a step (a box standing on the floor, drawn by the engine) just ahead of the robot,
    the window widens to hold it and cropped frames still equal full frames; the step's
    colour is in the picture."""
    job = render.load_job(run_folder, FPS, SIZE)
    plain = render.FrameRenderer(job)
    stepped = render.FrameRenderer(render.RenderJob(job.robot, {"steps": [[0.12, 0.02, 0.03]]},
                                                    SIZE, job.table))
    try:
        assert len(stepped._static_boxes) == 1, "the step should stay with the engine"
        widths = []
        for renderer in (plain, stepped):
            eye, _ = renderer.pose(0)
            c0, _, c1, _ = renderer.engine_window(eye)
            widths.append(c1 - c0)
        assert widths[1] > widths[0], f"window widths without and with the step {widths}"
        _compare(stepped, [0, len(job.table) - 1])
        frame = stepped.render(0)
        assert len({tuple(p) for p in frame[:, :, :3].reshape(-1, 3)}) > 10
    finally:
        plain.close()
        stepped.close()


def test_outside_the_window_is_left_as_the_engine_leaves_empty_pixels(run_folder):
    """The engine's empty pixel is opaque white at depth EMPTY_DEPTH (measured on a full frame's
    corner, above the horizon)."""
    job = render.load_job(run_folder, FPS, SIZE)
    renderer = render.FrameRenderer(job)
    try:
        _, view = renderer.pose(0)
        _, _, rgba, depth, _ = pb.getCameraImage(*SIZE, view, renderer.projection,
                                                 renderer=pb.ER_TINY_RENDERER,
                                                 physicsClientId=renderer.client)
        assert tuple(np.reshape(rgba, (SIZE[1], SIZE[0], 4))[0, 0]) == (255, 255, 255, 255)
        assert np.float32(np.reshape(depth, (SIZE[1], SIZE[0]))[0, 0]) == EMPTY_DEPTH
    finally:
        renderer.close()


def _old_blend(region: np.ndarray, mask: np.ndarray, colour, alpha: float) -> None:
    """The masked integer blend annotate used before its lookup table, kept for comparison."""
    weight = int(round(alpha * 256))
    under = region[mask].astype(np.uint16)
    over = np.asarray(colour, np.float64).round().astype(np.uint16) * weight
    region[mask] = ((under * (256 - weight) + over) >> 8).astype(np.uint8)


@pytest.mark.parametrize("alpha", [0.25, 0.5, 0.9])
def test_translucent_fill_gives_the_old_blend_bit_for_bit(alpha):
    """fill_polygon's table-driven blend writes the bytes of the masked integer blend, on a
    random picture (every byte value present) and a polygon cut by the frame's edge."""
    from sandbox.render.annotate import fill_polygon

    rng = np.random.default_rng(5)
    frame = rng.integers(0, 256, (120, 160, 3), dtype=np.uint8)
    expected = frame.copy()
    corners = np.array([[-10.0, 20.3], [90.7, 5.2], [140.1, 99.9], [30.4, 130.0]])
    colour = (183.4, 92.6, 40.1)
    fill_polygon(frame, corners, colour, alpha)
    # the old path: the same window and mask, blended pixel by pixel
    probe = np.zeros((120, 160, 3), np.uint8)
    fill_polygon(probe, corners, (255, 255, 255), 1.0)
    mask = probe[:, :, 0] == 255
    _old_blend(expected, mask, colour, alpha)
    assert mask.sum() > 1000
    np.testing.assert_array_equal(frame, expected)
