"""The trace writer: the writing process, its file, and what a killed simulation leaves."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numpy as np
import pytest

from sandbox import record
from sandbox.record import COLUMNS, TraceWriter, read_trace


def _rows(count: int, seed: int = 0) -> list[tuple]:
    rng = np.random.default_rng(seed)
    values = rng.normal(size=(count, len(COLUMNS))) * 10.0
    ticks = rng.integers(-5000, 5000, size=(count, 2))
    rows = []
    for value, tick in zip(values.tolist(), ticks.tolist()):
        value[17], value[18] = tick  # ticks_l, ticks_r are whole counts
        rows.append(tuple(value))
    return rows


def _logs(count: int) -> list[dict[str, float]]:
    return [{"tilt_est_rad": 0.001 * i, "drive": -0.5 + 0.01 * i} for i in range(count)]


def test_file_and_memory_writers_keep_the_same_numbers(tmp_path):
    """The writing process hands back exactly the numbers it was sent, as the in-process
    writer keeps them; the CSV holds them to the 9 significant digits of its format."""
    rows, logs = _rows(237), _logs(237)
    on_disk, in_memory = TraceWriter(tmp_path / "trace.csv"), TraceWriter(None)
    for row, entry in zip(rows, logs):
        on_disk.add(row, dict(entry))
        in_memory.add(row, dict(entry))
    on_disk.close()
    in_memory.close()
    a, b = on_disk.arrays(), in_memory.arrays()
    assert list(a) == list(b) == list(COLUMNS) + ["log.tilt_est_rad", "log.drive"]
    for name in a:
        np.testing.assert_array_equal(a[name], b[name], err_msg=name)
    np.testing.assert_array_equal(a["t_s"], [r[0] for r in rows])
    from_csv = read_trace(tmp_path / "trace.csv")
    for name in a:
        np.testing.assert_allclose(from_csv[name], a[name], rtol=1e-8, atol=0, err_msg=name)
    assert not on_disk._numbers_path.exists(), "the numbers' scratch file is removed"


def test_empty_trace_has_its_header(tmp_path):
    """A run that ends before its first row still leaves a CSV with the column names."""
    writer = TraceWriter(tmp_path / "trace.csv")
    writer.close()
    assert (tmp_path / "trace.csv").read_text().strip() == ",".join(COLUMNS)
    assert all(len(v) == 0 for v in writer.arrays().values())


def test_a_trace_the_writing_process_cannot_write_is_reported(tmp_path, monkeypatch):
    """If the writing process cannot write a trace, closing it raises OSError with the
    reason; the process goes on serving other traces."""
    monkeypatch.setattr(record, "_open_payload",
                        lambda path, numbers: (str(tmp_path), str(numbers)))  # a folder
    writer = TraceWriter(tmp_path / "trace.csv", block_rows=5)
    for row, entry in zip(_rows(50), _logs(50)):
        writer.add(row, entry)
    with pytest.raises(OSError, match="writing the trace failed: .*Is a directory"):
        writer.close()
    monkeypatch.undo()
    after = TraceWriter(tmp_path / "after.csv")
    after.add(_rows(1)[0], {})
    after.close()
    assert len((tmp_path / "after.csv").read_text().splitlines()) == 2


def test_writing_process_protocol_in_memory(tmp_path):
    """The writing process's message loop, run here on byte streams: two traces at once,
    replies in order, and a trace left open when the input ends completed and its
    scratch file removed."""
    import io

    from sandbox.tracefile import pack_message, read_message, serve

    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    scratch = [tmp_path / "a.f64", tmp_path / "b.f64"]
    rows = _rows(3)
    source = io.BytesIO(b"".join(pack_message(m) for m in [
        ("open", 1, (str(a), str(scratch[0]))),
        ("open", 2, (str(b), str(scratch[1]))),
        ("rows", 1, (rows[:2], [{"x": 1.0}, {"x": 2.0}])),
        ("rows", 2, (rows[2:], [{}])),
        ("close", 1, None),
        ("close", 7, None),
    ]))
    sink = io.BytesIO()
    serve(source, sink)
    sink.seek(0)
    assert read_message(sink) == {"names": ["x"], "dropped": [], "rows": 2}
    assert "no open trace" in read_message(sink)["error"]
    assert len(a.read_text().splitlines()) == 3 and len(b.read_text().splitlines()) == 2
    assert np.fromfile(scratch[0]).size == 2 * (len(COLUMNS) + 1)
    assert not scratch[1].exists(), "scratch file of the trace never closed"


@pytest.mark.skipif(os.name != "posix", reason="SIGKILL is POSIX")
def test_killed_simulation_leaves_every_block_it_sent(tmp_path):
    """A simulation killed outright (SIGKILL: no clean-up runs) leaves a CSV with every
    whole block it handed over: the writing process finishes them on its own."""
    script = textwrap.dedent(f"""
        import os, signal, sys, time
        sys.path.insert(0, {str(Path(__file__).resolve().parent.parent)!r})
        from sandbox.record import COLUMNS, TraceWriter
        writer = TraceWriter(__import__("pathlib").Path({str(tmp_path / "trace.csv")!r}),
                             block_rows=10)
        for i in range(35):
            writer.add(tuple(float(i) for _ in COLUMNS), {{"k": float(i)}})
        time.sleep(0.5)
        os.kill(os.getpid(), signal.SIGKILL)
    """)
    # a scratch folder of this test's own, so other runs' scratch files do not count
    scratch = tmp_path / "scratch"
    scratch.mkdir()
    done = subprocess.run([sys.executable, "-c", script], timeout=60,
                          env={**os.environ, "TMPDIR": str(scratch)})
    assert done.returncode == -signal.SIGKILL
    lines = []
    for _ in range(100):  # the writing process may still be finishing
        lines = (tmp_path / "trace.csv").read_text().splitlines()
        if len(lines) == 31:
            break
        time.sleep(0.05)
    assert len(lines) == 1 + 30, "header and the three blocks of ten rows sent"
    assert lines[0].split(",")[-1] == "log.k"
    assert lines[-1].split(",")[0] == "29"
    numbers = list(scratch.glob("upright-trace-*.f64"))
    assert not numbers, "the writing process removes its scratch file when nobody reads it"


def _trace_in_a_worker(folder: str) -> int:
    """Write a short trace in this (worker) process; the pid of its writing process."""
    writer = TraceWriter(Path(folder) / "trace.csv")
    writer.add(_rows(1)[0], {})
    writer.close()
    return record.writing_process().process.pid


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc")
def test_a_worker_process_waits_for_its_writing_process(tmp_path):
    """A multiprocessing worker (which leaves through os._exit, past atexit) still ends its
    writing process and waits for it: nothing is left for init to reap."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    with ProcessPoolExecutor(1, mp_context=multiprocessing.get_context("fork")) as pool:
        helper = pool.submit(_trace_in_a_worker, str(tmp_path)).result()
    status = Path(f"/proc/{helper}/stat")
    state = status.read_text().split()[2] if status.exists() else "gone"
    assert state == "gone", f"the worker's writing process is left behind (state {state})"
    assert len((tmp_path / "trace.csv").read_text().splitlines()) == 2


