"""Ctrl-C and SIGTERM that wait for a write to the tracking store to finish.

A KeyboardInterrupt raised in the middle of a store write (inside SQLAlchemy's
session) can leave that session's SQLite transaction open and the database
locked for this process, so the interrupted run could not then be marked
KILLED and stayed RUNNING. The launcher's handlers therefore hold a signal
that arrives during a write (``store_write``) and raise it as soon as the
write is done; at any other moment they raise at once, as Python would.
Only the main thread counts: signal handlers run there.
"""

from __future__ import annotations

import contextlib
import signal
import threading

_depth = 0
_pending: list[int] = []


def deliver(signum: int) -> None:
    """Raise the signal's exception now, or after the write in progress."""
    if _depth:
        _pending.append(signum)
        return
    _raise(signum)


def _raise(signum: int) -> None:
    if signum == signal.SIGINT:
        raise KeyboardInterrupt
    raise SystemExit("SIGTERM")


def on_sigint(signum, frame) -> None:
    deliver(signum)


@contextlib.contextmanager
def store_write():
    """Around a write to the tracking store: a signal waits until it is done."""
    global _depth
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    _depth += 1
    try:
        yield
    finally:
        _depth -= 1
        if _depth == 0 and _pending:
            signum = _pending[0]
            _pending.clear()
            _raise(signum)


def uninterrupted(method):
    """Decorator form of ``store_write`` for Tracker methods."""
    import functools

    @functools.wraps(method)
    def wrapper(*args, **kwargs):
        with store_write():
            return method(*args, **kwargs)
    return wrapper
