"""Leases on runs: who is running a cell, and whether they are still alive.

A job claims its cell (the run fingerprint) by creating its MLflow run before
it computes anything, and keeps the claim alive with a heartbeat tag written
every ``HEARTBEAT_SECONDS``. Any launch, on any host, treats a RUNNING run
whose heartbeat is older than the lease as dead: it marks it KILLED and may
run the cell itself. On the same host a run whose process is gone (checked by
process id *and* start time, so a reused id does not count) is dead at once.

A job that runs in a worker process also watches the process that launched
it: when the launcher dies (kill -9 of the parent), the worker marks its run
KILLED and exits instead of finishing a run nobody waits for.
"""

from __future__ import annotations

import os
import socket
import threading
import time

HEARTBEAT_SECONDS = float(os.environ.get("EVENFLAG_HEARTBEAT_SECONDS", "10"))
LEASE_SECONDS = float(os.environ.get("EVENFLAG_LEASE_SECONDS", str(6 * HEARTBEAT_SECONDS)))
LAUNCHER_PID_ENV = "EVENFLAG_LAUNCHER_PID"
LAUNCHER_HOST_ENV = "EVENFLAG_LAUNCHER_HOST"
LAUNCH_ID_ENV = "EVENFLAG_LAUNCH_ID"


def process_start(pid: int) -> str:
    """Start time of a process in clock ticks since boot (Linux /proc), '' elsewhere."""
    try:
        with open(f"/proc/{pid}/stat", "rb") as handle:
            fields = handle.read().rsplit(b")", 1)[1].split()
        return fields[19].decode()
    except (OSError, IndexError):
        return ""


def process_alive(pid: int, start: str = "") -> bool:
    """Is this process (this id *and* this start time, when known) still running?"""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass
    return not start or process_start(pid) in ("", start)


def identity_tags(prefix: str) -> dict[str, str]:
    pid = os.getpid()
    return {f"{prefix}host": socket.gethostname(), f"{prefix}pid": str(pid),
            f"{prefix}pid_start": process_start(pid), f"{prefix}heartbeat": f"{time.time():.3f}",
            f"{prefix}launch": os.environ.get(LAUNCH_ID_ENV, "")}


def is_dead(tags: dict[str, str], prefix: str, now: float | None = None) -> str | None:
    """Why a RUNNING run is dead, or None if it may still be alive."""
    now = time.time() if now is None else now
    try:
        beat = float(tags.get(f"{prefix}heartbeat", "0") or 0)
    except ValueError:
        beat = 0.0
    if now - beat > LEASE_SECONDS:
        return f"no heartbeat for {now - beat:.0f} s (lease {LEASE_SECONDS:.0f} s)"
    if tags.get(f"{prefix}host") == socket.gethostname():
        pid = int(tags.get(f"{prefix}pid", "0") or 0)
        if pid and not process_alive(pid, tags.get(f"{prefix}pid_start", "")):
            return f"its process {pid} on this host is gone"
    return None


class Heartbeat:
    """Writes the heartbeat tag of a run every HEARTBEAT_SECONDS until stopped;
    in a worker process also ends the worker if its launcher has died."""

    def __init__(self, beat, on_orphaned=None):
        self._beat = beat                 # callable writing the heartbeat tag
        self._on_orphaned = on_orphaned   # callable run before exiting when the launcher is gone
        self._stop = threading.Event()
        launcher = int(os.environ.get(LAUNCHER_PID_ENV, "0") or 0)
        same_host = os.environ.get(LAUNCHER_HOST_ENV) == socket.gethostname()
        self._launcher = launcher if same_host and launcher != os.getpid() else 0
        self._thread = threading.Thread(target=self._loop, name="evenflag-heartbeat", daemon=True)
        self._thread.start()

    def _loop(self):
        last = time.monotonic()
        while not self._stop.wait(1.0):
            if self._launcher and not process_alive(self._launcher):
                if self._on_orphaned is not None:
                    try:
                        self._on_orphaned()
                    finally:
                        os._exit(3)
                os._exit(3)
            if time.monotonic() - last >= HEARTBEAT_SECONDS:
                last = time.monotonic()
                try:
                    self._beat()
                except Exception:  # a missed beat is retried next time; the lease allows several
                    pass

    def stop(self):
        self._stop.set()
        self._thread.join(timeout=5)
