"""A controller in a process of its own (``--isolate``), and the global seeds of both modes.

:func:`build_controller` is what the runner calls to get its controller object. In
process it seeds Python's ``random`` and numpy's global generator from the run's
seed (:func:`seed_globals`) and builds the class. Isolated, it starts a child
process that holds only the readings and returns only the duties: the script is
loaded there, with the same seeds, a memory limit (address space), a scratch
working directory, SIGINT ignored (the user's Ctrl-C is the runner's) and a
parent-death signal, and :class:`IsolatedController` (``.step(r)``, ``.reset()``,
logs copied into ``r``) stands in for it. Every call waits at most
``step_timeout`` s of wall clock. Whatever goes wrong in there (an exception of
any kind, ``sys.exit``, ``os._exit``, a crash, a duty that is no float, a hang)
comes back as :class:`sandbox.control.ControllerError` naming the cause.

A guard against accidents and casual cheating, not a security boundary: the child
runs as the same user with the same file access.

Wire format (one pair of pipes, raw ``os.read``/``os.write``; about 25 µs a tick
here): requests are fixed ``REQUEST`` records; replies are a ``REPLY_HEAD``
(kind, body length) and a body: ``D`` duties (two float64), then, when the tick
logged channels, their count, values and comma-joined names; ``E`` an error
text (a second part, after a NUL, is the child's traceback); ``I`` ready (body:
whether the class has ``reset``).
"""

from __future__ import annotations

import json
import multiprocessing
import os
import random
import select
import shutil
import signal
import struct
import sys
import tempfile
import threading
import time
import types
import weakref
from functools import partial
from typing import Any

import numpy as np

from . import interrupts, wire
from .contract import (
    _GOOD_LOG_NAMES,
    ControllerError,
    Reading,
    RobotFacts,
    Setpoint,
    _check_log_name,
)
from .duties import duty_floats
from .scripts import (
    TrackedConfig,
    failure_text,
    load_controller_class,
    make_controller,
    tracked_config,
)

DEFAULT_STEP_TIMEOUT = 1.0  # s of wall clock per step/reset call
LOAD_TIMEOUT = 30.0  # s to import the script and build the class in the child
DEFAULT_MEMORY_LIMIT = 1 << 30  # bytes of address space the child may add to its start
MAX_LOG_CHANNELS = 1000  # per tick, from the child

REQUEST = struct.Struct("<c10d2q")  # kind, t, gyro xyz, accel xyz, battery, setpoint, ticks
REPLY_HEAD = struct.Struct("<cI")
DUTIES = struct.Struct("<dd")
COUNT = struct.Struct("<I")
_QUIET = (0.0,) * 10 + (0, 0)
PR_SET_PDEATHSIG = 1  # linux/prctl.h
REPLY_SPIN = 300e-6  # s the runner looks for a reply before it sleeps on the pipe


def seed_globals(seed: int) -> None:
    """Seed Python's ``random`` and numpy's global generator from a run's seed."""
    random.seed(seed)
    np.random.seed(seed % (1 << 32))


def build_controller(cls: type, settings: Any, robot: RobotFacts,
                     started: IsolatedController | None = None) -> Any:
    """The runner's controller object for ``settings`` (a RunSettings): the class built
    here (``settings.isolate`` false) or an :class:`IsolatedController` (``started``: one
    :func:`start_isolated` began, now waited for)."""
    interrupts.install()
    if getattr(settings, "isolate", False):
        controller = started or start_isolated(cls, settings, robot)
        controller.wait_ready()
        return controller
    seed_globals(settings.seed)
    return make_controller(cls, settings.config, robot)


def start_isolated(cls: type, settings: Any, robot: RobotFacts) -> IsolatedController:
    """Start the controller's process; it loads the script while the caller builds its
    world, and :meth:`IsolatedController.wait_ready` waits for it."""
    return IsolatedController(settings.controller, settings.config, robot,
                              seed=settings.seed,
                              step_timeout=getattr(settings, "step_timeout",
                                                   DEFAULT_STEP_TIMEOUT),
                              has_reset=callable(getattr(cls, "reset", None)), wait=False)


def _context() -> Any:
    """Forkserver where there is one (a child in a few ms once the server runs), else spawn."""
    if "forkserver" in multiprocessing.get_all_start_methods():
        context = multiprocessing.get_context("forkserver")
        context.set_forkserver_preload(["sandbox.isolate"])
        return context
    return multiprocessing.get_context("spawn")


