"""Encoding: frames to H.264 segments in worker processes, joined into video.mp4."""

from __future__ import annotations

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
from fractions import Fraction
from pathlib import Path

import numpy as np

from .frames import MACRO_BLOCK, VIDEO_NAME, RenderError, RenderJob, check_size, load_job
from .scene import FrameRenderer

# x264's fastest preset: at 640×480 it costs about a fifth of a frame's rendering, which
# two workers on two cores must share (slower presets cut the two-worker speed-up).
ENCODER_OPTIONS = ["-preset", "ultrafast", "-crf", "23", "-threads", "1"]



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
               progress: Callable[[int, int], None] | None = None,
               camera: str = "side") -> Path:
    """Render ``folder/video.mp4`` from a recorded run; returns its path.

    ``camera`` is one of ``side``, ``front``, ``three-quarter``, ``follow``
    (behind the robot, turning with it).

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
    job = load_job(folder, fps, size, camera)
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

