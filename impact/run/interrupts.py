"""Ctrl-C and SIGTERM around steps that must not be cut in half.

Python delivers a signal as an exception at whatever line the main thread is running. Inside a
library's own clean-up (a zip archive closing, a file being renamed) that exception can be
replaced by the library's complaint about the half-finished state, and the command then reports
an error instead of an interruption. Short steps run with the signals *held*: a signal that
arrives is noted and delivered once the step is complete.
"""
from __future__ import annotations

import signal
import threading
from contextlib import contextmanager

# The signals a user or a batch scheduler sends to stop a run.
STOPPING = (signal.SIGINT, signal.SIGTERM)


@contextmanager
def held():
    """Run the enclosed step whole; a stop signal that arrives meanwhile is delivered after it.

    Off the main thread (where Python never delivers signals) nothing changes. A handler that
    was installed outside Python (``signal.getsignal`` gives None) is restored as the default.
    """
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    caught: list[int] = []

    def note(signum, frame):
        caught.append(signum)

    before = {}
    try:
        for s in STOPPING:
            before[s] = signal.signal(s, note)
    except ValueError:  # pragma: no cover - an embedding interpreter without signal support
        pass
    try:
        yield
    finally:
        for s, handler in before.items():
            signal.signal(s, signal.SIG_DFL if handler is None else handler)
        if caught:
            signal.raise_signal(caught[0])


def ignore_from_now_on():
    """Ctrl-C and SIGTERM no longer stop the process (the command line restores its handlers).

    Off the main thread, where handlers cannot be set, nothing changes.
    """
    try:
        for s in STOPPING:
            signal.signal(s, signal.SIG_IGN)
    except ValueError:
        pass