def test_without_a_writing_process_the_trace_is_written_here(tmp_path, monkeypatch):
    """Where no helper process can start, the same CSV bytes are written in this process."""
    rows, logs = _rows(120, seed=2), _logs(120)
    helper = TraceWriter(tmp_path / "helper.csv")
    for row, entry in zip(rows, logs):
        helper.add(row, dict(entry))
    helper.close()

    def cannot_start():
        raise OSError("no interpreter to run")

    monkeypatch.setattr(record, "writing_process", cannot_start)
    here = TraceWriter(tmp_path / "here.csv")
    for row, entry in zip(rows, logs):
        here.add(row, dict(entry))
    here.close()
    assert (tmp_path / "here.csv").read_bytes() == (tmp_path / "helper.csv").read_bytes()
    for name, values in helper.arrays().items():
        np.testing.assert_array_equal(here.arrays()[name], values, err_msg=name)
    empty = TraceWriter(tmp_path / "empty.csv")
    empty.close()
    assert (tmp_path / "empty.csv").read_text().strip() == ",".join(COLUMNS)


def test_a_ctrl_c_mid_message_waits_until_the_message_is_whole(tmp_path, monkeypatch):
    """SIGINT arriving while a block of rows is being written to the writing process: the
    KeyboardInterrupt comes once the message is whole, so the trace still closes with
    every row (it used to leave the stream out of step: 'the trace-writing process is
    gone', exit 2 instead of 130)."""
    writer = TraceWriter(tmp_path / "trace.csv", block_rows=10)
    rows = _rows(25)
    process = record.writing_process()
    real_write = process.process.stdin.write
    hit = []

    def write_with_a_signal(data):
        if not hit:  # the first block: the signal lands between its two halves
            hit.append(True)
            half = len(data) // 2
            real_write(data[:half])
            os.kill(os.getpid(), signal.SIGINT)
            return real_write(data[half:])
        return real_write(data)

    monkeypatch.setattr(process.process.stdin, "write", write_with_a_signal)
    added = 0
    with pytest.raises(KeyboardInterrupt):
        for row in rows:
            added += 1  # the row that flushes the block is in it when the signal comes
            writer.add(row, {})
    assert hit and process.usable(), "the stream is still in step"
    writer.close()
    assert read_trace(tmp_path / "trace.csv")["t_s"].size == added
