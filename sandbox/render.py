"""Video of a recorded run: replay the trace's poses in pybullet's CPU renderer, add an overlay.

The run is not simulated again. Each frame places the body (its centre-of-mass
pose, as the engine reported it) and the wheel angles from ``trace.csv`` in a
scene built by :class:`sandbox.world.World` (robot and floor as in the run),
renders it with the tiny software renderer from beside the robot, paints the
flat floor with a checker (see :class:`FloorPainter`: the engine spends most of
a frame on the floor's few big triangles), draws an overlay strip with numpy
(time, tilt gauge, both duties, disturbance marks) and hands the frame to
ffmpeg (libx264, yuv420p) through imageio-ffmpeg.

Frame rule: frames fall at ``t_first + k / fps`` for ``k = 0 .. floor((t_last -
t_first) * fps)`` (``t_first``/``t_last``: the first and last trace rows), so a
run of duration D gives ``floor(D * fps) + 1`` frames. Poses are interpolated
linearly between rows (quaternions normalised), duties held from the row at or
before the frame.

Workers: the frames are split into as many runs of consecutive frames as there
are workers; each worker process (its own pybullet client) renders its run and
encodes it into its own H.264 segment, every segment starting on a key frame;
the parent joins the segments in order into ``video.mp4`` without re-encoding
and reports progress as workers finish frames. Encoding in the workers keeps
whole frames off inter-process pipes. One worker renders in the calling
process. Workers are forked on Linux (they start at once, with everything
imported), spawned elsewhere.
"""

from __future__ import annotations

import json
import math
import multiprocessing
import os
import queue
import shutil
import subprocess
import sys
import tempfile
import threading
import traceback
from collections.abc import Callable
from dataclasses import dataclass
from fractions import Fraction
from functools import cache
from pathlib import Path

import numpy as np
import yaml

from .record import read_trace
from .robot import robot_from_dict
from .world import World, ground_from_record, pb, quiet

VIDEO_NAME = "video.mp4"
MACRO_BLOCK = 16  # px: H.264 macroblock; both sides must be a multiple
FIELD_OF_VIEW_DEG = 40.0  # vertical
CAMERA_DISTANCE_PER_HEIGHT = 4.2  # camera distance / robot height above the axle
CAMERA_ELEVATION_DEG = 10.0  # the camera looks down at the axle by this much
CHECKER_PER_HEIGHT = 0.45  # floor checker square / robot height, rounded to 1-2-5 steps
CHECKER_CONTRAST = 0.12  # dark squares are this much darker
FLOOR_FADE_SQUARES = 30  # the checker fades out over this many squares' distance
BACKGROUND_DEPTH = 0.99999  # tiny renderer depth of empty pixels (it clears to just under 1)
GRAZING = 1e-3  # rays that drop less than this per unit length count as missing the floor
TILT_GAUGE_DEG = 30.0  # the tilt bar's full scale, either way
TILT_TICKS = tuple(d / TILT_GAUGE_DEG for d in (-20, -10, 10, 20))  # marks every 10°
MARK_SHOW_S = 1.0  # how long a disturbance label stays up
MARK_FLASH_S = 0.25  # how long the frame border flashes after a disturbance
# x264's fastest preset: at 640×480 it costs about a fifth of a frame's rendering, which
# two workers on two cores must share (slower presets cut the two-worker speed-up).
ENCODER_OPTIONS = ["-preset", "ultrafast", "-crf", "23", "-threads", "1"]

STRIP_COLOUR = (28, 30, 36)
GAUGE_BACK = (70, 72, 82)
TEXT_COLOUR = (235, 235, 235)
CENTRE_LINE = (200, 200, 200)
OK_COLOUR, WARN_COLOUR, BAD_COLOUR = (80, 200, 120), (240, 180, 40), (230, 60, 50)
DUTY_COLOUR = (90, 160, 240)
MARK_COLOUR = (245, 150, 40)
MARK_TEXT = (20, 20, 20)


class RenderError(RuntimeError):
    """The video could not be made (missing run files, encoder failure)."""


# --------------------------------------------------------------------- inputs


def check_size(size: tuple[int, int]) -> tuple[int, int]:
    """(width, height) in px, each a positive multiple of 16; else ValueError."""
    try:
        width, height = (int(v) for v in size)
    except (TypeError, ValueError):
        raise ValueError(f"video size must be two whole numbers (width, height), got {size!r}"
                         ) from None
    if (width, height) != tuple(size) or width <= 0 or height <= 0:
        raise ValueError(f"video size must be two positive whole numbers, got {size!r}")
    if width % MACRO_BLOCK or height % MACRO_BLOCK:
        raise ValueError(f"video size {width}x{height} must be divisible by {MACRO_BLOCK} "
                         f"(H.264 macroblocks), e.g. {_round16(width)}x{_round16(height)}")
    return width, height


def _round16(value: int) -> int:
    return max(MACRO_BLOCK, int(round(value / MACRO_BLOCK)) * MACRO_BLOCK)


def frame_times(t_first: float, t_last: float, fps: float) -> np.ndarray:
    """Frame instants (s): ``t_first + k / fps`` for k = 0 .. floor((t_last - t_first) · fps)."""
    if not (fps > 0 and math.isfinite(fps)):
        raise ValueError(f"fps must be a positive number, got {fps!r}")
    span = max(0.0, float(t_last) - float(t_first))
    count = int(math.floor(span * fps + 1e-9)) + 1  # the epsilon keeps 4.0 s at 30 fps at 121
    return float(t_first) + np.arange(count) / fps


