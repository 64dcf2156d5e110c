"""One orchestrator per campaign: an advisory lock file in the campaign folder.

The lock is an ``flock`` on ``campaign.lock``, held for the whole run. The kernel drops it when
the holder dies for any reason (``kill -9`` included), so a lock left by a dead run is never
mistaken for a live one; the file's content (host, pid, start time) only serves the messages.
``flock`` is reliable between processes on one machine; campaign folders on network file systems
shared by several login nodes should be run from one node at a time.
"""

from __future__ import annotations

import fcntl
import json
import os
import socket
import time
from pathlib import Path
from types import TracebackType

from sortie.errors import CampaignError

LOCK_NAME = "campaign.lock"


class CampaignLock:
    """Hold the campaign folder's lock; a context manager.

    Raises
    ------
    CampaignError
        When another live process holds the lock; the message names its host and pid.
    """

    def __init__(self, directory: Path) -> None:
        self.path = Path(directory) / LOCK_NAME
        self._fd: int | None = None
        self.took_over: dict[str, object] | None = None

    def acquire(self) -> CampaignLock:
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as err:
            raise CampaignError(f"{self.path}: the campaign lock cannot be created ({err.strerror or err}); "
                                "the campaign folder must be writable") from None
        try:
            _flock_briefly(fd, fcntl.LOCK_EX)
        except BlockingIOError:
            holder = _read(fd)
            os.close(fd)
            since = time.strftime("%Y-%m-%d %H:%M:%S", time.localtime(float(holder.get("since", 0) or 0)))
            raise CampaignError(
                f"{self.path.parent} is being run by pid {holder.get('pid', '?')} on host {holder.get('host', '?')} "
                f"(since {since}); one orchestrator per campaign: wait for it, or stop it with kill -INT "
                f"{holder.get('pid', 'PID')} on that host") from None
        previous = _read(fd)
        if previous.get("pid"):
            self.took_over = previous  # a holder that ended without releasing: it is gone, the kernel says so
        record = {"host": socket.gethostname(), "pid": os.getpid(), "since": time.time()}
        os.ftruncate(fd, 0)
        os.pwrite(fd, json.dumps(record).encode(), 0)
        self._fd = fd
        return self

    def release(self) -> None:
        if self._fd is None:
            return
        os.ftruncate(self._fd, 0)  # an empty file means "released cleanly"
        fcntl.flock(self._fd, fcntl.LOCK_UN)
        os.close(self._fd)
        self._fd = None

    def stale_message(self) -> str | None:
        """A line for the user when a stale lock was taken over, else None."""
        if self.took_over is None:
            return None
        return (f"took over the lock of pid {self.took_over.get('pid')} on host {self.took_over.get('host')}, "
                "which ended without releasing it")

    def __enter__(self) -> CampaignLock:
        return self.acquire()

    def __exit__(self, exc_type: type[BaseException] | None, exc: BaseException | None, tb: TracebackType | None) -> None:
        self.release()


def _flock_briefly(fd: int, kind: int, tries: int = 5) -> None:
    """``flock`` without blocking, tried a few times over 0.4 s: a status probe (:func:`holder`)
    holds a shared lock for microseconds, which must not be mistaken for a running orchestrator."""
    for attempt in range(tries):
        try:
            fcntl.flock(fd, kind | fcntl.LOCK_NB)
            return
        except BlockingIOError:
            if attempt == tries - 1:
                raise
            time.sleep(0.1)


def holder(directory: Path) -> dict[str, object] | None:
    """The live holder of a campaign's lock (its host, pid and start time), or None if nobody holds it.

    Asks the kernel (a shared ``flock`` tried once and dropped at once), so a holder that died,
    ``kill -9`` included, is never reported. Works on a read-only campaign folder.
    """
    try:
        fd = os.open(Path(directory) / LOCK_NAME, os.O_RDONLY)
    except OSError:
        return None  # no lock file: no run has ever held it
    try:
        fcntl.flock(fd, fcntl.LOCK_SH | fcntl.LOCK_NB)
    except BlockingIOError:
        return _read(fd) or {"pid": None, "host": None}
    else:
        fcntl.flock(fd, fcntl.LOCK_UN)
        return None
    finally:
        os.close(fd)


def _read(fd: int) -> dict[str, object]:
    try:
        data = os.pread(fd, 4096, 0)
        value = json.loads(data.decode()) if data.strip() else {}
    except (OSError, ValueError):
        return {}
    return value if isinstance(value, dict) else {}