def warm_up() -> None:
    """Start the fork server now (it imports numpy while the caller builds its world), so
    the first isolated controller starts in milliseconds."""
    context = _context()
    if context.get_start_method() == "forkserver":
        from multiprocessing import forkserver

        main = sys.modules["__main__"]
        sys.modules["__main__"] = types.ModuleType("__main__")
        try:
            forkserver.ensure_running()
        finally:
            sys.modules["__main__"] = main


class IsolatedController:
    """Stands in for a controller that runs in a child process (see the module's text)."""

    def __init__(self, script: str, config: dict, robot: RobotFacts, *, seed: int = 0,
                 step_timeout: float = DEFAULT_STEP_TIMEOUT,
                 memory_limit: int = DEFAULT_MEMORY_LIMIT, has_reset: bool = True,
                 wait: bool = True):
        self.step_timeout = float(step_timeout)
        self.broken = ""
        self.scratch = tempfile.mkdtemp(prefix="upright-controller-")
        # with a core to spare, requests go through a shared page (sandbox.wire)
        page = wire.new_page() if wire.spare_core() else None
        self._slot = wire.RunnerSlot(page) if page else None
        self._page = page  # its name, until the child has mapped it
        context = _context()
        request_r, request_w = context.Pipe(duplex=False)
        reply_r, reply_w = context.Pipe(duplex=False)
        script = _absolute_spec(script)
        process = context.Process(
            target=_child_main, name="upright-controller", daemon=False,
            args=(request_r, reply_w, script, dict(config or {}), robot, seed, os.getpid(),
                  memory_limit, self.scratch, page))
        _start(process)
        request_r.close()
        reply_w.close()
        self.process = process
        self._connections = (request_w, reply_r)  # the fds live as long as these
        self._out, self._in = request_w.fileno(), reply_r.fileno()
        # The time limit costs the tick nothing: a watchdog thread kills a child that has
        # owed an answer for too long, and the blocked read then ends.
        self._owed = False  # a request sent whose reply is not yet read
        self._on_page = False  # the last request went through the shared page
        self._asked = [0.0, 0.0, ""]  # monotonic time asked (0: nothing owed), limit, call
        self._timed_out: list[str] = []
        stop = threading.Event()
        threading.Thread(target=_watchdog, args=(self._asked, self._timed_out, process, stop),
                         name="upright-step-timeout", daemon=True).start()
        self._finalizer = weakref.finalize(self, _shutdown, process, self._connections,
                                           self.scratch, stop, self._slot, page)
        self._has_reset = has_reset
        self._ready = False
        self._send(b"", LOAD_TIMEOUT, "loading and building the controller")
        if wait:
            self.wait_ready()

    def wait_ready(self) -> None:
        """Wait until the child has loaded the script and built the controller."""
        if self._ready:
            return
        kind, body = self._receive()
        if kind != b"I":
            self._fail(f"the controller's process answered {kind!r} when ready was expected")
        self._ready = True
        if self._page is not None:  # both ends have it mapped: no name left behind
            try:
                os.unlink(self._page)
            except OSError:
                pass
            self._page = None
        if self._has_reset and body == b"1":  # the runner checks hasattr(controller, "reset")
            self.reset = self._reset

    def step(self, r: Reading) -> tuple[float, float]:
        self.post(r)
        return self.collect(r)

    def post(self, r: Reading) -> None:
        """Hand the child this tick's reading; :meth:`collect` takes its duties later (the
        runner does its physics meanwhile when the board's compute time delays them)."""
        gyro, accel, ticks, setpoint = r.gyro, r.accel, r.ticks, r.setpoint
        self._send(REQUEST.pack(b"S", r.t, gyro[0], gyro[1], gyro[2], accel[0], accel[1],
                                accel[2], r.battery_v, setpoint.speed, setpoint.turn,
                                ticks[0], ticks[1]), self.step_timeout, "step")

    def collect(self, r: Reading) -> tuple[float, float]:
        """The duties answering the last :meth:`post`; logs it sent go into ``r``."""
        kind, body = self._receive()
        if kind != b"D" or len(body) < DUTIES.size:
            self._fail(f"the controller's process answered {kind!r} to step")
        if len(body) > DUTIES.size:
            r.logs = _decode_logs(body)
        return DUTIES.unpack_from(body)

    def _reset(self) -> None:
        kind, _ = self._ask(REQUEST.pack(b"R", *_QUIET), self.step_timeout, "reset")
        if kind != b"D":
            self._fail(f"the controller's process answered {kind!r} to reset")

    def config_reads(self) -> TrackedConfig | None:
        """The config keys the script has read in its process, or None where it cannot
        say (the child gone, an unreadable answer)."""
        try:
            kind, body = self._ask(REQUEST.pack(b"K", *_QUIET), self.step_timeout,
                                   "config reads")
        except ControllerError:
            return None
        return _decode_reads(body) if kind == b"K" else None

    def close(self) -> None:
        """End the child process and remove its scratch folder."""
        self._finalizer()

    # -- the wire

    def _ask(self, request: bytes, timeout: float, call: str) -> tuple[bytes, bytes]:
        if self._owed:  # a step posted and never collected (the run was cut short)
            try:
                self._receive()
            except ControllerError:
                pass
        self._send(request, timeout, call)
        return self._receive()

    def _send(self, request: bytes, timeout: float, call: str) -> None:
        if self.broken:
            raise ControllerError(self.broken)
        asked = self._asked
        asked[1], asked[2] = timeout, call
        asked[0] = time.monotonic()
        self._owed = True
        self._on_page = self._slot is not None and bool(request) and self._slot.offer(request)
        if request and not self._on_page:
            try:
                os.write(self._out, request)
            except OSError:  # the pipe broke: the child has gone
                self._owed = False
                asked[0] = 0.0
                self._fail(self._timed_out[0] if self._timed_out else self._ended())

    def _receive(self) -> tuple[bytes, bytes]:
        if self.broken:
            raise ControllerError(self.broken)
        asked = self._asked
        self._owed = False
        try:
            data = self._read_reply()
            if len(data) < REPLY_HEAD.size:
                data = _read_more(self._in, data, REPLY_HEAD.size)
            kind, size = REPLY_HEAD.unpack_from(data)
            if size > (1 << 24):
                self._fail(f"the controller's process sent a reply of {size} bytes")
            if len(data) < REPLY_HEAD.size + size:
                data = _read_more(self._in, data, REPLY_HEAD.size + size)
            body = data[REPLY_HEAD.size:]
        except (OSError, EOFError, struct.error):  # the pipe broke: the child has gone
            asked[0] = 0.0
            self._fail(self._timed_out[0] if self._timed_out else self._ended())
        except KeyboardInterrupt:  # the user's Ctrl-C mid-call: the stream is out of step
            asked[0] = 0.0
            self.broken = "the controller's process was stopped by Ctrl-C"
            self.close()
            raise
        asked[0] = 0.0
        if kind == b"E":
            text, _, remote = body.decode("utf-8", "replace").partition("\0")
            error = ControllerError(text)
            if remote:
                error.__cause__ = _RemoteTraceback(remote)
            raise error
        return kind, body

    def _read_reply(self) -> bytes:
        # Waking a process that sleeps in read() costs tens of µs on a virtual machine;
        # with a core to spare, look for the reply for a short while first. Without
        # yielding the core: on a busy machine a yield hands it away for a whole time
        # slice, milliseconds. Measured in bench/isolate_cost.py (DEVELOPERS.md).
        if self._on_page:  # (a child waiting on the pipe is on a busy machine: no spin)
            fd, until = self._in, time.perf_counter() + REPLY_SPIN
            ready = select.select
            while not ready((fd,), (), (), 0.0)[0]:
                if time.perf_counter() > until:
                    break
        return os.read(self._in, 65536)

    def _ended(self) -> str:
        self.process.join(2.0)
        code = self.process.exitcode
        if code is None:
            return "the controller's process stopped answering"
        if code < 0:
            try:
                name = signal.Signals(-code).name
            except ValueError:
                name = f"signal {-code}"
            return f"the controller's process was killed ({name})"
        return f"the controller's process ended (exit code {code})"

    def _fail(self, message: str) -> None:
        self.broken = message
        self.close()
        raise ControllerError(message)