@dataclass(frozen=True)
class FrameTable:
    """Everything each frame shows, one row per frame: SI units, angles in rad."""

    t: np.ndarray  # (n,) s
    com: np.ndarray  # (n, 3) body centre of mass, world m (the engine's base position)
    quaternion: np.ndarray  # (n, 4) x, y, z, w (the engine's base orientation)
    wheels: np.ndarray  # (n, 2) left, right wheel angle relative to the body
    pitch: np.ndarray  # (n,) true pitch
    duty: np.ndarray  # (n, 2) left, right duty
    mark: np.ndarray  # (n,) index into labels of the mark on show, -1 for none
    mark_age: np.ndarray  # (n,) s since that mark fired
    labels: tuple[str, ...]

    def __len__(self) -> int:
        return len(self.t)


POSE = ("pose_x_m", "pose_y_m", "pose_z_m", "pose_qx", "pose_qy", "pose_qz", "pose_qw")
WHEELS = ("wheel_l_rad", "wheel_r_rad")


def frame_table(trace: dict[str, np.ndarray], fps: float,
                marks: list | tuple = ()) -> FrameTable:
    """Sample a trace (as ``read_trace`` gives it) at the frame instants."""
    needed = ("t_s", "pitch_rad", "duty_l", "duty_r") + POSE + WHEELS
    missing = [c for c in needed if c not in trace]
    if missing:
        raise ValueError(f"the trace has no {', '.join(missing)} column(s): cannot replay it")
    # rows without a full pose (none in a normal run) cannot be shown: skip them
    finite = np.all([np.isfinite(np.asarray(trace[c], dtype=float)) for c in needed], axis=0)
    trace = {c: np.asarray(trace[c], dtype=float)[finite] for c in needed}
    t_s = trace["t_s"]
    if t_s.size == 0:
        raise ValueError("the trace has no rows with a pose: nothing to render")
    t = frame_times(t_s[0], t_s[-1], fps)
    quaternion = np.column_stack([trace[c] for c in POSE[3:]]).astype(float)
    # q and -q are the same turn; make neighbours agree so interpolation takes the short way
    agree = np.einsum("ij,ij->i", quaternion[1:], quaternion[:-1]) >= 0
    quaternion[1:] *= np.cumprod(np.where(agree, 1.0, -1.0))[:, None]
    quaternion = np.column_stack([np.interp(t, t_s, q) for q in quaternion.T])
    quaternion /= np.linalg.norm(quaternion, axis=1, keepdims=True)
    held = np.clip(np.searchsorted(t_s, t + 1e-9, side="right") - 1, 0, t_s.size - 1)
    labels, mark, age = _marks_on_show(t, marks)
    return FrameTable(
        t=t,
        com=np.column_stack([np.interp(t, t_s, trace[c]) for c in POSE[:3]]),
        quaternion=quaternion,
        wheels=np.column_stack([np.interp(t, t_s, trace[c]) for c in WHEELS]),
        pitch=np.interp(t, t_s, trace["pitch_rad"]),
        duty=np.column_stack([trace["duty_l"][held], trace["duty_r"][held]]),
        mark=mark, mark_age=age, labels=labels)


def _marks_on_show(t: np.ndarray, marks) -> tuple[tuple[str, ...], np.ndarray, np.ndarray]:
    """The latest mark fired at or before each frame, if under MARK_SHOW_S old."""
    clean = []
    for entry in marks or ():
        try:
            when, label = float(entry[0]), str(entry[1])
        except (TypeError, ValueError, IndexError):
            continue  # a malformed mark should not cost the whole video
        if math.isfinite(when):
            clean.append((when, label))
    clean.sort(key=lambda m: m[0])
    mark = np.full(t.shape, -1, dtype=int)
    age = np.zeros(t.shape)
    if clean:
        times = np.array([m[0] for m in clean])
        latest = np.searchsorted(times, t + 1e-9, side="right") - 1
        age = np.where(latest >= 0, t - times[np.maximum(latest, 0)], 0.0)
        mark = np.where((latest >= 0) & (age < MARK_SHOW_S), latest, -1)
    return tuple(m[1] for m in clean), mark, age


@dataclass(frozen=True)
class RenderJob:
    """One video's inputs, plain data so it can go to worker processes."""

    robot: dict  # the robot description in SI (robot.yaml)
    ground: dict | None  # run.yaml's ``ground`` record, None for the default flat floor
    size: tuple[int, int]
    table: FrameTable


def load_job(folder: Path, fps: float, size: tuple[int, int]) -> RenderJob:
    """Read a run folder's robot.yaml, run.yaml, trace.csv and summary.json."""
    folder = Path(folder)
    for name in ("trace.csv", "robot.yaml"):
        if not (folder / name).is_file():
            raise RenderError(f"{folder}: no {name}; is this a run folder?")
    robot = yaml.safe_load((folder / "robot.yaml").read_text(encoding="utf-8"))
    robot_from_dict(robot, str(folder / "robot.yaml"))  # a bad file fails here, not in workers
    run = {}
    if (folder / "run.yaml").is_file():
        run = yaml.safe_load((folder / "run.yaml").read_text(encoding="utf-8")) or {}
    marks = []
    if (folder / "summary.json").is_file():
        marks = json.loads((folder / "summary.json").read_text(encoding="utf-8")).get("marks")
    table = frame_table(read_trace(folder / "trace.csv"), fps, marks or ())
    return RenderJob(robot=robot, ground=run.get("ground"), size=size, table=table)


# --------------------------------------------------------------------- scene


