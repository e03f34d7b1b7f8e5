"""A lock so that two processes never write one study at the same time.

The lock is the file ``STUDY_DIR/.windowfinder.lock`` held with an exclusive, non-blocking operating-system
file lock (``fcntl.flock``; POSIX ``flock(2)``). Taking it is one atomic step of the kernel, so two
processes can never both hold it, and the kernel releases it when its holder dies, even by SIGKILL: there
is no stale lock to guess about. The holder writes its process id into the file (for the message a second
process shows: "study is busy, held by pid N", exit 2) and removes the file when done. A file left by a
killed holder still names that pid; the next command takes the lock over and says so. A file naming a
live process that holds no file lock (written by hand, or by an older version) is still respected.

Removing the file while holding the lock is safe: a process that opened the old file and then gets the
lock sees that the path no longer leads to the file it locked (different inode) and tries again.
"""

from __future__ import annotations

import errno
import os
import stat
from pathlib import Path

from windowfinder.errors import InputError

try:
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None

LOCK_NAME = ".windowfinder.lock"


def process_alive(pid: int) -> bool:
    """True when a process with this id exists (on this machine)."""
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except (ProcessLookupError, OverflowError):  # gone, or no valid process id at all
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


def _read_pid(fd: int) -> int:
    try:
        os.lseek(fd, 0, os.SEEK_SET)
        text = os.read(fd, 64).decode("ascii", "replace").strip()
        return int(text or "0")
    except (OSError, ValueError):
        return 0


class StudyLock:
    """Context manager holding the study's write lock.

    Parameters
    ----------
    directory : path-like
        The study folder. When it does not exist no lock is taken (loading it will fail anyway).

    Attributes
    ----------
    held_ : bool
        True while this object holds the lock.
    stale_pid_ : int or None
        Process id named by a lock file whose holder had died (taken over).
    """

    def __init__(self, directory):
        self.path = Path(directory) / LOCK_NAME
        self.held_ = False
        self.stale_pid_ = None
        self._fd = None

    def _open(self) -> int:
        try:
            fd = os.open(self.path, os.O_RDWR | os.O_CREAT | os.O_NONBLOCK | getattr(os, "O_NOFOLLOW", 0),
                         0o644)
        except IsADirectoryError:
            raise InputError(f"{self.path}: the study's lock file is a folder; remove it") from None
        except OSError as e:
            if e.errno == errno.ELOOP:
                raise InputError(f"{self.path}: the study's lock file is a symbolic link; remove it") from None
            raise InputError(f"{self.path}: cannot open the study's lock file ({e.strerror}); check the "
                             "folder's permissions") from None
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            os.close(fd)
            raise InputError(f"{self.path}: the study's lock file is not a regular file; remove it")
        return fd

    def acquire(self) -> "StudyLock":
        if not self.path.parent.is_dir() or self.held_:
            return self
        for _ in range(50):
            fd = self._open()
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)  # flock(2): atomic, released at death
            except BlockingIOError:
                pid = _read_pid(fd)
                os.close(fd)
                if pid == os.getpid():
                    return self  # re-entrant within one process (another StudyLock of ours holds it)
                held = f"pid {pid}" if pid > 0 else "another process"
                raise InputError(f"{self.path.parent}: study is busy, held by {held}; wait for it to "
                                 "finish") from None
            try:
                same = os.stat(self.path).st_ino == os.fstat(fd).st_ino
            except FileNotFoundError:
                same = False
            if not same:  # the holder removed the file between our open and our lock: try again
                os.close(fd)
                continue
            old = _read_pid(fd)
            if old > 0 and old != os.getpid():
                if process_alive(old):  # written by hand or by an older version that did not use flock
                    os.close(fd)
                    raise InputError(f"{self.path.parent}: study is busy, held by pid {old}; wait for it "
                                     f"to finish (or delete {LOCK_NAME} if that process is not windowfinder)")
                self.stale_pid_ = old  # its holder died without removing the file
            os.ftruncate(fd, 0)
            os.pwrite(fd, f"{os.getpid()}\n".encode(), 0)
            os.fsync(fd)
            self._fd, self.held_ = fd, True
            return self
        raise InputError(f"{self.path}: could not take the study lock; try again")

    def release(self) -> None:
        if self.held_:
            try:
                self.path.unlink()  # while still locked: see the module notes
            except FileNotFoundError:
                pass
            os.close(self._fd)  # releases the flock
            self._fd, self.held_ = None, False

    def __enter__(self):
        return self.acquire()

    def __exit__(self, *exc):
        self.release()
        return False
