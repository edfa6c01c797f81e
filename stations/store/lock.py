"""One writer at a time: an advisory ``flock(2)`` on the store's ``.lock`` file.

``flock`` locks belong to an open file description, so two opens of the lock file conflict even
inside one process, and the kernel drops the lock when its holder dies (also on ``SIGKILL``): a
crashed writer never leaves the store locked. The holder writes its process id into the file so
that a waiting writer can name it. POSIX only (``fcntl``).
"""

from __future__ import annotations

import fcntl
import os
import threading
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from pathlib import Path

from stations.errors import StoreBusyError

__all__ = ["WriteLock"]

#: Seconds between attempts while waiting; short enough to hand over quickly, long enough to
#: stay off the CPU.
_POLL_S = 0.05


class WriteLock:
    """Exclusive lock on one lock file, re-entrant for the thread that holds it.

    Threads sharing one instance queue on an in-process lock first (with the same timeout),
    so the file lock is never shared by accident; other instances and other processes queue
    on the file lock.

    Parameters
    ----------
    path : Path
        The lock file; created if missing, never removed (removing it would let two writers
        lock two different files).
    timeout_s : float
        Longest wait for another holder, in seconds; 0 fails at once.
    """

    def __init__(self, path: Path, timeout_s: float) -> None:
        self.path = path
        self.timeout_s = timeout_s
        self._fd: int | None = None
        self._depth = 0
        self._thread_lock = threading.RLock()

    @property
    def held(self) -> bool:
        """True while this instance holds the lock."""
        return self._depth > 0

    def _holder(self) -> str:
        try:
            text = self.path.read_text(encoding="ascii").strip()
        except (OSError, UnicodeDecodeError):
            return "another writer"
        return f"another writer (pid {text})" if text.isdigit() else "another writer"

    def _busy(self) -> StoreBusyError:
        return StoreBusyError(
            f"{self.path.parent}: {self._holder()} still holds the store lock after "
            f"{self.timeout_s:g} s; run again when it has finished, or raise [store] "
            "lock_timeout_s"
        )

    def _tell(self, on_wait: Callable[[str], None] | None) -> bool:
        if on_wait is None or self.timeout_s <= 0:
            return False
        on_wait(
            f"{self.path.parent}: waiting up to {self.timeout_s:g} s for {self._holder()} to "
            "release the store lock"
        )
        return True

    def acquire(self, on_wait: Callable[[str], None] | None = None) -> None:
        """Take the lock, waiting up to ``timeout_s``; ``on_wait`` gets one message if it waits.

        Raises
        ------
        StoreBusyError
            If another holder keeps the lock longer than ``timeout_s``.
        """
        deadline = time.monotonic() + self.timeout_s
        told = False
        if not self._thread_lock.acquire(blocking=False):
            told = self._tell(on_wait)
            if not self._thread_lock.acquire(timeout=self.timeout_s):
                raise self._busy()
        if self._depth:  # this thread already holds the file lock
            self._depth += 1
            return
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT, 0o644)
        except BaseException:
            self._thread_lock.release()
            raise
        try:
            while True:
                try:
                    fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                    break
                except BlockingIOError:
                    if time.monotonic() >= deadline:
                        raise self._busy() from None
                    if not told:
                        told = self._tell(on_wait)
                    time.sleep(min(_POLL_S, max(0.0, deadline - time.monotonic())))
        except BaseException:
            os.close(fd)
            self._thread_lock.release()
            raise
        os.ftruncate(fd, 0)
        os.pwrite(fd, str(os.getpid()).encode("ascii"), 0)
        self._fd = fd
        self._depth = 1

    def release(self) -> None:
        """Give the lock back (the outermost release unlocks)."""
        if self._depth == 0:
            return
        self._depth -= 1
        try:
            if self._depth == 0 and self._fd is not None:
                fd, self._fd = self._fd, None
                try:
                    fcntl.flock(fd, fcntl.LOCK_UN)
                finally:
                    os.close(fd)
        finally:
            self._thread_lock.release()

    @contextmanager
    def hold(self, on_wait: Callable[[str], None] | None = None) -> Iterator[None]:
        """Context manager around :meth:`acquire` / :meth:`release`."""
        self.acquire(on_wait)
        try:
            yield
        finally:
            self.release()