@dataclass(frozen=True)
class FloorPiece:
    """A flat stretch of floor in floor coordinates (m): along the slope, across it; RGB 0-255."""

    along: tuple[float, float]
    across: tuple[float, float]
    colour: tuple[float, float, float]


@dataclass(frozen=True)
class Camera:
    """A camera at a fixed orientation that moves with the robot: unit vectors, world axes."""

    forward: np.ndarray
    right: np.ndarray
    up: np.ndarray
    offset: np.ndarray  # eye minus the axle centre, m

    @classmethod
    def beside(cls, distance: float) -> Camera:
        """On the robot's -y side, looking along +y and down by CAMERA_ELEVATION_DEG."""
        elevation = math.radians(CAMERA_ELEVATION_DEG)
        offset = np.array([0.0, -math.cos(elevation), math.sin(elevation)]) * distance
        forward = -offset / distance
        right = np.cross(forward, (0.0, 0.0, 1.0))
        right /= np.linalg.norm(right)
        return cls(forward, right, np.cross(right, forward), offset)

    def rays(self, width: int, height: int) -> np.ndarray:
        """(height, width, 3) direction through each pixel's centre (forward component 1)."""
        tan_v = math.tan(math.radians(FIELD_OF_VIEW_DEG / 2))
        tan_h = tan_v * width / height
        across = ((np.arange(width) + 0.5) / width * 2 - 1) * tan_h
        down = (1 - (np.arange(height) + 0.5) / height * 2) * tan_v
        return (self.forward + across[None, :, None] * self.right
                + down[:, None, None] * self.up)


