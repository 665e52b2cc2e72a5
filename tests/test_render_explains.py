"""A video that explains itself: labelled overlay, lower-case units, the parts visible
through the frame, forward marked, pushes drawn as arrows at their point of application,
and a choice of camera.

Projections are checked with pybullet's own view and projection matrices in OpenGL's
conventions (gluLookAt / gluPerspective, column-major 4×4) [memory]; the push height is
DESIGN.md's default (90 % of the way up the frame).
"""

from __future__ import annotations

from pathlib import Path

import imageio.v2 as imageio
import numpy as np
import pytest
import yaml
from typer.testing import CliRunner

from sandbox import render
from sandbox.cli import app
from sandbox.events import builtin_tests
from sandbox.render.annotate import PUSH_COLOUR, project
from sandbox.render.overlay import draw_text, glyph, unit_text
from sandbox.robot import FRAME_COLOUR, load_robot
from sandbox.runner import RunSettings
from sandbox.session import run_once

ROOT = Path(__file__).resolve().parents[1]
ROBOT = ROOT / "robots" / "shelf-runner.yaml"
CONTROLLER = ROOT / "controllers" / "cascade.py"
SIZE = (320, 240)
FPS = 10.0
FORWARD_AT, BACKWARD_AT = 0.5, 1.2


@pytest.fixture(scope="module")
def push_run(tmp_path_factory) -> Path:
    """1.6 s of shelf-runner: a shove forward at 0.5 s and one backward at 1.2 s."""
    spec = load_robot(ROBOT)
    impulse = builtin_tests(spec)["push"].events[0].push.impulse
    folder = tmp_path_factory.mktemp("explain")
    test = folder / "two-pushes.yaml"
    test.write_text(yaml.safe_dump({
        "name": "two-pushes", "duration": 1.6,
        "events": [{"at": FORWARD_AT, "push": {"impulse": impulse}},
                   {"at": BACKWARD_AT, "push": {"impulse": impulse, "direction": "backward"}}],
        "criteria": {"recover_within": 1.5}}), encoding="utf-8")
    settings = RunSettings(controller=str(CONTROLLER))
    result = run_once(spec, settings, test=str(test), folder=folder / "run", plots=False)
    assert result.status == "completed", result.message
    return folder / "run"


@pytest.fixture(scope="module")
def frames(push_run) -> list[np.ndarray]:
    video = render.render_run(push_run, fps=FPS, size=SIZE, workers=1)
    with imageio.get_reader(video) as reader:
        return [np.asarray(frame).astype(int) for frame in reader]


def _matrix(values) -> np.ndarray:
    return np.asarray(values, dtype=float).reshape(4, 4).T


def _pixel_of(renderer, point) -> tuple[int, int]:
    """(column, row) of a world point in the renderer's current view, by pybullet's matrices."""
    eye, view = renderer.pose(renderer.frame)
    clip = _matrix(renderer.projection) @ _matrix(view) @ np.append(point, 1.0)
    x, y = clip[:2] / clip[3]
    return round((x + 1) / 2 * SIZE[0] - 0.5), round((1 - y) / 2 * SIZE[1] - 0.5)


def _push_point(renderer, i: int) -> tuple[int, int]:
    """Where a default push lands at frame i: 90 % up the frame, on the body's z axis."""
    renderer.frame = i
    renderer.pose(i)
    state = renderer.world.body_state()
    frame = load_robot(ROBOT).body.frame
    height = frame.bottom + 0.9 * frame.height
    rotation = np.asarray(state.rotation).reshape(3, 3)
    return _pixel_of(renderer, np.asarray(state.axle) + rotation @ np.array([0, 0, height]))


def _is_push_colour(rgb) -> bool:
    r, g, b = (int(v) for v in rgb)
    return r > 170 and b > 130 and g < 110


def test_push_arrow_is_drawn_at_the_point_of_application(push_run, frames):
    """On the frames of each push the push colour sits at the projected point of
    application, the arrow's shaft comes from the side the push came from; before the
    first push and after both arrows have gone, that point is not push-coloured."""
    job = render.load_job(push_run, FPS, SIZE)
    renderer = render.FrameRenderer(job)
    try:
        t = job.table.t
        for at, sign in ((FORWARD_AT, -1), (BACKWARD_AT, +1)):
            shown = [i for i in range(len(t)) if at - 1e-9 <= t[i] < at + 0.55]
            assert len(shown) >= 5, f"frames showing the push at {at} s"
            for i in shown:
                col, row = _push_point(renderer, i)
                patch = frames[i][row - 1:row + 2, col - 1:col + 2].reshape(-1, 3).mean(axis=0)
                assert _is_push_colour(patch), f"push colour at ({col}, {row}), t = {t[i]:.1f} s"
                # side view: forward is to the right, so a forward push's shaft is to the left
                behind = frames[i][row, col + sign * 12]
                ahead = frames[i][row, col - sign * 12]
                assert _is_push_colour(behind), f"shaft on the push's side at t = {t[i]:.1f} s"
                assert not _is_push_colour(ahead), f"arrow on the wrong side at t = {t[i]:.1f} s"
        for i in (0, 3, len(t) - 1):  # 0 and 0.3 s: before; 1.6 s: 0.4 s after the last
            if t[i] >= BACKWARD_AT and t[i] < BACKWARD_AT + 0.6:
                continue
            col, row = _push_point(renderer, i)
            assert not _is_push_colour(frames[i][row, col]), f"push colour at t = {t[i]:.1f} s"
        assert PUSH_COLOUR[0] > 170 and PUSH_COLOUR[2] > 130 and PUSH_COLOUR[1] < 110
    finally:
        renderer.close()


