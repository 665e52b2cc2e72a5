"""The scene replayed in pybullet's CPU renderer, the camera, and the painted floor."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from ..ground import ground_from_record
from ..robot import robot_from_dict
from ..world import World, pb, quiet
from .annotate import project
from .frames import RenderJob
from .overlay import OverlayLayout, draw_overlay

FIELD_OF_VIEW_DEG = 40.0  # vertical
CAMERA_DISTANCE_PER_HEIGHT = 4.2  # camera distance / robot height above the axle
CAMERA_ELEVATION_DEG = 10.0  # the camera looks down at the axle by this much
CHECKER_PER_HEIGHT = 0.45  # floor checker square / robot height, rounded to 1-2-5 steps
CHECKER_CONTRAST = 0.12  # dark squares are this much darker
FLOOR_FADE_SQUARES = 30  # the checker fades out over this many squares' distance
BACKGROUND_DEPTH = 0.99999  # tiny renderer depth of empty pixels (it clears to just under 1)
EMPTY_DEPTH = np.float32(0.9999999)  # what the tiny renderer leaves in pixels it drew nothing in
CROP_PAD_PX = 3  # the engine's window reaches this far past the projected bounding boxes
CROP_LIMIT = 0.6  # a window covering more of the frame than this renders the full frame
GRAZING = 1e-3  # rays that drop less than this per unit length count as missing the floor
# --camera: (azimuth from world +x towards +y, elevation) in degrees; the robot starts
# heading +x, so side looks at its right flank with forward to the picture's right
CAMERA_VIEWS = {"side": (-90.0, CAMERA_ELEVATION_DEG), "front": (0.0, CAMERA_ELEVATION_DEG),
                "three-quarter": (-45.0, 25.0), "follow": (180.0, 15.0)}
FOLLOW_STEP_DEG = 2.0  # the follow camera turns after the robot in steps of this much


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
        return cls.looking(-90.0, CAMERA_ELEVATION_DEG, distance)

    @classmethod
    def looking(cls, azimuth_deg: float, elevation_deg: float, distance: float) -> Camera:
        """At ``distance`` (m) from the aim point, in the direction ``azimuth_deg`` from
        world +x towards +y and ``elevation_deg`` above level, looking back at it."""
        azimuth, elevation = math.radians(azimuth_deg), math.radians(elevation_deg)
        offset = np.array([math.cos(elevation) * math.cos(azimuth),
                           math.cos(elevation) * math.sin(azimuth),
                           math.sin(elevation)]) * distance
        forward = -offset / distance
        right = np.cross(forward, (0.0, 0.0, 1.0))
        right /= np.linalg.norm(right)
        return cls(forward, right, np.cross(right, forward), offset)

    @classmethod
    def named(cls, name: str, distance: float, heading_deg: float = 0.0) -> Camera:
        """A camera of CAMERA_VIEWS by name; ``follow`` sits behind ``heading_deg``."""
        azimuth, elevation = CAMERA_VIEWS[name]
        if name == "follow":
            azimuth += heading_deg
        return cls.looking(azimuth, elevation, distance)

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
        self.camera_name = getattr(job, "camera", "side")
        self.camera = Camera.named(self.camera_name, distance)
        self.camera_heading = 0.0
        self.distance, self.top, self.spec = distance, top, spec
        self.aim = np.array([0.0, 0.0, 0.25 * top])
        self.projection = pb.computeProjectionMatrixFOV(
            FIELD_OF_VIEW_DEG, width / height, distance / 40.0, distance * 40.0,
            physicsClientId=self.client)
        slope = ground.slope if ground is not None else 0.0
        tilt = pb.getQuaternionFromEuler([0, -slope, 0])  # as the world tilts its floor
        rotation = np.array(pb.getMatrixFromQuaternion(tilt)).reshape(3, 3)
        shade = _floor_shade(tilt, self.camera, distance)
        pieces = self._take_floor_pieces(rotation, shade)
        self._floor_args = (rotation, pieces, _checker_square(CHECKER_PER_HEIGHT * top))
        self.floor = FloorPainter(job.size, self.camera, *self._floor_args)
        self.frame_box = spec.figures.boxes[0]  # drawn translucent by annotate.draw_box
        self.frame_colour = tuple(int(self.frame_box.colour[k:k + 2], 16) for k in (1, 3, 5))
        # fully transparent shapes are skipped by the tiny renderer: the parts show through
        pb.changeVisualShape(self.world.robot_id, -1, shapeIndex=0,
                             rgbaColor=[*(c / 255 for c in self.frame_colour), 0.0],
                             physicsClientId=self.client)
        self.state = None
        # what the engine still draws besides the robot (steps): their world corners, once
        self._static_boxes = [_box_corners(pb.getAABB(body, physicsClientId=self.client))
                              for body in getattr(self.world, "floor_ids", [])
                              if pb.getVisualShapeData(body, physicsClientId=self.client)[0][7][3]
                              > 0]
        self._links = range(-1, pb.getNumJoints(self.world.robot_id, physicsClientId=self.client))
        self.near = distance / 40.0
        self._depth = np.empty((height, width), np.float32)

    def engine_window(self, eye) -> tuple[int, int, int, int] | None:
        """The frame's columns c0:c1 and rows r0:r1 that can hold what the engine draws at the
        current pose (the robot and any steps), or None when that is most of the frame.

        Bounds of the projected world bounding boxes (``pb.getAABB``, clipped to the
        space in front of the eye), padded by CROP_PAD_PX; an empty window is
        (0, 0, 0, 0).
        """
        c, robot = self.client, self.world.robot_id
        boxes = [_box_corners(pb.getAABB(robot, link, physicsClientId=c)) for link in self._links]
        width, height = self.job.size
        low, high = np.array([np.inf, np.inf]), np.array([-np.inf, -np.inf])
        for corners in boxes + self._static_boxes:
            points = _in_front(corners, eye, self.camera, 2.0 * self.near)
            if points is None:
                continue
            pixels, _ = project(points, eye, self.camera, (width, height))
            low, high = np.minimum(low, pixels.min(axis=0)), np.maximum(high, pixels.max(axis=0))
        if not np.isfinite(low).all():
            return 0, 0, 0, 0
        c0, r0 = (max(0, int(math.floor(v - CROP_PAD_PX))) for v in low)
        c1 = min(width, int(math.ceil(high[0] + CROP_PAD_PX)) + 1)
        r1 = min(height, int(math.ceil(high[1] + CROP_PAD_PX)) + 1)
        if c0 >= c1 or r0 >= r1:
            return 0, 0, 0, 0
        if (c1 - c0) * (r1 - r0) > CROP_LIMIT * width * height:
            return None
        return c0, r0, c1, r1

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
                # rows: the corners in floor coordinates
                floor = _box_corners(pb.getAABB(body, physicsClientId=c)) @ rotation
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
        world.set_state(table.com[i], table.quaternion[i])  # (also drops the world's reads)
        left, right = world.wheel_joints
        pb.resetJointState(robot, left, table.wheels[i, 0], physicsClientId=c)
        pb.resetJointState(robot, right, table.wheels[i, 1], physicsClientId=c)
        # aim a little above the axle so a tall body stays clear of the overlay strip
        self.state = world.body_state()
        if self.camera_name == "follow":
            self._follow(world.forward_axis(self.state))
        target = np.asarray(self.state.axle) + self.aim
        eye = target + self.camera.offset
        return eye, pb.computeViewMatrix(eye, target, (0, 0, 1), physicsClientId=c)

    def _follow(self, heading) -> None:
        """Turn the follow camera (and the floor painter's rays) after the robot's heading."""
        degrees = math.degrees(math.atan2(heading[1], heading[0]))
        turn = (degrees - self.camera_heading + 180.0) % 360.0 - 180.0
        if abs(turn) < FOLLOW_STEP_DEG:
            return
        self.camera_heading = degrees
        self.camera = Camera.named("follow", self.distance, degrees)
        self.floor = FloorPainter(self.job.size, self.camera, *self._floor_args)

    def annotate(self, rgb: np.ndarray, i: int, eye) -> None:
        """The translucent frame, the forward arrow and any push arrow, drawn in place."""
        from .annotate import (
            FORWARD_COLOUR,
            FORWARD_LENGTH_PER_HEIGHT,
            PUSH_COLOUR,
            PUSH_LENGTH_PER_HEIGHT,
            draw_box,
            draw_label,
            draw_world_arrow,
        )

        state, world, s = self.state, self.world, self.layout.scale
        rotation = np.asarray(state.rotation, float).reshape(3, 3)
        axle = np.asarray(state.axle, float)
        box = self.frame_box
        draw_box(rgb, axle + rotation @ np.asarray(box.at), rotation, box.size, eye,
                 self.camera, self.frame_colour, max(1.0, s * 0.7))
        normal = np.asarray(world.floor_normal(), float)
        heading = np.asarray(world.forward_axis(state), float)
        radius = self.spec.wheels.radius
        tail = axle - normal * radius + heading * 1.3 * radius
        head = tail + heading * FORWARD_LENGTH_PER_HEIGHT * self.top
        tip = draw_world_arrow(rgb, tail, head, eye, self.camera, 1.5 * s, FORWARD_COLOUR)
        if tip is not None:
            draw_label(rgb, "forward", tip + np.array([0.0, 6.0 * s]), max(1, s - 1),
                       FORWARD_COLOUR)
        table = self.job.table
        k = -1 if table.push is None else int(table.push[i])
        if k < 0:
            return
        push = table.pushes[k]
        side = np.array([-heading[1], heading[0], 0.0])
        way = {"forward": heading, "backward": -heading, "left": side,
               "right": -side}[push.direction]
        point = axle + rotation @ np.array([0.0, 0.0, push.height])
        start = point - way * PUSH_LENGTH_PER_HEIGHT * self.top
        tip = draw_world_arrow(rgb, start, point, eye, self.camera, 2.0 * s, PUSH_COLOUR,
                               dot=2.5 * s)
        if tip is not None:  # the way it went, in words: seen end-on an arrow is a dot
            draw_label(rgb, f"push {push.direction}", tip - np.array([0.0, 6.0 * s]),
                       max(1, s - 1), PUSH_COLOUR)

    def render(self, i: int, out: np.ndarray | None = None, crop: bool = True) -> np.ndarray:
        """Frame ``i`` with its floor and overlay: (height, width, 4) uint8 RGBA.

        The engine renders only :meth:`engine_window` (``crop``) through an
        off-axis projection, so each of its pixels is that pixel of the full
        frame; the rest is left empty as the engine would leave it. The tiny
        renderer's cost grows with the pixels it covers and most of a frame is
        painted floor. ``crop=False`` renders the full frame (for comparison).

        With ``out`` the frame is drawn there and the engine's arrays are let go
        at once: holding them for the encoder makes the allocator hand memory
        back and forth with the kernel every frame (measured: a millisecond).
        """
        eye, view = self.pose(i)
        width, height = self.job.size
        window = self.engine_window(eye) if crop else None
        if window is None:
            _, _, rgba, depth, _ = pb.getCameraImage(
                width, height, view, self.projection, renderer=pb.ER_TINY_RENDERER,
                flags=pb.ER_NO_SEGMENTATION_MASK, physicsClientId=self.client)
            rgba = np.reshape(rgba, (height, width, 4))
            if out is not None:
                np.copyto(out, rgba)
                rgba = out
            depth = np.reshape(depth, (height, width))
        else:
            rgba = np.empty((height, width, 4), np.uint8) if out is None else out
            rgba.view(np.uint32).fill(0xFFFFFFFF)  # the tiny renderer's empty pixel: white
            depth = self._depth
            depth.fill(EMPTY_DEPTH)
            c0, r0, c1, r1 = window
            if c1 > c0:
                projection = sub_projection(self.projection, window, (width, height))
                _, _, part, part_depth, _ = pb.getCameraImage(
                    c1 - c0, r1 - r0, view, projection,
                    renderer=pb.ER_TINY_RENDERER, flags=pb.ER_NO_SEGMENTATION_MASK,
                    physicsClientId=self.client)
                rgba[r0:r1, c0:c1] = np.reshape(part, (r1 - r0, c1 - c0, 4))
                depth[r0:r1, c0:c1] = np.reshape(part_depth, (r1 - r0, c1 - c0))
        self.floor.paint(rgba, depth, eye)
        self.annotate(rgba[:, :, :3], i, eye)
        draw_overlay(rgba[:, :, :3], self.layout, self.job.table, i)
        return rgba

    def close(self) -> None:
        self.world.close()


def sub_projection(projection, window: tuple[int, int, int, int], size: tuple[int, int]
                   ) -> list[float]:
    """The projection matrix (OpenGL column-major 16 values) of columns c0:c1 and rows r0:r1
    of a ``size`` (width, height px) frame seen through ``projection``.

    An off-axis frustum [glFrustum, OpenGL 2.1 reference pages]: the window's
    normalised device coordinates are the frame's, shifted by the window's
    middle (mx, my) and scaled by its half size (sx, sy), which changes only the
    first two rows: x' = (x - mx w) / sx with w = -z for a perspective matrix.
    For the whole frame the values are ``projection``'s own.
    """
    c0, r0, c1, r1 = window
    width, height = size
    sx, sy = (c1 - c0) / width, (r1 - r0) / height
    mx, my = (c0 + c1) / width - 1.0, 1.0 - (r0 + r1) / height
    matrix = list(projection)
    if (sx, sy, mx, my) == (1.0, 1.0, 0.0, 0.0):
        return matrix
    for column in range(4):
        w = matrix[4 * column + 3]
        matrix[4 * column] = (matrix[4 * column] - mx * w) / sx
        matrix[4 * column + 1] = (matrix[4 * column + 1] - my * w) / sy
    return matrix


def _box_corners(aabb) -> np.ndarray:
    """The 8 corners (m) of an axis-aligned box given as (low, high)."""
    (x0, y0, z0), (x1, y1, z1) = aabb
    return np.array([[x, y, z] for x in (x0, x1) for y in (y0, y1) for z in (z0, z1)])


_BOX_EDGES = [(a, b) for a in range(8) for b in range(a + 1, 8) if bin(a ^ b).count("1") == 1]


def _in_front(corners: np.ndarray, eye, camera: Camera, near: float) -> np.ndarray | None:
    """A box's points at least ``near`` (m) ahead of the eye whose convex hull is the box
    clipped there: its corners in front and its edges' crossings; None if all behind."""
    depth = (corners - np.asarray(eye)) @ camera.forward
    ahead = depth >= near
    if ahead.all():
        return corners
    if not ahead.any():
        return None
    points = [corners[ahead]]
    for a, b in _BOX_EDGES:
        if ahead[a] != ahead[b]:
            share = (near - depth[a]) / (depth[b] - depth[a])
            points.append((corners[a] + share * (corners[b] - corners[a]))[None, :])
    return np.concatenate(points)


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

