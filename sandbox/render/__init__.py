"""Video of a recorded run: replay the trace's poses in pybullet's CPU renderer, add an overlay.

The run is not simulated again. Each frame places the body (its centre-of-mass
pose, as the engine reported it) and the wheel angles from ``trace.csv`` in a
scene built by :class:`sandbox.world.World` (robot and floor as in the run),
renders it with the tiny software renderer from beside the robot, paints the
flat floor with a checker (see :class:`FloorPainter`: the engine spends most of
a frame on the floor's few big triangles), draws an overlay strip with numpy
(time, tilt gauge, both duties, each labelled with its scale, disturbance marks),
draws the frame translucent, the forward direction and each push as an arrow at
its point of application (``annotate.py``), and hands the frame to
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

from .frames import (
    CAMERAS,
    VIDEO_NAME,
    FrameTable,
    PushMark,
    RenderError,
    RenderJob,
    _marks_on_show,
    check_size,
    frame_table,
    frame_times,
    load_job,
    push_marks,
)
from .overlay import OverlayLayout, draw_bar, draw_overlay, draw_text, glyph
from .scene import FIELD_OF_VIEW_DEG, Camera, FloorPainter, FloorPiece, FrameRenderer
from .video import _context, chunks, render_run, render_segment

__all__ = [
    "CAMERAS", "PushMark", "push_marks",
    "FIELD_OF_VIEW_DEG", "VIDEO_NAME", "Camera", "FloorPainter", "FloorPiece", "FrameRenderer",
    "FrameTable", "OverlayLayout", "RenderError", "RenderJob", "_context", "_marks_on_show",
    "check_size", "chunks", "draw_bar", "draw_overlay", "draw_text", "frame_table",
    "frame_times", "glyph", "load_job", "render_run", "render_segment",
]
