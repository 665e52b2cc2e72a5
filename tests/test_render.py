"""Video rendering: frame rule, size and rate of the file, robot and overlay in the picture,
the painted floor's geometry against pybullet's own camera, and parallel workers.

Rendering is not physics; the geometric checks use the pinhole camera model in
OpenGL's conventions (gluLookAt / gluPerspective, column-major 4×4 matrices, as
pybullet's computeViewMatrix / computeProjectionMatrixFOV return them) [memory].
"""

from __future__ import annotations

import json
import math
import multiprocessing
from pathlib import Path

import imageio.v2 as imageio
import imageio_ffmpeg
import numpy as np
import pytest

from sandbox import render
from sandbox.record import read_trace
from sandbox.robot import load_robot
from sandbox.runner import RunSettings, run
from sandbox.world import pb

ROOT = Path(__file__).resolve().parents[1]
ROBOT = ROOT / "robots" / "shelf-runner.yaml"
CONTROLLER = ROOT / "controllers" / "cascade.py"
SIZE = (160, 128)
FPS = 10.0
MARK = (0.5, "push 0.05 N*s")


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory) -> Path:
    """A recorded 1.2 s run (3° start tilt) with one disturbance mark added to its summary."""
    folder = tmp_path_factory.mktemp("render") / "run"
    settings = RunSettings(controller=str(CONTROLLER), duration=1.2, tilt=math.radians(3.0))
    result = run(load_robot(ROBOT), settings, folder=folder)
    assert result.status == "completed", result.message
    summary = json.loads((folder / "summary.json").read_text())
    summary["marks"] = [list(MARK)]
    (folder / "summary.json").write_text(json.dumps(summary))
    return folder


@pytest.fixture(scope="module")
def video(run_folder) -> Path:
    """The run rendered by one worker at 160×128, 10 frames/s."""
    return render.render_run(run_folder, fps=FPS, size=SIZE, workers=1)


@pytest.fixture(scope="module")
def frames(video) -> list[np.ndarray]:
    with imageio.get_reader(video) as reader:
        return [np.asarray(frame) for frame in reader]


def expected_frames(folder: Path, fps: float) -> int:
    t = read_trace(folder / "trace.csv")["t_s"]
    return math.floor((t[-1] - t[0]) * fps + 1e-9) + 1


# ------------------------------------------------------------------ the file


def test_video_has_the_frame_count_size_and_rate(run_folder, video):
    """floor(duration · fps) + 1 frames of exactly the asked size, at the asked rate."""
    assert video == run_folder / "video.mp4" and video.is_file()
    count, _ = imageio_ffmpeg.count_frames_and_secs(str(video))
    assert count == expected_frames(run_folder, FPS) == 13, "frame count"
    with imageio.get_reader(video) as reader:
        meta = reader.get_meta_data()
    assert tuple(meta["size"]) == SIZE, "frame size (width, height) px"
    assert meta["fps"] == pytest.approx(FPS, rel=1e-6), "frame rate"
    assert not list(run_folder.glob(".video-*")), "scratch files left behind"


