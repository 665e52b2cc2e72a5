"""A shared-memory slot for an isolated controller's requests, where a core is spare.

Waking a process that sleeps in ``read()`` costs the writer 16-20 µs on the
2-core virtual machines this was measured on (a pipe ping-pong in plain Python),
which was most of what isolation cost a tick. With a core to spare, the
controller's process instead sleeps through most of the expected gap between
requests (its own timer, off the runner's path), then watches a sequence
number in a small shared page; the runner's request is then two memory writes
(about 1.5 µs). Replies stay on the pipe: the runner is awake when they come.

A child that has watched for long with nothing new says so in the page and
waits on the pipe instead; the runner then writes the request there. The
runner reads that word after publishing and the child reads the sequence
number after saying so, so a request offered just as the child turned to the
pipe is found at the child's next look, at most ``RECHECK`` s later: both ends
stay correct without a memory fence, which Python cannot issue. Used only on
x86-64 (its stores are seen in order by other cores) and not in pool workers,
whose machine has no core to spare.

The gap is measured from the child's reply to the moment the runner offered
the next request (``time.monotonic``, one clock for every process), so a child
that woke late does not lengthen its next sleep. On a busy machine a watching
process is not woken when a request comes but waits its turn behind the others
(measured: requests found 0.4-5 ms late, runs 10 x slower than through the pipe),
so the page is used only while the load average (this process included) stays
below the number of cores less a half, and a child that finds requests late (more
than ``LATE_LIMIT`` times net of timely ones) gives the page up and waits on the
pipe for the rest of the run.

Layout: sequence number (u64), child watching (u64: 1 watching, 0 on the pipe),
the time the request was offered (f64, monotonic s), then the request record.
"""

from __future__ import annotations

import mmap
import os
import platform
import select
import struct
import tempfile
import time

SEQUENCE = struct.Struct("<Q")
OFFERED = struct.Struct("<d")
WATCHING_AT = 8
OFFERED_AT = 16
REQUEST_AT = 24
NAP_SHARE = 0.5  # of the expected gap, slept before watching
LATE = 100e-6  # s after the offer: a request found later than this was found late
LATE_LIMIT = 3  # late finds (less the timely ones) after which the child gives up the page
PAGE = 4096
RECHECK = 2e-3  # s between a waiting child's looks at the page
WATCH_LONGEST = 2e-3  # s a child watches the page past the expected gap before it waits
PR_SET_TIMERSLACK = 29  # linux/prctl.h

_pool_worker = False


def no_spare_core() -> None:
    """Say that this process is one of a pool filling the machine's cores."""
    global _pool_worker
    _pool_worker = True


def spare_core() -> bool:
    """Whether a controller's process may watch the page instead of sleeping on a pipe."""
    if _pool_worker or platform.machine().lower() not in ("x86_64", "amd64"):
        return False
    try:
        cores = len(os.sched_getaffinity(0))
        busy = os.getloadavg()[0]
    except (AttributeError, OSError):
        return False
    # a machine already busy has no core to spare: a watching process would wait its
    # turn behind the others (milliseconds a tick) instead of being woken at once. The
    # load average counts this process too (about 1 while runs follow one another).
    return cores > 1 and busy < cores - 0.5


def new_page() -> str:
    """A zeroed page in shared memory (``/dev/shm`` where there is one): its path."""
    folder = "/dev/shm" if os.path.isdir("/dev/shm") else None
    fd, path = tempfile.mkstemp(prefix="upright-wire-", dir=folder)
    try:
        os.ftruncate(fd, PAGE)
    finally:
        os.close(fd)
    return path


def map_page(path: str) -> mmap.mmap:
    fd = os.open(path, os.O_RDWR)
    try:
        return mmap.mmap(fd, PAGE)
    finally:
        os.close(fd)


class RunnerSlot:
    """The runner's end: offer a request in the page while the child watches it."""

    def __init__(self, path: str):
        self.page = map_page(path)
        self.sequence = 0

    def offer(self, request: bytes) -> bool:
        """Publish ``request``; False if the child waits on the pipe (send it there)."""
        page = self.page
        if page[WATCHING_AT] != 1:
            return False
        page[REQUEST_AT:REQUEST_AT + len(request)] = request
        OFFERED.pack_into(page, OFFERED_AT, time.monotonic())
        self.sequence += 1
        SEQUENCE.pack_into(page, 0, self.sequence)
        return True

    def close(self) -> None:
        self.page.close()


class ChildSlot:
    """The controller process's end: the next request from the page or the pipe."""

    def __init__(self, path: str, size: int):
        self.page = map_page(path)
        self.size = size
        self.seen = 0
        self.gap = 0.0  # s, the expected time from a reply to the next request
        self.replied = time.monotonic()
        self.late = 0  # late finds less timely ones
        _fine_timer()

    def replied_now(self) -> None:
        self.replied = time.monotonic()

    def next_request(self, pipe: int, read_pipe) -> bytes | None:
        """The next request (None when the pipe has ended)."""
        page, unpack = self.page, SEQUENCE.unpack_from
        clock = time.monotonic
        ready = select.select
        if self.late <= LATE_LIMIT:
            page[WATCHING_AT] = 1
            if self.gap > 0.0:  # sleep through part of the usual gap on this process's timer
                nap = NAP_SHARE * self.gap - (clock() - self.replied)
                if nap > 0.0:
                    time.sleep(nap)
            until = clock() + self.gap + WATCH_LONGEST
            while True:
                if unpack(page, 0)[0] != self.seen:
                    return self._take()
                if clock() > until:
                    break
        page[WATCHING_AT] = 0  # from here the runner writes to the pipe
        while True:
            if unpack(page, 0)[0] != self.seen:  # offered as the child turned away
                return self._take()
            if ready((pipe,), (), (), RECHECK)[0]:
                return read_pipe()

    def _take(self) -> bytes:
        self.seen += 1
        page = self.page
        (offered,) = OFFERED.unpack_from(page, OFFERED_AT)
        found = time.monotonic()
        if found - offered > LATE:
            self.late += 1
        elif self.late:
            self.late -= 1
        gap = offered - self.replied
        # a shorter gap is believed at once, a longer one slowly
        self.gap = gap if (self.gap == 0.0 or gap < self.gap) else 0.9 * self.gap + 0.1 * gap
        return bytes(page[REQUEST_AT:REQUEST_AT + self.size])


def _fine_timer() -> None:
    """Ask Linux for sleeps that end on time (its default slack is 50 µs)."""
    try:
        import ctypes

        ctypes.CDLL(None, use_errno=True).prctl(PR_SET_TIMERSLACK, 1, 0, 0, 0)
    except (OSError, AttributeError):
        pass