class FloorPainter:
    """Paints the flat floor into a frame's empty pixels, with a checker to show motion.

    The tiny renderer spends most of a frame shading the floor's few large
    triangles (measured at 640×480: about 10 frames/s with the floor, 60
    without). The floor is a plane and the camera only translates, so each
    pixel's ray meets it at ``eye + h · ray / (-n · ray)`` (h the eye's height
    above the plane); the per-pixel ratios are computed once and a frame costs
    about fifteen numpy passes into preallocated buffers (about 1.2 ms at
    640×480). Pixels are handled as packed RGBA words: masked copies and
    strided channel copies are ten times slower. Painted floor never hides
    anything the engine drew (it only fills empty pixels).
    """

    def __init__(self, size: tuple[int, int], camera: Camera, floor_rotation: np.ndarray,
                 pieces: list[FloorPiece], square: float):
        width, height = size
        rays = camera.rays(width, height)
        self.along_axis, self.across_axis, self.normal = floor_rotation.T
        along, across, descent = np.moveaxis(rays @ floor_rotation, 2, 0)  # floor components
        descent = -descent
        hits = descent > GRAZING  # rays this close to level meet the floor beyond any piece
        rows = np.flatnonzero(hits.any(axis=1))
        self.first_row = int(rows[0]) if rows.size else height
        sub = slice(self.first_row, height)
        safe = np.where(hits, descent, 1.0)[sub]
        self.along_rate = (along[sub] / safe).astype(np.float32)
        across = across[sub] / safe
        self.across_rate = across.astype(np.float32)
        # distance to the floor per unit eye height, along each row's middle (for the fade)
        middle = rays[sub, width // 2]
        self.row_range = np.sqrt((middle * middle).sum(axis=1)) / safe[:, width // 2]
        self.hits = hits[sub]
        self.all_hit = bool(self.hits.all())
        # on a level floor (camera upright) the across coordinate depends on the row alone
        self.across_row = across[:, width // 2]
        self.level = bool(np.allclose(across[self.hits], np.broadcast_to(
            self.across_row[:, None], across.shape)[self.hits], rtol=1e-9, atol=1e-12))
        self.row_along_low = np.where(self.hits, self.along_rate, np.inf).min(axis=1)
        self.row_along_high = np.where(self.hits, self.along_rate, -np.inf).max(axis=1)
        self.along_span = _span(self.along_rate, self.hits)
        self.across_span = _span(self.across_rate, self.hits)
        self.pieces = sorted(pieces, key=lambda p: p.along[0])
        self.square = square
        self.fade = FLOOR_FADE_SQUARES * square
        shape = self.hits.shape
        self._along, self._across = np.empty(shape, np.float32), np.empty(shape, np.float32)
        self._parity, self._spare = np.empty(shape, np.int32), np.empty(shape, np.int32)
        self._word, self._piece_word = np.empty(shape, np.uint32), np.empty(shape, np.uint32)
        self._free, self._mask, self._test = (np.empty(shape, bool) for _ in range(3))

    def paint(self, rgba: np.ndarray, depth: np.ndarray, eye) -> None:
        """Fill ``rgba``'s floor pixels (empty in ``depth``) as seen from ``eye`` (m), in place.

        ``rgba`` is (height, width, 4) uint8 as the tiny renderer returns it:
        empty pixels are white, so ANDing a word that is the floor colour on the
        floor and all ones elsewhere paints the floor and leaves the rest.
        """
        eye = np.asarray(eye, dtype=float)
        height = float(eye @ self.normal)
        if height <= 0 or not self.pieces or self.first_row >= rgba.shape[0]:
            return
        rows = slice(self.first_row, rgba.shape[0])
        words = rgba.view(np.uint32).reshape(rgba.shape[:2])[rows]
        scale = height / self.square
        free = self._free
        np.greater_equal(depth[rows], BACKGROUND_DEPTH, out=free)
        if not self.all_hit:
            free &= self.hits
        parity = self._parity
        along = self._coordinate(self.along_rate, self.along_axis, self.along_span, eye, scale,
                                 self._along)
        np.copyto(parity, along[0], casting="unsafe")
        checks = [(along, 0)]
        if self.level:  # across the path is the same along each row: work per row
            across_rows = float(eye @ self.across_axis) / self.square + scale * self.across_row
            flip = (np.floor(across_rows).astype(np.int64) & 1).astype(np.uint32)
        else:
            across = self._coordinate(self.across_rate, self.across_axis, self.across_span, eye,
                                      scale, self._across)
            np.copyto(self._spare, across[0], casting="unsafe")
            parity ^= self._spare
            flip = np.zeros(len(self.row_range), np.uint32)
            checks.append((across, 1))
        parity &= 1
        odd = parity.view(np.uint32)
        # the checker fades with distance, where its squares would shimmer
        fade = np.clip(1.0 - self.row_range * (height / self.fade), 0.0, 1.0)
        word, drawn = self._word, 0
        for piece in self.pieces:
            light = np.array(piece.colour)
            dark = light[None, :] * (1.0 - CHECKER_CONTRAST * fade)[:, None]
            # per channel white - colour >= 0, so packed words subtract without borrows;
            # word = ~light + darker · (odd XOR flip) = ~light + flip·darker + odd·gain
            darker = _pack(light) - _pack(dark)
            gain = np.where(flip == 1, np.uint32(0) - darker, darker)  # wraps modulo 2³²
            offset = ~_pack(light)[0] + flip * darker
            piece_checks = checks
            if self.level:
                inside = (across_rows >= piece.across[0] / self.square) & (
                    across_rows <= piece.across[1] / self.square)
                if not inside.any():
                    continue
                gain *= inside
                offset *= inside
                # the along span of the rows on this piece only: the floor's far ends
                # are usually out of sight there even when grazing rays elsewhere reach them
                values, _, shift = along
                seen = shift + float(eye @ self.along_axis) / self.square + scale * np.array(
                    [self.row_along_low[inside].min(), self.row_along_high[inside].max()])
                piece_checks = [((values, seen, shift), 0)]
            target = self._piece_word if drawn else word
            np.multiply(odd, gain[:, None], out=target)
            target += offset[:, None]
            target *= self._piece_mask(piece, free, piece_checks)
            if drawn:
                word += target
            drawn += 1
        if not drawn:
            return
        np.invert(word, out=word)  # all ones minus the sum: the colour, or white off the floor
        words &= word

    def _coordinate(self, rate, axis, span, eye, scale, out) -> tuple[np.ndarray, np.ndarray,
                                                                      float]:
        """Floor coordinate (squares) of every pixel into ``out``, with the view's span.

        Shifted by an even whole number that makes every floor pixel's positive:
        truncation is then floor and the checker keeps its parity.
        """
        start = float(eye @ axis) / self.square
        shift = 2.0 * math.ceil(max(0.0, -(start + scale * span[0])) / 2.0)
        np.multiply(rate, np.float32(scale), out=out)
        out += np.float32(start + shift)
        return out, start + scale * span + shift, shift

    def _piece_mask(self, piece: FloorPiece, free: np.ndarray, checks) -> np.ndarray:
        """Free pixels on ``piece``; a bound the whole view lies within is not tested."""
        mask = free
        for (values, seen, shift), axis in checks:
            low, high = (bound / self.square + shift for bound in (piece.along, piece.across)[axis])
            for bound, compare, outside in ((low, np.greater_equal, seen[0] < low),
                                            (high, np.less_equal, seen[1] > high)):
                if outside:
                    if mask is free:
                        mask = np.copyto(self._mask, free) or self._mask
                    mask &= compare(values, np.float32(bound), out=self._test)
        return mask


def _span(rates: np.ndarray, hits: np.ndarray) -> np.ndarray:
    """Smallest and largest rate over the pixels that see the floor."""
    seen = rates[hits]
    return np.array([seen.min(), seen.max()]) if seen.size else np.zeros(2)


def _pack(rgb: np.ndarray) -> np.ndarray:
    """RGB rows (0-255 floats) as packed opaque RGBA words, in the frame's byte order."""
    rgb = np.atleast_2d(np.asarray(rgb))
    channels = np.empty((rgb.shape[0], 4), np.uint8)
    channels[:, :3] = np.clip(np.rint(rgb), 0, 255)
    channels[:, 3] = 255
    return channels.view(np.uint32)[:, 0]


def _checker_square(size: float) -> float:
    """A round checker square (m) near ``size``: 1, 2 or 5 × a power of ten."""
    exponent = math.floor(math.log10(size))
    steps = [m * 10.0 ** e for e in (exponent - 1, exponent, exponent + 1) for m in (1, 2, 5)]
    return min(steps, key=lambda s: abs(math.log(s / size)))


class FrameRenderer:
    """A pybullet client holding the run's robot and floor, rendering frames of a job."""

    def __init__(self, job: RenderJob):
        self.job = job
        spec = robot_from_dict(job.robot, "robot.yaml")
        ground = ground_from_record(job.ground)
        self.world = World(spec, ground=ground)
        self.client = self.world.client
        width, height = job.size
        self.layout = OverlayLayout.for_size(width, height)
        top = max(max(b.at[2] + b.size[2] / 2 for b in spec.figures.boxes), spec.wheels.radius)
        distance = CAMERA_DISTANCE_PER_HEIGHT * top
        self.camera = Camera.beside(distance)
        self.aim = np.array([0.0, 0.0, 0.25 * top])
        self.projection = pb.computeProjectionMatrixFOV(
            FIELD_OF_VIEW_DEG, width / height, distance / 40.0, distance * 40.0,
            physicsClientId=self.client)
        slope = ground.slope if ground is not None else 0.0
        tilt = pb.getQuaternionFromEuler([0, -slope, 0])  # as the world tilts its floor
        rotation = np.array(pb.getMatrixFromQuaternion(tilt)).reshape(3, 3)
        shade = _floor_shade(tilt, self.camera, distance)
        pieces = self._take_floor_pieces(rotation, shade)
        self.floor = FloorPainter(job.size, self.camera, rotation, pieces,
                                  _checker_square(CHECKER_PER_HEIGHT * top))

    def _take_floor_pieces(self, rotation: np.ndarray, shade: float) -> list[FloorPiece]:
        """The world's floor as FloorPieces for the painter, hidden from the engine's renderer.

        Flat boxes level with the floor become pieces; a heightfield (bumps of a
        few millimetres) is painted flat over its extent; anything standing on
        the floor (a step) stays with the engine.
        """
        c = self.client
        ids = getattr(self.world, "floor_ids", None) or [self.world.ground_id]
        pieces = []
        for body in ids:
            shapes = pb.getVisualShapeData(body, physicsClientId=c)
            if len(shapes) != 1 or shapes[0][2] not in (pb.GEOM_BOX, pb.GEOM_HEIGHTFIELD):
                continue
            kind, rgba = shapes[0][2], shapes[0][7]
            if kind == pb.GEOM_BOX:
                extents = np.asarray(shapes[0][3])
                centre = rotation.T @ np.asarray(pb.getBasePositionAndOrientation(
                    body, physicsClientId=c)[0])
                if abs(centre[2] + extents[2] / 2) > 1e-6:
                    continue  # not level with the floor (a step): the engine draws it
                low, high = centre - extents / 2, centre + extents / 2
            else:
                box = np.array(pb.getAABB(body, physicsClientId=c))
                corners = np.array([[box[i, 0], box[j, 1], box[k, 2]]
                                    for i in (0, 1) for j in (0, 1) for k in (0, 1)])
                floor = corners @ rotation  # rows: corners in floor coordinates
                low, high = floor.min(axis=0), floor.max(axis=0)
            pieces.append(FloorPiece((low[0], high[0]), (low[1], high[1]),
                                     tuple(255.0 * shade * v for v in rgba[:3])))
            # fully transparent shapes are skipped by the tiny renderer
            pb.changeVisualShape(body, -1, rgbaColor=[*rgba[:3], 0.0], physicsClientId=c)
        return pieces

    def pose(self, i: int) -> tuple[np.ndarray, list[float]]:
        """Place the robot at frame ``i``; returns the camera's eye (m) and view matrix."""
        c, table, world = self.client, self.job.table, self.world
        robot = world.robot_id
        pb.resetBasePositionAndOrientation(robot, table.com[i], table.quaternion[i],
                                           physicsClientId=c)
        left, right = world.wheel_joints
        pb.resetJointState(robot, left, table.wheels[i, 0], physicsClientId=c)
        pb.resetJointState(robot, right, table.wheels[i, 1], physicsClientId=c)
        # aim a little above the axle so a tall body stays clear of the overlay strip
        target = np.asarray(world.body_state().axle) + self.aim
        eye = target + self.camera.offset
        return eye, pb.computeViewMatrix(eye, target, (0, 0, 1), physicsClientId=c)

    def render(self, i: int, out: np.ndarray | None = None) -> np.ndarray:
        """Frame ``i`` with its floor and overlay: (height, width, 4) uint8 RGBA.

        With ``out`` the frame is drawn there and the engine's arrays are let go
        at once: holding them for the encoder makes the allocator hand memory
        back and forth with the kernel every frame (measured: a millisecond).
        """
        eye, view = self.pose(i)
        width, height = self.job.size
        _, _, rgba, depth, _ = pb.getCameraImage(
            width, height, view, self.projection, renderer=pb.ER_TINY_RENDERER,
            flags=pb.ER_NO_SEGMENTATION_MASK, physicsClientId=self.client)
        rgba = np.reshape(rgba, (height, width, 4))
        if out is not None:
            np.copyto(out, rgba)
            rgba = out
        self.floor.paint(rgba, np.reshape(depth, (height, width)), eye)
        draw_overlay(rgba[:, :, :3], self.layout, self.job.table, i)
        return rgba

    def close(self) -> None:
        self.world.close()


def _floor_shade(tilt, camera: Camera, distance: float) -> float:
    """How bright the tiny renderer draws a white floor tilted by ``tilt`` (a quaternion),
    seen with this camera's orientation (0-1).

    Measured once in a throw-away client so the painted floor matches what the
    engine would draw (and the steps it still draws).
    """
    with quiet():
        client = pb.connect(pb.DIRECT)
    try:
        rotation = np.array(pb.getMatrixFromQuaternion(tilt)).reshape(3, 3)
        extents = [10.0, 10.0, 0.05]
        visual = pb.createVisualShape(pb.GEOM_BOX, halfExtents=extents, rgbaColor=[1, 1, 1, 1],
                                      physicsClientId=client)
        centre = rotation @ np.array([0.0, 0.0, -extents[2]])  # top face through the origin
        pb.createMultiBody(0, -1, visual, centre.tolist(), tilt, physicsClientId=client)
        eye = rotation[:, 2] * distance
        view = pb.computeViewMatrix(eye, eye + camera.forward, camera.up, physicsClientId=client)
        projection = pb.computeProjectionMatrixFOV(FIELD_OF_VIEW_DEG, 1.0, distance / 40.0,
                                                   distance * 40.0, physicsClientId=client)
        rgba = pb.getCameraImage(16, 16, view, projection, renderer=pb.ER_TINY_RENDERER,
                                 flags=pb.ER_NO_SEGMENTATION_MASK, physicsClientId=client)[2]
        return float(np.reshape(rgba, (16, 16, 4))[-1, 8, :3].mean()) / 255.0
    finally:
        pb.disconnect(physicsClientId=client)


# --------------------------------------------------------------------- overlay

# 5×7 glyphs: a character, then its rows top to bottom separated by '/', '#' lit;
# two glyphs a line. Lower case is drawn as upper case; unknown characters as '?'.
_FONT_TABLE = """
0 .###./#...#/#..##/#.#.#/##..#/#...#/.###.    1 ..#../.##../..#../..#../..#../..#../.###.
2 .###./#...#/....#/...#./..#../.#.../#####    3 #####/...#./..#../...#./....#/#...#/.###.
4 ...#./..##./.#.#./#..#./#####/...#./...#.    5 #####/#..../####./....#/....#/#...#/.###.
6 ..##./.#.../#..../####./#...#/#...#/.###.    7 #####/....#/...#./..#../.#.../.#.../.#...
8 .###./#...#/#...#/.###./#...#/#...#/.###.    9 .###./#...#/#...#/.####/....#/...#./.##..
A .###./#...#/#...#/#####/#...#/#...#/#...#    B ####./#...#/#...#/####./#...#/#...#/####.
C .###./#...#/#..../#..../#..../#...#/.###.    D ###../#..#./#...#/#...#/#...#/#..#./###..
E #####/#..../#..../####./#..../#..../#####    F #####/#..../#..../####./#..../#..../#....
G .###./#...#/#..../#.###/#...#/#...#/.####    H #...#/#...#/#...#/#####/#...#/#...#/#...#
I .###./..#../..#../..#../..#../..#../.###.    J ..###/...#./...#./...#./...#./#..#./.##..
K #...#/#..#./#.#../##.../#.#../#..#./#...#    L #..../#..../#..../#..../#..../#..../#####
M #...#/##.##/#.#.#/#.#.#/#...#/#...#/#...#    N #...#/#...#/##..#/#.#.#/#..##/#...#/#...#
O .###./#...#/#...#/#...#/#...#/#...#/.###.    P ####./#...#/#...#/####./#..../#..../#....
Q .###./#...#/#...#/#...#/#.#.#/#..#./.##.#    R ####./#...#/#...#/####./#.#../#..#./#...#
S .####/#..../#..../.###./....#/....#/####.    T #####/..#../..#../..#../..#../..#../..#..
U #...#/#...#/#...#/#...#/#...#/#...#/.###.    V #...#/#...#/#...#/#...#/#...#/.#.#./..#..
W #...#/#...#/#...#/#.#.#/#.#.#/#.#.#/.#.#.    X #...#/#...#/.#.#./..#../.#.#./#...#/#...#
Y #...#/#...#/.#.#./..#../..#../..#../..#..    Z #####/....#/...#./..#../.#.../#..../#####
. ...../...../...../...../...../.##../.##..    - ...../...../...../.###./...../...../.....
+ ...../..#../..#../#####/..#../..#../.....    : ...../.##../.##../...../.##../.##../.....
/ ...../....#/...#./..#../.#.../#..../.....    % ##.../##..#/...#./..#../.#.../#..##/...##
° .##../#..#./#..#./.##../...../...../.....    ( ...#./..#../.#.../.#.../.#.../..#../...#.
) .#.../..#../...#./...#./...#./..#../.#...    , ...../...../...../...../.##../..#../.#...
= ...../...../#####/...../#####/...../.....    ? .###./#...#/....#/...#./..#../...../..#..
_ ...../...../...../...../...../...../#####    ' ..#../..#../.#.../...../...../...../.....
* ...../#.#.#/.###./#####/.###./#.#.#/.....
"""
_FONT_ROWS = {word[0]: rows for line in _FONT_TABLE.strip().splitlines()
              for word, rows in zip(line.split()[::2], line.split()[1::2])}
GLYPH_W, GLYPH_H = 5, 7


@cache
def glyph(char: str, scale: int) -> np.ndarray:
    """A character as a (7·scale, 6·scale) boolean mask, its right column blank for spacing."""
    if char == " ":
        mask = np.zeros((GLYPH_H, GLYPH_W), dtype=bool)
    else:
        rows = _FONT_ROWS.get(char.upper(), _FONT_ROWS["?"]).split("/")
        mask = np.array([[c == "#" for c in row] for row in rows], dtype=bool)
    mask = np.pad(mask, ((0, 0), (0, 1)))
    return np.repeat(np.repeat(mask, scale, axis=0), scale, axis=1)


def draw_text(frame: np.ndarray, text: str, x: int, y: int, scale: int, colour) -> None:
    """Write ``text`` with its top-left at (x, y) px, cut at the frame's right edge."""
    step = (GLYPH_W + 1) * scale
    fits = max(0, (frame.shape[1] - x) // step)
    masks = [glyph(char, scale) for char in text[:fits]]
    if masks:  # one masked store for the whole string: per-glyph stores cost more
        mask = np.concatenate(masks, axis=1)
        frame[y:y + mask.shape[0], x:x + mask.shape[1]][mask] = colour


@dataclass(frozen=True)
class OverlayLayout:
    """Where the strip's items sit for one frame size (px)."""

    scale: int  # glyph pixel size
    strip: int  # strip height
    time_x: int
    tilt_text_x: int
    tilt_bar: tuple[int, int]
    duty_labels: tuple[int, int]
    duty_bars: tuple[tuple[int, int], tuple[int, int]]

    @classmethod
    def for_size(cls, width: int, height: int) -> OverlayLayout:
        s = max(1, round(height / 150))
        char = (GLYPH_W + 1) * s
        x = 2 * s
        time_x, x = x, x + 8 * char + 3 * s  # "123.45 S"
        tilt_text_x, x = x, x + 6 * char + s  # "+12.3°"
        free = max(3, width - x - 2 * char - 6 * s)
        tilt_w, duty_w = int(free * 0.4), int(free * 0.3)
        tilt_bar, x = (x, x + tilt_w), x + tilt_w + 2 * s
        left_label, x = x, x + char
        left_bar, x = (x, x + duty_w), x + duty_w + 2 * s
        right_label, x = x, x + char
        right_bar = (x, min(width - s, x + duty_w))
        return cls(s, (GLYPH_H + 4) * s, time_x, tilt_text_x, tilt_bar,
                   (left_label, right_label), (left_bar, right_bar))


def draw_bar(frame: np.ndarray, span: tuple[int, int], top: int, height: int,
             fraction: float, colour, ticks: tuple[float, ...] = ()) -> None:
    """A centre-zero bar: fill from the middle towards ``fraction`` ∈ [-1, 1] of half its width.

    ``ticks`` (fractions of the half width) are marked on the bar's lower third.
    """
    x0, x1 = span
    frame[top:top + height, x0:x1] = GAUGE_BACK
    middle = (x0 + x1) // 2
    reach = int(round(max(-1.0, min(1.0, fraction)) * (x1 - x0) / 2))
    lo, hi = sorted((middle, middle + reach))
    frame[top:top + height, lo:hi + 1] = colour
    frame[top:top + height, middle:middle + 1] = CENTRE_LINE
    for tick in ticks:
        x = middle + int(round(tick * (x1 - x0) / 2))
        frame[top + 2 * height // 3:top + height, x:x + 1] = CENTRE_LINE


def tilt_colour(degrees: float):
    """Green under 5°, amber under 15°, red beyond."""
    size = abs(degrees)
    return OK_COLOUR if size < 5 else WARN_COLOUR if size < 15 else BAD_COLOUR


def draw_overlay(frame: np.ndarray, layout: OverlayLayout, table: FrameTable, i: int) -> None:
    """Draw frame ``i``'s strip (time, tilt, duties) and any disturbance mark, in place."""
    s, strip = layout.scale, layout.strip
    frame[:strip] = STRIP_COLOUR
    top, tall = 2 * s, GLYPH_H * s
    draw_text(frame, f"{table.t[i]:6.2f} S", layout.time_x, top, s, TEXT_COLOUR)
    degrees = math.degrees(table.pitch[i])
    draw_text(frame, f"{degrees:+5.1f}°", layout.tilt_text_x, top, s, tilt_colour(degrees))
    draw_bar(frame, layout.tilt_bar, top, tall, degrees / TILT_GAUGE_DEG, tilt_colour(degrees),
             ticks=TILT_TICKS)
    for k, (letter, x) in enumerate(zip("LR", layout.duty_labels)):
        duty = float(table.duty[i, k])
        draw_text(frame, letter, x, top, s, TEXT_COLOUR)
        draw_bar(frame, layout.duty_bars[k], top, tall, duty,
                 BAD_COLOUR if abs(duty) >= 0.995 else DUTY_COLOUR)
    mark = int(table.mark[i])
    if mark >= 0:
        frame[strip:2 * strip] = MARK_COLOUR
        label = f"{table.labels[mark]}"
        draw_text(frame, label, 2 * s, strip + top, s, MARK_TEXT)
        if table.mark_age[i] < MARK_FLASH_S:  # a border flash when it fires
            edge = 2 * s
            frame[2 * strip:, :edge] = MARK_COLOUR
            frame[2 * strip:, -edge:] = MARK_COLOUR
            frame[-edge:] = MARK_COLOUR


# --------------------------------------------------------------------- encoding and workers


def chunks(count: int, workers: int) -> list[tuple[int, int]]:
    """``count`` frames split into ``workers`` runs of consecutive frames, as equal as can be."""
    workers = max(1, min(workers, count))
    edges = [round(k * count / workers) for k in range(workers + 1)]
    return [(a, b) for a, b in zip(edges[:-1], edges[1:])]


def _fps_text(fps: float) -> str:
    rate = Fraction(fps).limit_denominator(1001)
    return f"{rate.numerator}/{rate.denominator}"


class _Encoder:
    """Frames (RGBA) in, a raw H.264 stream (libx264, yuv420p) out, through imageio-ffmpeg.

    A thread feeds ffmpeg so the pipe write (a millisecond a frame at 640×480)
    overlaps the next frame's rendering; ffmpeg encodes in its own process.
    At most QUEUE frames wait, plus the one being written.
    """

    QUEUE = 4

    def __init__(self, path: Path, size: tuple[int, int], fps: float):
        import imageio_ffmpeg

        self._writer = imageio_ffmpeg.write_frames(
            str(path), size, pix_fmt_in="rgba", pix_fmt_out="yuv420p", fps=fps,
            codec="libx264", quality=None, macro_block_size=MACRO_BLOCK,
            ffmpeg_log_level="error", output_params=[*ENCODER_OPTIONS, "-f", "h264"])
        self._writer.send(None)  # starts ffmpeg
        self._frames: queue.Queue = queue.Queue(maxsize=self.QUEUE)
        self._failure: BaseException | None = None
        self._thread = threading.Thread(target=self._feed, daemon=True)
        self._thread.start()

    def _feed(self) -> None:
        while (frame := self._frames.get()) is not None:
            if self._failure is None:
                try:
                    self._writer.send(frame)
                except BaseException as err:  # reported by put() or close()
                    self._failure = err

    def put(self, frame: np.ndarray) -> None:
        if self._failure is not None:
            raise RenderError(f"the video encoder failed: {self._failure}")
        self._frames.put(frame)

    def close(self) -> None:
        self._frames.put(None)
        self._thread.join()
        self._writer.close()
        if self._failure is not None:
            raise RenderError(f"the video encoder failed: {self._failure}")


def render_segment(job: RenderJob, start: int, stop: int, path: Path, fps: float,
                   on_frame: Callable[[], None]) -> None:
    """Render frames ``start .. stop-1`` into a raw H.264 file; ``on_frame`` after each."""
    renderer = FrameRenderer(job)
    width, height = job.size
    # frames waiting for the encoder, the one it writes, and the one being drawn
    ring = np.empty((_Encoder.QUEUE + 2, height, width, 4), np.uint8)
    try:
        encoder = _Encoder(path, job.size, fps)
        try:
            for i in range(start, stop):
                encoder.put(renderer.render(i, out=ring[i % len(ring)]))
                on_frame()
        finally:
            encoder.close()
    finally:
        renderer.close()


def _segment_worker(job: RenderJob, start: int, stop: int, path: Path, fps: float,
                    messages) -> None:
    """A worker process: one chunk into one segment, reporting ("frame" | "done" | "error")."""
    try:
        render_segment(job, start, stop, path, fps, lambda: messages.put(("frame", start, "")))
    except BaseException:
        messages.put(("error", start, traceback.format_exc(limit=-3)))
    else:
        messages.put(("done", start, ""))


def _context():
    """Fork on Linux (workers start at once, with everything imported), else spawn."""
    if sys.platform.startswith("linux") and "fork" in multiprocessing.get_all_start_methods():
        return multiprocessing.get_context("fork")
    return multiprocessing.get_context("spawn")


def _render_in_workers(job: RenderJob, parts: list[tuple[int, int]], paths: list[Path],
                       fps: float, tick: Callable[[], None]) -> None:
    """One process per chunk; returns when all have finished, raises if any failed."""
    context = _context()
    messages = context.Queue()
    processes = [context.Process(target=_segment_worker, args=(job, a, b, path, fps, messages),
                                 daemon=True) for (a, b), path in zip(parts, paths)]
    try:
        for process in processes:
            process.start()
        running = len(processes)
        while running:
            try:
                kind, _, detail = messages.get(timeout=1.0)
            except queue.Empty:
                if any(p.exitcode not in (None, 0) for p in processes):
                    raise RenderError("a render worker died without a word") from None
                continue
            if kind == "frame":
                tick()
            elif kind == "done":
                running -= 1
            else:
                raise RenderError(f"a render worker failed:\n{detail}")
        for process in processes:
            process.join()
    finally:
        for process in processes:
            if process.is_alive():
                process.terminate()
                process.join()
        messages.close()


def _mux(segments: list[Path], joined: Path, out: Path, fps: float) -> None:
    """Concatenate raw H.264 segments (each starts with a key frame) into an mp4, no re-encode."""
    import imageio_ffmpeg

    with open(joined, "wb") as sink:
        for segment in segments:
            with open(segment, "rb") as source:
                shutil.copyfileobj(source, sink)
    command = [imageio_ffmpeg.get_ffmpeg_exe(), "-y", "-loglevel", "error",
               "-framerate", _fps_text(fps), "-i", str(joined), "-c", "copy", str(out)]
    result = subprocess.run(command, capture_output=True, text=True)
    if result.returncode != 0:
        raise RenderError(f"ffmpeg could not write {out.name}: {result.stderr.strip()}")


def render_run(folder: Path, fps: float = 30, size: tuple[int, int] = (640, 480),
               workers: int | None = None,
               progress: Callable[[int, int], None] | None = None) -> Path:
    """Render ``folder/video.mp4`` from a recorded run; returns its path.

    ``size`` is (width, height) px, each divisible by 16. ``workers`` processes
    render (default: one per core; 1 renders in this process), each a chunk of
    consecutive frames into its own H.264 segment; the segments are joined in
    order without re-encoding. ``progress(done, total)`` is called in this
    process as frames finish. Frame rule: see the module docstring.

    Raises ValueError for a bad size, fps, worker count or trace (RobotFileError,
    a ValueError, for a bad robot.yaml) and RenderError when the folder is not
    a run or a worker or the encoder fails; nothing is left behind then.
    """
    folder = Path(folder)
    size = check_size(size)
    if workers is None:
        workers = os.cpu_count() or 1
    if isinstance(workers, bool) or int(workers) != workers or workers < 1:
        raise ValueError(f"workers must be a whole number >= 1, got {workers!r}")
    job = load_job(folder, fps, size)
    total = len(job.table)
    parts = chunks(total, int(workers))
    done = 0

    def tick() -> None:
        nonlocal done
        done += 1
        if progress is not None:
            progress(done, total)

    final = folder / VIDEO_NAME
    with tempfile.TemporaryDirectory(prefix=".video-", dir=folder) as scratch:
        paths = [Path(scratch) / f"part{k:03d}.h264" for k in range(len(parts))]
        if len(parts) == 1:
            render_segment(job, 0, total, paths[0], fps, tick)
        else:
            _render_in_workers(job, parts, paths, fps, tick)
        partial = Path(scratch) / VIDEO_NAME
        _mux(paths, Path(scratch) / "joined.h264", partial, fps)
        os.replace(partial, final)
    return final
