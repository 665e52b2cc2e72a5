"""Telling the user's Ctrl-C from a KeyboardInterrupt a controller raises, and holding a
Ctrl-C back while a message is half written.

Python turns SIGINT into ``KeyboardInterrupt`` wherever the main thread happens to be,
and a controller script can raise the same exception itself. :func:`install` replaces
Python's default SIGINT handler with one that behaves the same but counts the
signals, so :func:`is_user_interrupt` can tell the two apart. :func:`deferred` holds
a Ctrl-C back for the length of a short critical section (one message to the
trace-writing process) and raises it at the end, so no message is ever torn.
"""

from __future__ import annotations

import os
import signal
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager

_signals_seen = 0  # SIGINTs taken by our handler, not yet matched to a KeyboardInterrupt
_installed = False
_ignored = False  # SIGINT ignored when we looked (nohup, a background job): no Ctrl-C comes


def _on_sigint(signum, frame) -> None:
    global _signals_seen
    _signals_seen += 1
    raise KeyboardInterrupt


def install() -> bool:
    """Count Ctrl-Cs from now on (main thread, default handler only). True when counting."""
    global _installed, _ignored
    if threading.current_thread() is not threading.main_thread():
        return _installed
    current = signal.getsignal(signal.SIGINT)
    _ignored = current is signal.SIG_IGN
    if current is signal.default_int_handler:
        signal.signal(signal.SIGINT, _on_sigint)
        _installed = True
    elif current is _on_sigint:
        _installed = True
    else:
        _installed = False
    return _installed


def is_user_interrupt(err: BaseException) -> bool:
    """Whether ``err`` is a Ctrl-C from the user (a signal), not one a controller raised.

    Without our handler in place every KeyboardInterrupt counts as the user's, unless
    SIGINT was ignored (started with nohup or as a background job): then none is.
    """
    global _signals_seen
    if not isinstance(err, KeyboardInterrupt):
        return False
    if _ignored and signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
        return False
    if not _installed or signal.getsignal(signal.SIGINT) is not _on_sigint:
        return True
    if _signals_seen > 0:
        _signals_seen = 0
        return True
    return False


@contextmanager
def deferred() -> Iterator[None]:
    """Hold a Ctrl-C until the block ends, then raise it (main thread; elsewhere a no-op,
    since only the main thread ever gets the KeyboardInterrupt of a signal)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    pending: list[int] = []
    try:
        previous = signal.signal(signal.SIGINT, lambda signum, frame: pending.append(signum))
    except (ValueError, OSError):  # no signals here (an embedded interpreter)
        yield
        return
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
    if pending:
        if callable(previous):
            previous(signal.SIGINT, None)
        elif previous == signal.SIG_DFL:
            raise KeyboardInterrupt


class ProcessExit(SystemExit):
    """``os._exit(status)`` called by a controller run in this process."""

    def __init__(self, status: int) -> None:
        super().__init__(status)
        self.os_exit_status = status


@contextmanager
def exits_raise() -> Iterator[None]:
    """While the block runs, ``os._exit`` called in this process raises ``SystemExit``
    in this thread instead of ending the process on the spot (no summary, exit 0): a
    controller script run in-process that calls it ends as a controller error, its trace
    kept. Other threads and a forked child (another process id) still leave at once."""
    real_exit = os._exit
    owner = os.getpid()
    runner = threading.get_ident()

    def _exit(status: int) -> None:
        # only the thread that runs the controller is caught: a Dask worker's own
        # threads, a parent watcher, a forked child still leave at once
        if os.getpid() != owner or threading.get_ident() != runner:
            real_exit(status)
        raise ProcessExit(status)

    os._exit = _exit
    try:
        yield
    finally:
        os._exit = real_exit


def end_with_parent(parent: int | None = None, poll: float = 0.5) -> None:
    """In a helper process (a pool or suite worker): leave within ``poll`` seconds of
    the parent's death, however it died (SIGKILL too), instead of running on orphaned.
    A watcher thread sees the parent change (the orphan is handed to init or a
    subreaper). ``parent``: the process id the parent had when it started this one
    (it may already have died while this one was importing); default: the parent now."""
    first_parent = os.getppid() if parent is None else parent
    leave = os._exit  # the real one: a run replaces os._exit while it goes (exits_raise)

    def watch() -> None:
        while True:
            time.sleep(poll)
            if os.getppid() != first_parent:
                leave(1)

    threading.Thread(target=watch, name="upright-parent-watch", daemon=True).start()