class _RemoteTraceback(Exception):
    """The child's traceback, as text (shown as the cause in controller_error.txt)."""

    def __str__(self) -> str:
        return "\n" + self.args[0]


def _absolute_spec(script: str) -> str:
    path, colon, name = str(script).rpartition(":")
    if colon and path.endswith(".py"):
        return os.path.abspath(path) + ":" + name
    return os.path.abspath(str(script))


def _start(process: Any) -> None:
    me = multiprocessing.current_process()
    daemonic = me.daemon
    if daemonic:
        # A daemonic worker (Dask's) may not start children; this one is tied to its
        # parent by the parent-death signal and its pipe instead.
        me._config["daemon"] = False
    # The child needs nothing of the program's main module; without this swap it would
    # import it again, and a script without an ``if __name__ == "__main__"`` guard would
    # run itself there.
    main = sys.modules["__main__"]
    sys.modules["__main__"] = types.ModuleType("__main__")
    try:
        process.start()
    finally:
        sys.modules["__main__"] = main
        if daemonic:
            me._config["daemon"] = True


def _shutdown(process: Any, connections: tuple, scratch: str, stop: threading.Event,
              slot: wire.RunnerSlot | None, page: str | None) -> None:
    stop.set()
    if page is not None:
        slot.close()
        try:
            os.unlink(page)
        except OSError:
            pass
    for connection in connections:  # end of input: the child leaves by itself
        try:
            connection.close()
        except OSError:
            pass
    if process.pid is not None and process.exitcode is None:
        process.join(0.5)
        if process.exitcode is None:
            process.kill()
            process.join(5.0)
    shutil.rmtree(scratch, ignore_errors=True)


