"""A lock so that two processes never write one study at the same time.

The lock is a file ``STUDY_DIR/.windowfinder.lock`` created with ``O_CREAT | O_EXCL`` (atomic on local
file systems) holding the owner's process id. A second process finds it and stops with "study is busy,
held by pid N" (exit 2). A lock whose process no longer exists — left by a killed run — is stale: it is
removed and taken over, with a note.
"""

from __future__ import annotations

import os
from pathlib import Path

from windowfinder.errors import InputError

LOCK_NAME = ".windowfinder.lock"


def _alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


class StudyLock:
    """Context manager holding the study's write lock.

    Parameters
    ----------
    directory : path-like
        The study folder. When it does not exist no lock is taken (loading it will fail anyway).
    """

    def __init__(self, directory):
        self.path = Path(directory) / LOCK_NAME
        self.held_ = False
        self.stale_pid_ = None

    def acquire(self) -> "StudyLock":
        if not self.path.parent.is_dir():
            return self
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
            except FileExistsError:
                try:
                    pid = int(self.path.read_text().strip() or "0")
                except (OSError, ValueError):
                    pid = 0
                if pid == os.getpid():
                    return self  # re-entrant within one process
                if _alive(pid):
                    raise InputError(f"{self.path.parent}: study is busy, held by pid {pid}; wait for it "
                                     f"to finish (or delete {LOCK_NAME} if that process is gone)") from None
                self.stale_pid_ = pid
                try:
                    self.path.unlink()
                except FileNotFoundError:
                    pass
                continue
            with os.fdopen(fd, "w") as fh:
                fh.write(f"{os.getpid()}\n")
            self.held_ = True
            return self
        raise InputError(f"{self.path}: could not take the study lock; try again")

    def release(self) -> None:
        if self.held_:
            try:
                self.path.unlink()
            except FileNotFoundError:
                pass
            self.held_ = False

    def __enter__(self):
        return self.acquire()

    def __exit__(self, *exc):
        self.release()
        return False
