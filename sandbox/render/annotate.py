"""Drawing into the 3-D picture with numpy: the translucent frame, the forward arrow and
push arrows, placed by projecting world points through the frame's camera.

The tiny renderer has no blending (a shape is drawn opaque or, fully
transparent, not at all), so the frame box is hidden from it and drawn here:
its faces that look at the camera are blended over the picture and its edges
outlined, which leaves the parts inside it (coloured boxes) in view.
Everything here is drawn over the scene without a depth test.
"""

from __future__ import annotations

import math

import numpy as np

from .overlay import GLYPH_H, GLYPH_W, draw_text

FRAME_ALPHA = 0.25  # how much of the frame's colour covers what is behind it
FRAME_EDGE = (60, 66, 74)
PUSH_COLOUR = (235, 20, 190)  # magenta: no demo part or floor is near it
FORWARD_COLOUR = (30, 150, 70)
PUSH_LENGTH_PER_HEIGHT = 0.55  # arrow length / robot height
FORWARD_LENGTH_PER_HEIGHT = 0.35

# a box's corners as signs of its half sizes, and its faces as corner numbers (outward order)
_CORNERS = np.array([[x, y, z] for x in (-1, 1) for y in (-1, 1) for z in (-1, 1)], float)
_FACES = ((0, 1, 3, 2), (4, 6, 7, 5), (0, 4, 5, 1), (2, 3, 7, 6), (0, 2, 6, 4), (1, 5, 7, 3))
_EDGES = tuple({tuple(sorted((f[k], f[(k + 1) % 4]))) for f in _FACES for k in range(4)})