def _watchdog(asked: list, timed_out: list, process: Any, stop: threading.Event) -> None:
    """Kill the child when a call has waited longer than its limit (checked every 50 ms)."""
    while not stop.wait(0.05):
        since, limit, call = asked
        if since and time.monotonic() - since > limit:
            timed_out.append(f"{call} took longer than {limit:g} s (the step timeout); the "
                             "controller's process was stopped")
            process.kill()
            return


def _read_more(fd: int, data: bytes, size: int) -> bytes:
    while len(data) < size:
        more = os.read(fd, size - len(data))
        if not more:
            raise EOFError
        data += more
    return data


def _read_exact(fd: int, size: int) -> bytes | None:
    data = os.read(fd, size)
    if not data:
        return None
    while len(data) < size:
        more = os.read(fd, size - len(data))
        if not more:
            return None
        data += more
    return data


def _decode_logs(body: bytes) -> dict[str, float]:
    """The channels the child logged; checked again here (the child is not trusted)."""
    try:
        (count,) = COUNT.unpack_from(body, DUTIES.size)
        if count > MAX_LOG_CHANNELS:
            raise ControllerError(f"r.log: more than {MAX_LOG_CHANNELS} channels in one tick")
        start = DUTIES.size + COUNT.size
        values = struct.unpack_from(f"<{count}d", body, start)
        names = body[start + 8 * count:].decode("ascii").split(",")
    except (struct.error, UnicodeDecodeError):
        raise ControllerError("the controller's process sent unreadable log channels") from None
    if len(names) != count:
        raise ControllerError("the controller's process sent unreadable log channels")
    for name in names:
        if name not in _GOOD_LOG_NAMES:
            _check_log_name(name)
    return dict(zip(names, values))


def _encode_logs(logs: dict[str, float]) -> bytes:
    return (COUNT.pack(len(logs)) + struct.pack(f"<{len(logs)}d", *logs.values())
            + ",".join(logs).encode("ascii"))


# ----------------------------------------------------------------------- the child


