"""Which frames a video has and what each shows: times, poses, duties, marks."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import yaml

from ..record import read_trace
from ..robot import robot_from_dict

VIDEO_NAME = "video.mp4"
MARK_SHOW_S = 1.0  # how long a disturbance label stays up
MACRO_BLOCK = 16  # px: H.264 macroblock; both sides must be a multiple


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
    push: np.ndarray | None = None  # (n,) index into pushes of the push drawn, -1 for none
    pushes: tuple[PushMark, ...] = ()

    def __len__(self) -> int:
        return len(self.t)


PUSH_SHOW_S = 0.6  # the push arrow stays this long (or the push's own duration, if longer)
PUSH_DIRECTIONS = ("forward", "backward", "left", "right")


@dataclass(frozen=True)
class PushMark:
    """A push as the video draws it: when (s), which way (relative to the robot's heading
    when it fired), where (m above the axle, on the body's z axis), for how long (s)."""

    t: float
    direction: str
    height: float
    show_s: float
    label: str


def push_label(push: dict) -> str:
    """The label a push's mark carries in summary.json (the words the timeline writes)."""
    if push.get("impulse") is not None:
        return f"push {float(push['impulse']):.3g} N*s"
    return f"push {float(push['force']):.3g} N for {float(push.get('duration', 0.1)):g} s"


def push_marks(marks, test_definition: dict | None, default_height: float) -> tuple[
        PushMark, ...]:
    """Pair summary.json's push marks (times) with run.yaml's push events (direction, height).

    Each mark takes the first unused push event whose label it carries, so pushes
    fired by distance, or out of the file's order, still find their own event.
    Marks without a matching event (a hand-edited summary) are drawn forward at
    the default height.
    """
    events = [e["push"] for e in (test_definition or {}).get("events", ())
              if isinstance(e, dict) and isinstance(e.get("push"), dict)]
    used: set[int] = set()
    out = []
    for entry in marks or ():
        try:
            when, label = float(entry[0]), str(entry[1])
        except (TypeError, ValueError, IndexError):
            continue
        if not (label.startswith("push") and math.isfinite(when)):
            continue
        push: dict = {}
        for k, event in enumerate(events):
            try:
                same = k not in used and push_label(event) == label
            except (TypeError, ValueError, KeyError):
                same = False
            if same:
                used.add(k)
                push = event
                break
        direction = push.get("direction", "forward")
        height = push.get("height")
        duration = push.get("duration", 0.0) if push.get("force") is not None else 0.0
        out.append(PushMark(
            when, direction if direction in PUSH_DIRECTIONS else "forward",
            float(height) if height is not None else default_height,
            max(PUSH_SHOW_S, float(duration)), label))
    return tuple(sorted(out, key=lambda m: m.t))


def _pushes_on_show(t: np.ndarray, pushes: tuple[PushMark, ...]) -> np.ndarray:
    """Index of the latest push on show at each frame (within its show time), else -1."""
    shown = np.full(t.shape, -1, dtype=int)
    for k, push in enumerate(pushes):
        shown[(t >= push.t - 1e-9) & (t < push.t + push.show_s)] = k
    return shown


POSE = ("pose_x_m", "pose_y_m", "pose_z_m", "pose_qx", "pose_qy", "pose_qz", "pose_qw")
WHEELS = ("wheel_l_rad", "wheel_r_rad")


def frame_table(trace: dict[str, np.ndarray], fps: float,
                marks: list | tuple = (), pushes: tuple[PushMark, ...] = ()) -> FrameTable:
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
        mark=mark, mark_age=age, labels=labels, push=_pushes_on_show(t, tuple(pushes)),
        pushes=tuple(pushes))


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
    camera: str = "side"  # one of CAMERAS


CAMERAS = ("side", "front", "three-quarter", "follow")


def check_camera(camera: str) -> str:
    """A camera name from CAMERAS; else ValueError naming the choices."""
    if camera not in CAMERAS:
        raise ValueError(f"camera {camera!r}: choose one of {', '.join(CAMERAS)}")
    return camera


def load_job(folder: Path, fps: float, size: tuple[int, int],
             camera: str = "side") -> RenderJob:
    """Read a run folder's robot.yaml, run.yaml, trace.csv and summary.json."""
    check_camera(camera)
    folder = Path(folder)
    for name in ("trace.csv", "robot.yaml"):
        if not (folder / name).is_file():
            raise RenderError(f"{folder}: no {name}; is this a run folder?")
    robot = yaml.safe_load((folder / "robot.yaml").read_text(encoding="utf-8"))
    spec = robot_from_dict(robot, str(folder / "robot.yaml"))  # fails here, not in workers
    run = {}
    if (folder / "run.yaml").is_file():
        run = yaml.safe_load((folder / "run.yaml").read_text(encoding="utf-8")) or {}
    marks = []
    if (folder / "summary.json").is_file():
        marks = json.loads((folder / "summary.json").read_text(encoding="utf-8")).get("marks")
    from ..events import _push_height

    pushes = push_marks(marks, run.get("test_definition"), _push_height(spec))
    table = frame_table(read_trace(folder / "trace.csv"), fps, marks or (), pushes)
    return RenderJob(robot=robot, ground=run.get("ground"), size=size, table=table,
                     camera=camera)


# --------------------------------------------------------------------- scene


