"""The refresh lock: one ``flock`` on ``HOME/refresh.lock``, taken without waiting.

The kernel owns the lock, not the file: when the holder dies (even by SIGKILL) its file
descriptor closes and the lock is gone, so a stale lock never needs cleaning up. The file
stays in place between runs on purpose: unlinking it would let a newcomer lock a fresh inode
while a slow process still holds the old one.

Inside the file the holder notes who it is (pid, host, start time, command line) so that a
second refresh can say whom it is waiting for. That text is information only; the lock is
the ``flock``.

NFS: Linux maps ``flock`` on NFS to a byte-range lock held by the server (NLM for NFSv3,
the lease-based lock state of NFSv4). It excludes other clients only when the mount has
working locking (not ``nolock`` / ``local_lock=all``), and after a client crash the server
frees the lock only when the lease expires (NFSv4: typically 90 s) or statd notices. Keep
HOME on a local disk, or run the scheduler on a single host. See docs/nightly.md.
"""

from __future__ import annotations

import fcntl
import json
import os
import socket
import sys
from datetime import UTC, datetime
from pathlib import Path
from types import TracebackType
from typing import Any

from ..errors import BadInputError, BusyError

LOCK_FILE = "refresh.lock"


def read_holder(path: Path) -> dict[str, Any] | None:
    """What the current (or last) holder wrote into the lock file; None when unreadable."""
    try:
        d = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    return d if isinstance(d, dict) else None


class HomeLock:
    """Exclusive, non-blocking lock of a refresh home. Use as a context manager.

    Raises :class:`BusyError` (exit 75) when another process holds it.
    """

    def __init__(self, home: Path) -> None:
        self.home = home
        self.path = home / LOCK_FILE
        self._fd: int | None = None
        self.holder: dict[str, Any] = {}

    def acquire(self) -> None:
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except OSError as e:
            raise BadInputError(
                f"{self.path}: cannot open the lock file ({e.strerror})",
                hint="check that HOME exists and is writable",
            ) from None
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            os.close(fd)
            raise self._busy() from None
        except OSError as e:  # e.g. ENOLCK on an NFS mount without a lock manager
            os.close(fd)
            raise BadInputError(
                f"{self.path}: cannot lock ({e.strerror})",
                hint="put HOME on a file system that supports flock (see docs/nightly.md)",
            ) from None
        self._fd = fd
        self.holder = {
            "pid": os.getpid(),
            "host": socket.gethostname(),
            "started": datetime.now(UTC).isoformat(timespec="seconds"),
            "argv": sys.argv,
        }
        data = (json.dumps(self.holder) + "\n").encode()
        os.ftruncate(fd, 0)
        os.pwrite(fd, data, 0)
        os.fsync(fd)

    def _busy(self) -> BusyError:
        h = read_holder(self.path)
        if h and "pid" in h:
            who = f"pid {h['pid']} on {h.get('host', '?')}, started {h.get('started', '?')}"
        else:
            who = "another process"
        return BusyError(
            f"{self.home}: a refresh is already running ({who})",
            hint="try again later (exit 75 means 'temporary'); the lock frees itself when that "
            "process ends, even if it is killed",
        )

    def release(self) -> None:
        if self._fd is None:
            return
        try:
            os.ftruncate(self._fd, 0)  # the holder's note goes first, while we still hold the lock
            fcntl.flock(self._fd, fcntl.LOCK_UN)
        finally:
            os.close(self._fd)
            self._fd = None

    def __enter__(self) -> HomeLock:
        self.acquire()
        return self

    def __exit__(
        self, et: type[BaseException] | None, ev: BaseException | None, tb: TracebackType | None
    ) -> None:
        self.release()