def _child_main(requests: Any, replies: Any, script: str, config: dict, robot: RobotFacts,
                seed: int, parent: int, memory_limit: int, scratch: str,
                page: str | None) -> None:
    """The child process: load, build, then answer requests until the input ends."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    _die_with(parent)
    out = replies.fileno()
    source = requests.fileno()
    slot = None
    try:
        if page is not None:
            slot = wire.ChildSlot(page, REQUEST.size)
        os.chdir(scratch)
        for name in ("pybullet", "pybullet_data"):  # the engine is not the controller's
            sys.modules[name] = None  # type: ignore[assignment]
        _limit_memory(memory_limit)
        seed_globals(seed)
        cls = load_controller_class(script)
        controller = make_controller(cls, config, robot)
    except BaseException as err:  # noqa: BLE001 - every way a script fails is reported
        _send_error(out, err if isinstance(err, ControllerError) or isinstance(err, ValueError)
                    else ControllerError(failure_text("loading the controller", err)))
        os._exit(0)
    reset = getattr(controller, "reset", None)
    _send(out, b"I", b"1" if callable(reset) else b"0")
    step = controller.step
    reading = Reading(dt=1.0 / robot.rate_hz)
    unpack, size = REQUEST.unpack, REQUEST.size
    with interrupts.exits_raise():
        _answer(source, out, step, reset, reading, unpack, size, cls,
                tracked_config(controller), slot)
    os._exit(0)  # past any thread or atexit handler the script left behind


def _answer(source: int, out: int, step: Any, reset: Any, reading: Reading, unpack: Any,
            size: int, cls: type, config: TrackedConfig | None,
            slot: wire.ChildSlot | None = None) -> None:
    """Answer requests until the input ends. A copy of this process the script forked
    leaves at once, silently: only the process the parent started may answer."""
    me = os.getpid()
    from_pipe = partial(_read_exact, source, size)
    while True:
        try:
            request = (from_pipe() if slot is None
                       else slot.next_request(source, from_pipe))
        except OSError:
            break
        if request is None:
            break
        (kind, t, g0, g1, g2, a0, a1, a2, battery, speed, turn, tick_l,
         tick_r) = unpack(request)
        try:
            if kind == b"S":
                reading.t = t
                reading.gyro = (g0, g1, g2)
                reading.accel = (a0, a1, a2)
                reading.ticks = (tick_l, tick_r)
                reading.battery_v = battery
                if speed != reading.setpoint.speed or turn != reading.setpoint.turn:
                    reading.setpoint = Setpoint(speed, turn)
                left, right = duty_floats(step(reading))
                logs = reading.take_logs()
                body = DUTIES.pack(left, right) + (_encode_logs(logs) if logs else b"")
            elif kind == b"K":  # which config keys the script has read
                _send(out, b"K", _encode_reads(config))
                if slot is not None:
                    slot.replied_now()
                continue
            elif kind == b"R":
                if callable(reset):
                    reset()
                body = DUTIES.pack(0.0, 0.0)
            else:
                break
        except BaseException as err:  # noqa: BLE001
            if os.getpid() != me:
                os._exit(0)
            call = "step()" if kind == b"S" else "reset()"
            reading.take_logs()
            _send_error(out, err if isinstance(err, ControllerError)
                        else ControllerError(_with_place(failure_text(call, err), err, cls)))
            if slot is not None:
                slot.replied_now()
            continue
        if os.getpid() != me:
            os._exit(0)
        try:
            _send(out, b"D", body)
        except OSError:
            break
        if slot is not None:
            slot.replied_now()


def _with_place(text: str, err: BaseException, cls: type) -> str:
    from .scripts import script_location

    where = script_location(err, cls)
    return f"{text} ({where})" if where else text


def _encode_reads(config: TrackedConfig | None) -> bytes:
    if config is None:
        return b"{}"
    keys = sorted(k for k in config.read_keys if isinstance(k, str))
    return json.dumps({"all": config.read_all, "read": keys}).encode("utf-8")


def _decode_reads(body: bytes) -> TrackedConfig | None:
    """The child's config reads as an empty :class:`TrackedConfig` that holds them (the
    child is not trusted: anything unreadable counts as no record)."""
    try:
        data = json.loads(body.decode("utf-8"))
        read = data["read"]
        if not isinstance(read, list) or len(read) > 100_000:
            return None
        reads = TrackedConfig()
        reads.read_all = bool(data["all"])
        reads.read_keys = {k for k in read if isinstance(k, str)}
        return reads
    except (ValueError, KeyError, TypeError, UnicodeDecodeError):
        return None


def _send(fd: int, kind: bytes, body: bytes) -> None:
    data = REPLY_HEAD.pack(kind, len(body)) + body
    while data:
        written = os.write(fd, data)
        data = data[written:]


def _send_error(fd: int, err: BaseException) -> None:
    import traceback

    try:
        remote = "".join(traceback.format_exception(err))
    except BaseException:  # noqa: BLE001
        remote = ""
    try:
        _send(fd, b"E", (str(err) + "\0" + remote).encode("utf-8", "replace"))
    except OSError:
        pass


def _limit_memory(extra: int) -> None:
    try:
        import resource
    except ImportError:  # not on Windows
        return
    try:
        with open("/proc/self/statm") as stream:
            now = int(stream.read().split()[0]) * os.sysconf("SC_PAGE_SIZE")
    except (OSError, ValueError):
        now = 0
    limit = now + extra
    resource.setrlimit(resource.RLIMIT_AS, (limit, limit))


def _die_with(parent: int) -> None:
    """End this process when the runner's process ends, however it ends."""
    if sys.platform.startswith("linux"):
        try:
            import ctypes

            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(PR_SET_PDEATHSIG, signal.SIGKILL, 0, 0, 0)
        except (OSError, AttributeError):
            pass
    first_parent = os.getppid()
    leave = os._exit  # the real one: answering replaces os._exit (interrupts.exits_raise)

    def watch() -> None:
        while True:
            time.sleep(0.5)
            if os.getppid() != first_parent or not _alive(parent):
                leave(1)

    threading.Thread(target=watch, name="upright-parent-watch", daemon=True).start()


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True
