"""Test-wide setup."""

import signal


def pytest_configure(config) -> None:
    """Let SIGINT through even when pytest was started in the background.

    A shell starts background jobs (and nohup its commands) with SIGINT ignored, and
    Python then leaves it ignored: the tests that press Ctrl-C on a run (by sending
    SIGINT to their own process) would see nothing happen. Child processes inherit
    an ignored SIGINT but not a handler, so this also gives them a normal Ctrl-C.
    """
    if signal.getsignal(signal.SIGINT) is signal.SIG_IGN:
        signal.signal(signal.SIGINT, signal.default_int_handler)
