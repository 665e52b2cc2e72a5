"""The overlay strip drawn with numpy: time, tilt gauge, duty bars, disturbance marks."""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from functools import cache

import numpy as np

from .frames import FrameTable

TILT_GAUGE_DEG = 30.0  # the tilt bar's full scale, either way
TILT_TICKS = tuple(d / TILT_GAUGE_DEG for d in (-20, -10, 10, 20))  # marks every 10°
MARK_FLASH_S = 0.25  # how long the frame border flashes after a disturbance

STRIP_COLOUR = (28, 30, 36)
GAUGE_BACK = (70, 72, 82)
TEXT_COLOUR = (235, 235, 235)
CENTRE_LINE = (200, 200, 200)
OK_COLOUR, WARN_COLOUR, BAD_COLOUR = (80, 200, 120), (240, 180, 40), (230, 60, 50)
DUTY_COLOUR = (90, 160, 240)
MARK_COLOUR = (245, 150, 40)
MARK_TEXT = (20, 20, 20)


# 5×7 glyphs: a character, then its rows top to bottom separated by '/', '#' lit;
# two glyphs a line. Unknown characters are drawn as '?'.
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
* ...../#.#.#/.###./#####/.###./#.#.#/.....    · ...../...../...../..#../...../...../.....
± ..#../..#../#####/..#../..#../...../#####    > .#.../..#../...#./....#/...#./..#../.#...
< ...#./..#../.#.../#..../.#.../..#../...#.    | ..#../..#../..#../..#../..#../..#../..#..
a ...../...../.###./....#/.####/#...#/.####    b #..../#..../#.##./##..#/#...#/#...#/####.
c ...../...../.###./#..../#..../#...#/.###.    d ....#/....#/.##.#/#..##/#...#/#...#/.####
e ...../...../.###./#...#/#####/#..../.###.    f ..##./.#..#/.#.../###../.#.../.#.../.#...
g ...../.####/#...#/#...#/.####/....#/.###.    h #..../#..../#.##./##..#/#...#/#...#/#...#
i ..#../...../.##../..#../..#../..#../.###.    j ...#./...../..##./...#./...#./#..#./.##..
k #..../#..../#..#./#.#../##.../#.#../#..#.    l .##../..#../..#../..#../..#../..#../.###.
m ...../...../##.#./#.#.#/#.#.#/#...#/#...#    n ...../...../#.##./##..#/#...#/#...#/#...#
o ...../...../.###./#...#/#...#/#...#/.###.    p ...../...../####./#...#/####./#..../#....
q ...../...../.##.#/#..##/.####/....#/....#    r ...../...../#.##./##..#/#..../#..../#....
s ...../...../.###./#..../.###./....#/####.    t .#.../.#.../###../.#.../.#.../.#..#/..##.
u ...../...../#...#/#...#/#...#/#..##/.##.#    v ...../...../#...#/#...#/#...#/.#.#./..#..
w ...../...../#...#/#...#/#.#.#/#.#.#/.#.#.    x ...../...../#...#/.#.#./..#../.#.#./#...#
y ...../...../#...#/#...#/.####/....#/.###.    z ...../...../#####/...#./..#../.#.../#####
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
        rows = _FONT_ROWS.get(char, _FONT_ROWS["?"]).split("/")
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
    """Where the strip's items sit for one frame size (px).

    The strip has two rows: the values (time, tilt, both duties as centre-zero
    bars) and under them, in a smaller font, what each one is and its full scale.
    """

    scale: int  # glyph pixel size of the values
    strip: int  # strip height
    time_x: int
    tilt_text_x: int
    tilt_bar: tuple[int, int]
    duty_labels: tuple[int, int]
    duty_bars: tuple[tuple[int, int], tuple[int, int]]
    label_scale: int = 1  # glyph pixel size of the labels row
    label_top: int = 0
    labels: tuple[tuple[str, int], ...] = ()  # (text, x) of each label

    @classmethod
    def for_size(cls, width: int, height: int) -> OverlayLayout:
        s = max(1, round(height / 150))
        small = max(1, round(2 * s / 3))
        char = (GLYPH_W + 1) * s
        x = 2 * s
        time_x, x = x, x + 8 * char + 3 * s  # "123.45 s"
        tilt_text_x, x = x, x + 6 * char + s  # "+12.3°"
        free = max(3, width - x - 2 * char - 6 * s)
        tilt_w, duty_w = int(free * 0.4), int(free * 0.3)
        tilt_bar, x = (x, x + tilt_w), x + tilt_w + 2 * s
        left_label, x = x, x + char
        left_bar, x = (x, x + duty_w), x + duty_w + 2 * s
        right_label, x = x, x + char
        right_bar = (x, min(width - s, x + duty_w))
        label_top = 2 * s + GLYPH_H * s + 2 * s
        spans = ((time_x, tilt_text_x - s, ("time", "t")),
                 (tilt_text_x, tilt_bar[1], (f"tilt, bar ±{TILT_GAUGE_DEG:g}°",
                                             f"tilt ±{TILT_GAUGE_DEG:g}°", "tilt")),
                 (left_label, left_bar[1], ("left duty ±1", "left ±1", "left", "L")),
                 (right_label, right_bar[1], ("right duty ±1", "right ±1", "right", "R")))
        labels = []
        for x0, x1, words in spans:
            fitting = [w for w in words if len(w) * (GLYPH_W + 1) * small <= x1 - x0]
            if fitting:
                labels.append((fitting[0], x0))
        strip = label_top + GLYPH_H * small + 2 * s
        return cls(s, strip, time_x, tilt_text_x, tilt_bar, (left_label, right_label),
                   (left_bar, right_bar), small, label_top, tuple(labels))


LABEL_COLOUR = (170, 172, 182)


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


def unit_text(label: str) -> str:
    """A label with units as they are printed: ``N*s`` becomes ``N·s``."""
    return re.sub(r"(?<=[A-Za-z])\*(?=[A-Za-z])", "·", label)


def tilt_colour(degrees: float):
    """Green under 5°, amber under 15°, red beyond."""
    size = abs(degrees)
    return OK_COLOUR if size < 5 else WARN_COLOUR if size < 15 else BAD_COLOUR


def draw_overlay(frame: np.ndarray, layout: OverlayLayout, table: FrameTable, i: int) -> None:
    """Draw frame ``i``'s strip (time, tilt, duties) and any disturbance mark, in place."""
    s, strip = layout.scale, layout.strip
    frame[:strip] = STRIP_COLOUR
    top, tall = 2 * s, GLYPH_H * s
    draw_text(frame, f"{table.t[i]:6.2f} s", layout.time_x, top, s, TEXT_COLOUR)
    for text, x in layout.labels:
        draw_text(frame, text, x, layout.label_top, layout.label_scale, LABEL_COLOUR)
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
        label = unit_text(table.labels[mark])
        draw_text(frame, label, 2 * s, strip + top, s, MARK_TEXT)
        if table.mark_age[i] < MARK_FLASH_S:  # a border flash when it fires
            edge = 2 * s
            frame[2 * strip:, :edge] = MARK_COLOUR
            frame[2 * strip:, -edge:] = MARK_COLOUR
            frame[-edge:] = MARK_COLOUR


# --------------------------------------------------------------------- encoding and workers