def test_parts_show_through_the_frame_and_forward_is_marked(push_run, frames):
    """The battery (a part inside the frame) shows its own colour at its projected centre;
    a green arrow on the floor points forward (to the right in the side view)."""
    spec = load_robot(ROBOT)
    battery = next(b for b in spec.figures.boxes if b.name == "battery")
    colour = np.array([int(battery.colour[k:k + 2], 16) for k in (1, 3, 5)])
    job = render.load_job(push_run, FPS, SIZE)
    renderer = render.FrameRenderer(job)
    try:
        renderer.frame = 2
        renderer.pose(2)
        state = renderer.world.body_state()
        rotation = np.asarray(state.rotation).reshape(3, 3)
        col, row = _pixel_of(renderer, np.asarray(state.axle) + rotation @ np.asarray(battery.at))
        seen = frames[2][row - 1:row + 2, col - 1:col + 2].reshape(-1, 3).mean(axis=0)
        # shading darkens it and the translucent frame greys it, but the hue is the part's:
        # the blue share of the pixel is near the battery's, far above the grey frame's
        frame = np.array([int(FRAME_COLOUR[k:k + 2], 16) for k in (1, 3, 5)])
        share = lambda rgb: rgb[2] / rgb.sum()  # noqa: E731
        assert share(seen) > 0.5 * (share(colour) + share(frame)), \
            f"battery colour {colour} seen as {seen} (frame {frame})"
        axle_col, _ = _pixel_of(renderer, np.asarray(state.axle))
        low = frames[2][SIZE[1] // 2:]
        green = (low[:, :, 1] > 120) & (low[:, :, 0] < 90) & (low[:, :, 2] < 120)
        columns = np.flatnonzero(green.any(axis=0))
        assert columns.size and columns.min() > axle_col, "forward arrow right of the axle"
    finally:
        renderer.close()


def test_overlay_labels_and_units_in_their_case():
    """Labels name each gauge with its scale; 's' is not drawn as 'S'; N*s shows as N·s."""
    layout = render.OverlayLayout.for_size(640, 480)
    texts = [text for text, _ in layout.labels]
    assert texts == ["time", "tilt, bar ±30°", "left ±1", "right ±1"]
    assert layout.strip > layout.label_top > 0
    assert not np.array_equal(glyph("s", 1), glyph("S", 1)), "lower case has its own glyphs"
    assert unit_text("push 0.06 N*s") == "push 0.06 N·s"
    frame = np.zeros((9, 40, 3), np.uint8)
    draw_text(frame, "N·s", 0, 1, 1, (255, 255, 255))
    dot = frame[1:8, 6:12, 0]
    assert dot.sum() == 255 and dot[3, 2] == 255, "a single centred dot between N and s"


def test_push_marks_pair_marks_with_their_events():
    """Each push mark takes the push event with its label (direction, height), in order."""
    definition = {"events": [
        {"at": 1.0, "push": {"impulse": 0.05, "direction": "left"}},
        {"at_position": 0.3, "push": {"force": 2.0, "duration": 0.8, "height": 0.1}},
        {"at": 2.0, "payload": {"mass": 0.1}},
    ]}
    marks = [[1.0, "push 0.05 N*s"], [1.7, "push 2 N for 0.8 s"], [2.0, "payload 100 g"],
             [3.0, "push 9 N*s"], ["x", "push"]]
    pushes = render.push_marks(marks, definition, 0.2)
    assert [(p.t, p.direction, p.height) for p in pushes] == [
        (1.0, "left", 0.2), (1.7, "forward", 0.1), (3.0, "forward", 0.2)]
    assert pushes[1].show_s == 0.8, "a held push stays drawn while it pushes"


def test_cameras_look_from_where_they_say():
    """Side looks along +y (forward to the right), front along -x, three-quarter from ahead
    and to the right and higher, follow from behind the heading."""
    side = render.Camera.named("side", 1.0)
    np.testing.assert_allclose(side.right, [1, 0, 0], atol=1e-12)
    front = render.Camera.named("front", 1.0)
    assert front.forward[0] < -0.9
    three = render.Camera.named("three-quarter", 1.0)
    assert three.offset[0] > 0 and three.offset[1] < 0
    assert three.offset[2] > side.offset[2]
    follow = render.Camera.named("follow", 1.0, heading_deg=90.0)
    assert follow.forward[1] > 0.9, "behind a robot heading +y, looking along +y"
    pixels, ahead = project([[0.0, 0.0, 0.0], [0.1, 0.0, 0.0]], side.offset, side, SIZE)
    assert ahead.all() and pixels[1, 0] > pixels[0, 0], "+x is to the right in the side view"


def test_camera_option_renders_and_refuses_unknown_names(push_run, tmp_path):
    """`render --camera front` writes a video; an unknown camera is exit 2, one line."""
    runner = CliRunner()
    bad = runner.invoke(app, ["render", str(push_run), "--camera", "top"])
    assert bad.exit_code == 2 and "side, front, three-quarter, follow" in bad.output
    assert "Traceback" not in bad.output
    job = render.load_job(push_run, FPS, (160, 128), "follow")
    assert job.camera == "follow"
    renderer = render.FrameRenderer(job)
    try:
        frame = renderer.render(len(job.table) // 2)
        assert frame.shape == (128, 160, 4)
    finally:
        renderer.close()