def test_frame_shows_the_robot_at_the_centre(frames):
    """The camera aims just above the axle: the wheel (dark) is in the middle column, a
    little below the picture's centre, floor around."""
    frame = frames[len(frames) // 2].astype(float)
    height, width = frame.shape[:2]
    column = frame[height // 2:3 * height // 4, width // 2 - 3:width // 2 + 4].mean(axis=2)
    floor = frame[-10:, :20].mean(axis=2)
    assert column.min() < 90, f"no dark wheel pixels below the centre (min {column.min()})"
    assert floor.mean() > 140, f"the floor corner is not light (mean {floor.mean():.0f})"


def test_overlay_strip_is_drawn(frames):
    """A dark strip with light text across the top, where the scene would show white sky."""
    strip = render.OverlayLayout.for_size(*SIZE).strip
    top = frames[0][:strip].astype(float).mean(axis=2)
    assert np.median(top) < 70, f"strip background not dark (median {np.median(top):.0f})"
    assert (top > 180).sum() > 40, "no text in the strip"
    below = frames[0][strip + 2:strip + 6, :].astype(float).mean()
    assert below > 200, "the sky under the strip should stay white (no disturbance yet)"


def test_disturbance_mark_shows_a_band(frames):
    """At the mark (0.5 s) an orange band appears under the strip; a second earlier it is absent."""
    strip = render.OverlayLayout.for_size(*SIZE).strip
    at_mark = frames[round((MARK[0] + 0.1) * FPS)][strip + 1:2 * strip - 1].astype(float)
    before = frames[round((MARK[0] - 0.3) * FPS)][strip + 1:2 * strip - 1].astype(float)
    r, g, b = (np.median(at_mark[:, :, k]) for k in range(3))
    assert r > 200 and b < 100 and r - b > 120, f"band colour (r, g, b) = {(r, g, b)}"
    assert np.median(before[:, :, 2]) > 200, "band present before the mark"


def test_size_not_divisible_by_16_is_refused(run_folder):
    """H.264 macroblocks: sizes must be multiples of 16; the message names the size and 16."""
    with pytest.raises(ValueError, match="170x128.*16"):
        render.render_run(run_folder, fps=FPS, size=(170, 128), workers=1)
    with pytest.raises(ValueError, match="whole numbers"):
        render.check_size((160.5, 128))


def test_two_workers_give_the_same_video_shape(run_folder, video, tmp_path):
    """Two worker processes: same frame count and size; progress reaches total, in order."""
    count_one, _ = imageio_ffmpeg.count_frames_and_secs(str(video))
    copy = tmp_path / "run"
    copy.mkdir()
    for name in ("trace.csv", "robot.yaml", "run.yaml", "summary.json"):
        (copy / name).write_bytes((run_folder / name).read_bytes())
    seen: list[tuple[int, int]] = []
    out = render.render_run(copy, fps=FPS, size=SIZE, workers=2,
                            progress=lambda done, total: seen.append((done, total)))
    count_two, _ = imageio_ffmpeg.count_frames_and_secs(str(out))
    assert count_two == count_one, "frame count with 2 workers"
    with imageio.get_reader(out) as reader:
        assert tuple(reader.get_meta_data()["size"]) == SIZE
    assert [d for d, _ in seen] == list(range(1, count_one + 1)), "progress counts"
    assert {t for _, t in seen} == {count_one}, "progress total"


@pytest.mark.skipif(render._context().get_start_method() != "fork",
                    reason="the failure is planted by patching this process, which forked "
                           "workers inherit")
def test_a_failing_worker_fails_the_render_cleanly(run_folder, tmp_path, monkeypatch):
    """A frame that cannot be rendered ends the render with RenderError naming the cause;
    no video and no scratch files are left, and no worker is left running."""
    copy = tmp_path / "run"
    copy.mkdir()
    for name in ("trace.csv", "robot.yaml", "run.yaml", "summary.json"):
        (copy / name).write_bytes((run_folder / name).read_bytes())
    original = render.FrameRenderer.render

    def render_or_fail(self, i, out=None):
        if i == 10:
            raise RuntimeError("planted failure at frame 10")
        return original(self, i, out)

    monkeypatch.setattr(render.FrameRenderer, "render", render_or_fail)
    with pytest.raises(render.RenderError, match="planted failure at frame 10"):
        render.render_run(copy, fps=FPS, size=SIZE, workers=2)
    assert not (copy / "video.mp4").exists()
    assert not list(copy.glob(".video-*")), "scratch files left behind"
    assert not multiprocessing.active_children(), "a worker is still running"


def test_bad_arguments_are_refused(run_folder, tmp_path):
    """workers < 1, fps <= 0 and a folder without a run are plain errors."""
    with pytest.raises(ValueError, match="workers"):
        render.render_run(run_folder, fps=FPS, size=SIZE, workers=0)
    with pytest.raises(ValueError, match="fps"):
        render.render_run(run_folder, fps=0, size=SIZE, workers=1)
    with pytest.raises(render.RenderError, match="trace.csv"):
        render.render_run(tmp_path, fps=FPS, size=SIZE, workers=1)


# ------------------------------------------------------------------ pure parts


def test_frame_rule():
    """Frames at t0 + k/fps up to the last row: 4.0 s at 30/s is 121, 3.995 s is 120."""
    assert len(render.frame_times(0.0, 4.0, 30)) == 121
    assert len(render.frame_times(0.0, 3.995, 30)) == 120
    assert len(render.frame_times(2.0, 2.0, 30)) == 1
    np.testing.assert_allclose(render.frame_times(1.0, 2.0, 4), [1.0, 1.25, 1.5, 1.75, 2.0])


def _trace(t, quaternions) -> dict[str, np.ndarray]:
    n = len(t)
    columns = {"t_s": np.asarray(t, float), "pitch_rad": np.linspace(0, 0.2, n),
               "duty_l": np.arange(n) / 10, "duty_r": -np.arange(n) / 10,
               "pose_x_m": np.linspace(0, 1, n), "pose_y_m": np.zeros(n),
               "pose_z_m": np.full(n, 0.1), "wheel_l_rad": np.linspace(0, 2, n),
               "wheel_r_rad": np.linspace(0, 3, n)}
    for k, name in enumerate(("pose_qx", "pose_qy", "pose_qz", "pose_qw")):
        columns[name] = np.asarray(quaternions)[:, k]
    return columns


def test_frame_table_interpolates_and_holds():
    """Positions and angles linear between rows; duties held from the row at or before the frame;
    quaternions q and -q (the same turn) do not average to nothing."""
    half = math.sqrt(0.5)
    quaternions = [[0, 0, 0, 1], [0, -half, 0, -half], [0, 0, 0, 1]]  # 0°, 90° (sign flipped), 0°
    table = render.frame_table(_trace([0.0, 1.0, 2.0], quaternions), fps=4)
    assert len(table) == 9
    np.testing.assert_allclose(table.com[:, 0], np.linspace(0, 1, 9), atol=1e-12)
    np.testing.assert_allclose(table.wheels[4], [1.0, 1.5], atol=1e-12)
    np.testing.assert_allclose(table.duty[:, 0], [0, 0, 0, 0, 0.1, 0.1, 0.1, 0.1, 0.2])
    np.testing.assert_allclose(np.linalg.norm(table.quaternion, axis=1), 1.0, atol=1e-12)
    # halfway from 0° to 90° about y: 45°, up to the sign
    angle = 2 * math.degrees(math.acos(min(1.0, abs(table.quaternion[2, 3]))))
    assert angle == pytest.approx(45.0, abs=1.0), "interpolated turn (deg)"


def test_marks_are_shown_for_a_while():
    """A mark is on show from its time for MARK_SHOW_S; the latest one wins; junk is skipped."""
    t = np.array([0.0, 0.4, 0.5, 0.9, 1.2, 1.6, 3.0])
    labels, mark, age = render._marks_on_show(t, [[1.5, "b"], [0.5, "a"], ["x", "junk"]])
    assert labels == ("a", "b")
    assert list(mark) == [-1, -1, 0, 0, 0, 1, -1]
    np.testing.assert_allclose(age[[2, 3, 5]], [0.0, 0.4, 0.1], atol=1e-12)


def test_text_and_bars_draw_where_asked():
    """Glyphs land inside their box in the asked colour; a bar fills from its middle."""
    frame = np.zeros((20, 60, 3), np.uint8)
    render.draw_text(frame, "1.5", 2, 3, 1, (255, 0, 0))
    lit = np.argwhere(frame[:, :, 0] == 255)
    assert lit.size and lit[:, 0].min() >= 3 and lit[:, 0].max() < 10 and lit[:, 1].max() < 20
    render.draw_bar(frame, (20, 40), 12, 4, 0.5, (0, 255, 0))
    filled = np.flatnonzero(frame[13, :, 1] == 255)
    assert filled.min() >= 30 and filled.max() == 35, f"bar fill columns {filled}"


# ------------------------------------------------------------------ geometry


def _matrix(values) -> np.ndarray:
    return np.asarray(values, dtype=float).reshape(4, 4).T  # OpenGL order is column-major


def test_camera_rays_match_pybullet_projection():
    """Each pixel's ray, projected with pybullet's view and projection matrices, lands on that
    pixel's centre (pinhole model, OpenGL conventions [memory]); within 1e-3 px."""
    width, height = 64, 48
    camera = render.Camera.beside(0.9)
    target = np.array([0.3, 0.0, 0.034])
    eye = target + camera.offset
    view = _matrix(pb.computeViewMatrix(eye, target, (0, 0, 1)))
    projection = _matrix(pb.computeProjectionMatrixFOV(render.FIELD_OF_VIEW_DEG,
                                                       width / height, 0.02, 40.0))
    rays = camera.rays(width, height)
    for row, col in [(0, 0), (5, 40), (24, 32), (47, 63), (30, 3)]:
        point = np.append(eye + 2.0 * rays[row, col], 1.0)
        clip = projection @ view @ point
        x, y = clip[:2] / clip[3]
        assert (x + 1) / 2 * width - 0.5 == pytest.approx(col, abs=1e-3), "column (px)"
        assert (1 - y) / 2 * height - 0.5 == pytest.approx(row, abs=1e-3), "row (px)"


@pytest.mark.parametrize("slope_deg", [0.0, 8.0])
def test_painter_floor_points_lie_on_the_pixel_rays(slope_deg):
    """The floor point the painter finds for a pixel (floor coordinates eye·axis + h · rate)
    lies on that pixel's ray, in front of the eye (ray–plane intersection [memory]); within
    1 µm per metre of range (the painter keeps its per-pixel rates in float32)."""
    rotation = np.array(pb.getMatrixFromQuaternion(
        pb.getQuaternionFromEuler([0, -math.radians(slope_deg), 0]))).reshape(3, 3)
    camera = render.Camera.beside(0.9)
    size = (64, 48)
    painter = render.FloorPainter(size, camera, rotation, [], square=0.1)
    rays = camera.rays(*size)[painter.first_row:]
    eye = np.array([0.4, -0.9, 0.2])
    h = eye @ painter.normal
    checked = 0
    for row, col in np.argwhere(painter.hits)[::97]:
        along = eye @ painter.along_axis + h * painter.along_rate[row, col]
        across = eye @ painter.across_axis + h * painter.across_rate[row, col]
        point = along * painter.along_axis + across * painter.across_axis  # on the plane
        offset, ray = point - eye, rays[row, col]
        assert offset @ ray > 0, "floor point behind the eye"
        miss = np.linalg.norm(np.cross(offset, ray)) / np.linalg.norm(ray)
        assert miss < 1e-6 * np.linalg.norm(offset), "distance from the pixel's ray (m)"
        checked += 1
    assert checked >= 5


def test_painter_fills_only_empty_pixels_below_the_horizon():
    """Empty (white, far) pixels that see the floor get its two checker tones; pixels with
    something drawn (nearer depth) and pixels above the horizon are left alone."""
    size = (64, 48)
    colour = (200.0, 180.0, 160.0)
    piece = render.FloorPiece((-10.0, 10.0), (-5.0, 5.0), colour)
    painter = render.FloorPainter(size, render.Camera.beside(0.9), np.eye(3), [piece], 0.1)
    rgba = np.full((48, 64, 4), 255, np.uint8)
    depth = np.full((48, 64), 0.9999999, np.float32)
    depth[40:, 30:34] = 0.5  # "the robot"
    painter.paint(rgba, depth, np.array([0.0, -0.9, 0.2]))
    assert (rgba[:painter.first_row] == 255).all(), "sky changed"
    assert (rgba[40:, 30:34] == 255).all(), "a drawn pixel was painted over"
    floor = rgba[-6:, :20, :3].reshape(-1, 3)
    tones = {tuple(p) for p in floor}
    assert (200, 180, 160) in tones and len(tones) >= 2, f"checker tones {tones}"
    assert (rgba[:, :, 3] == 255).all(), "alpha changed"


@pytest.mark.parametrize("slope_deg", [0.0, 6.0])
def test_painter_pieces_out_of_sight_change_nothing(slope_deg):
    """Pieces out of sight (first in order: one behind the camera, one off to the side) leave
    the picture as the visible piece alone paints it; on a slope the painter takes its
    general (per-pixel) path."""
    size = (64, 48)
    rotation = np.array(pb.getMatrixFromQuaternion(
        pb.getQuaternionFromEuler([0, -math.radians(slope_deg), 0]))).reshape(3, 3)
    camera = render.Camera.beside(0.9)
    main = render.FloorPiece((-10.0, 40.0), (-5.0, 5.0), (200.0, 180.0, 160.0))
    behind = render.FloorPiece((-30.0, -20.0), (-30.0, -20.0), (90.0, 90.0, 250.0))
    aside = render.FloorPiece((-20.0, -10.0), (-5.0, 5.0), (90.0, 250.0, 90.0))
    depth = np.full((48, 64), 0.9999999, np.float32)
    eye = np.array([0.5, -0.9, 0.25])
    frames = []
    for pieces in ([main], [behind, aside, main]):
        painter = render.FloorPainter(size, camera, rotation, pieces, 0.1)
        assert painter.level == (slope_deg == 0.0), "level fast path"
        rgba = np.full((48, 64, 4), 255, np.uint8)
        painter.paint(rgba, depth, eye)
        frames.append(rgba)
    np.testing.assert_array_equal(frames[0], frames[1])
    assert (frames[0][-8:, :, :3] != 255).any(), "no floor painted"


@pytest.mark.parametrize("slope_deg", [0.0, 5.0])
def test_painted_floor_matches_the_engine_drawn_floor(run_folder, slope_deg):
    """The painted floor's light squares have the colour the tiny renderer gives the world's
    floor box (lit the same way, on a slope too): within 2 of 255 per channel."""
    job = render.load_job(run_folder, FPS, SIZE)
    ground = {"slope_rad": math.radians(slope_deg)}
    renderer = render.FrameRenderer(render.RenderJob(job.robot, ground, SIZE, job.table))
    try:
        _, view = renderer.pose(0)
        client = renderer.client
        for body in getattr(renderer.world, "floor_ids", [renderer.world.ground_id]):
            rgba = pb.getVisualShapeData(body, physicsClientId=client)[0][7]
            pb.changeVisualShape(body, -1, rgbaColor=[*rgba[:3], 1.0], physicsClientId=client)
        image = pb.getCameraImage(*SIZE, view, renderer.projection,
                                  renderer=pb.ER_TINY_RENDERER, physicsClientId=client)[2]
        engine = np.reshape(image, (SIZE[1], SIZE[0], 4))[-4, 4, :3].astype(float)
        painted = np.array(renderer.floor.pieces[0].colour)
        np.testing.assert_allclose(painted, engine, atol=2.0,
                                   err_msg="floor colour (0-255), painted vs engine")
    finally:
        renderer.close()


def test_patches_become_separate_floor_pieces(run_folder):
    """A friction patch from run.yaml is painted in its own colour between its ends."""
    job = render.load_job(run_folder, FPS, SIZE)
    ground = {"friction": 0.9, "patches": [[0.5, 1.5, 0.2]]}
    renderer = render.FrameRenderer(render.RenderJob(job.robot, ground, SIZE, job.table))
    try:
        pieces = renderer.floor.pieces
        spans = [(round(p.along[0], 6), round(p.along[1], 6)) for p in pieces]
        assert (0.5, 1.5) in spans and len(pieces) == 3, f"pieces along the path: {spans}"
        colours = {p.colour for p in pieces}
        assert len(colours) == 2, "the patch should differ in colour from the floor"
        frame = renderer.render(len(job.table) // 2)
        assert frame.shape == (SIZE[1], SIZE[0], 4)
    finally:
        renderer.close()