def project(points, eye, camera, size: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """World points (m, (..., 3)) -> pixel (column, row) as floats, and whether each lies in
    front of the eye. The pinhole of :meth:`Camera.rays`: pixel centres at whole numbers."""
    from .scene import FIELD_OF_VIEW_DEG

    width, height = size
    offset = np.asarray(points, float) - np.asarray(eye, float)
    depth = offset @ camera.forward
    ahead = depth > 1e-6
    safe = np.where(ahead, depth, 1.0)
    tan_v = math.tan(math.radians(FIELD_OF_VIEW_DEG / 2))
    tan_h = tan_v * width / height
    across = (offset @ camera.right) / safe / tan_h
    up = (offset @ camera.up) / safe / tan_v
    pixels = np.stack([(across + 1) / 2 * width - 0.5, (1 - up) / 2 * height - 0.5], axis=-1)
    return pixels, ahead


def _window(frame: np.ndarray, points: np.ndarray, pad: float):
    """The frame's rows and columns around ``points`` (px), clipped; None off the frame."""
    height, width = frame.shape[:2]
    low = np.floor(points.min(axis=0) - pad).astype(int)
    high = np.ceil(points.max(axis=0) + pad).astype(int) + 1
    c0, r0 = max(0, low[0]), max(0, low[1])
    c1, r1 = min(width, high[0]), min(height, high[1])
    if c0 >= c1 or r0 >= r1:
        return None
    # a row and a column of coordinates: the tests below broadcast them to the window
    cols = np.arange(c0, c1, dtype=np.float32)[None, :]
    rows = np.arange(r0, r1, dtype=np.float32)[:, None]
    return (slice(r0, r1), slice(c0, c1)), cols, rows


def fill_polygon(frame: np.ndarray, corners, colour, alpha: float = 1.0) -> None:
    """Fill a convex polygon (pixel corners in order) with ``colour``, blended by ``alpha``."""
    corners = np.asarray(corners, float)
    window = _window(frame, corners, 0.0)
    if window is None or len(corners) < 3:
        return
    where, cols, rows = window
    inside = np.ones((rows.size, cols.size), bool)
    turn = 0.0
    for k in range(len(corners)):
        (x0, y0), (x1, y1) = corners[k], corners[(k + 1) % len(corners)]
        turn += x0 * y1 - x1 * y0
    sign = 1.0 if turn >= 0 else -1.0
    for k in range(len(corners)):
        (x0, y0), (x1, y1) = corners[k], corners[(k + 1) % len(corners)]
        inside &= sign * ((x1 - x0) * (rows - y0) - (y1 - y0) * (cols - x0)) >= 0
    _paint(frame, where, inside, colour, alpha)


def draw_segment(frame: np.ndarray, start, end, width: float, colour) -> None:
    """A line of ``width`` px from ``start`` to ``end`` (pixel column, row)."""
    start, end = np.asarray(start, float), np.asarray(end, float)
    half = width / 2
    window = _window(frame, np.array([start, end]), half + 1)
    if window is None:
        return
    where, cols, rows = window
    along = end - start
    length2 = float(along @ along)
    if length2 < 1e-12:
        near = (cols - start[0]) ** 2 + (rows - start[1]) ** 2 <= half * half
    else:
        share = np.clip(((cols - start[0]) * along[0] + (rows - start[1]) * along[1])
                        / length2, 0.0, 1.0)
        dx = cols - (start[0] + share * along[0])
        dy = rows - (start[1] + share * along[1])
        near = dx * dx + dy * dy <= half * half
    _paint(frame, where, near, colour, 1.0)


def draw_disc(frame: np.ndarray, centre, radius: float, colour) -> None:
    draw_segment(frame, centre, centre, 2 * radius, colour)


def _paint(frame: np.ndarray, where, mask: np.ndarray, colour, alpha: float) -> None:
    region = frame[where]
    if alpha >= 1.0:
        region[mask] = colour
        return
    # integer blend in 1/256ths, (under · (256 - weight) + colour · weight) >> 8, looked up
    # per channel in a 256-entry table over the window and copied where the mask is set:
    # the same bytes as blending the masked pixels, at about half the cost
    weight = int(round(alpha * 256))
    over = np.asarray(colour, np.float64).round().astype(np.uint16) * weight
    table = ((np.arange(256, dtype=np.uint16)[None, :] * (256 - weight) + over[:, None]) >> 8
             ).astype(np.uint8)
    blended = np.empty(region.shape, np.uint8)
    for k in range(region.shape[2]):
        np.take(table[k], region[:, :, k], out=blended[:, :, k])
    np.copyto(region, blended, where=mask[:, :, None])


def draw_arrow(frame: np.ndarray, tail, head, width: float, colour) -> None:
    """An arrow from ``tail`` to ``head`` (px), its tip at ``head``."""
    tail, head = np.asarray(tail, float), np.asarray(head, float)
    along = head - tail
    length = float(np.hypot(*along))
    if length < 1e-6:
        return
    unit = along / length
    normal = np.array([-unit[1], unit[0]])
    size = min(length * 0.45, 4.0 * width)
    base = head - unit * size
    draw_segment(frame, tail, base + unit * 0.5, width, colour)
    fill_polygon(frame, [head, base + normal * size * 0.55, base - normal * size * 0.55],
                 colour)


def draw_box(frame: np.ndarray, centre, rotation: np.ndarray, size, eye, camera,
             colour, edge_width: float) -> None:
    """A box (world centre m, body rotation, sizes m) drawn translucent with outlined edges."""
    corners = np.asarray(centre) + (_CORNERS * (np.asarray(size) / 2)) @ rotation.T
    pixels, ahead = project(corners, eye, camera, frame.shape[1::-1])
    if not ahead.all():
        return
    middle = corners.mean(axis=0)
    for face in _FACES:
        points = corners[list(face)]
        outward = points.mean(axis=0) - middle
        if outward @ (points.mean(axis=0) - np.asarray(eye)) < 0:  # faces the camera
            shade = 0.85 + 0.15 * abs(outward @ camera.up) / max(np.linalg.norm(outward), 1e-9)
            fill_polygon(frame, pixels[list(face)], tuple(shade * c for c in colour),
                         FRAME_ALPHA)
    for a, b in _EDGES:
        draw_segment(frame, pixels[a], pixels[b], edge_width, FRAME_EDGE)


def draw_world_arrow(frame: np.ndarray, tail, head, eye, camera, width: float, colour,
                     dot: float = 0.0) -> np.ndarray | None:
    """An arrow between two world points (m); returns the head's pixel (None if behind the
    eye). ``dot`` > 0 also marks the head with a disc of that radius (px)."""
    pixels, ahead = project(np.array([tail, head]), eye, camera, frame.shape[1::-1])
    if not ahead.all():
        return None
    draw_arrow(frame, pixels[0], pixels[1], width, colour)
    if dot > 0:
        draw_disc(frame, pixels[1], dot, colour)
    return pixels[1]


def draw_label(frame: np.ndarray, text: str, at, scale: int, colour) -> None:
    """Text centred on ``at`` (px), kept inside the frame."""
    height, width = frame.shape[:2]
    text_w, text_h = len(text) * (GLYPH_W + 1) * scale, GLYPH_H * scale
    x = int(round(at[0] - text_w / 2))
    y = int(round(at[1] - text_h / 2))
    x = min(max(0, x), max(0, width - text_w))
    y = min(max(0, y), max(0, height - text_h))
    draw_text(frame, text, x, y, scale, colour)
