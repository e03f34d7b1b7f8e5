"""Files on disk: what may be read as a file, and atomic writes that keep the file's mode and links.

Every read of a user file goes through :func:`readable_file`: a folder, a FIFO, a device or a dangling
symbolic link where a file belongs is refused with one line (exit 2) instead of hanging or crashing.
Every write goes through :func:`write_atomic`: a temporary file in the same folder, fsync, rename. The
rename happens at the *target* of a symbolic link (the link is kept), the new file gets the old file's
permission bits (a ``chmod 644`` table stays 644) and a file that did not exist gets the bits the umask
allows (``0666 & ~umask``), as ``open()`` would give it. Any operating-system refusal (no such folder,
a file where a folder belongs, read-only, disk full) becomes an :class:`~windowfinder.errors.InputError`
naming the path; the old file is then untouched.
"""

from __future__ import annotations

import os
import stat
import tempfile
import threading
from pathlib import Path

from windowfinder.errors import InputError

_UMASK_LOCK = threading.Lock()


def _kind(mode: int) -> str:
    if stat.S_ISDIR(mode):
        return "a folder"
    if stat.S_ISFIFO(mode):
        return "a named pipe (FIFO)"
    if stat.S_ISSOCK(mode):
        return "a socket"
    if stat.S_ISCHR(mode) or stat.S_ISBLK(mode):
        return "a device"
    return "not a regular file"


def _reason(e: OSError) -> str:
    return e.strerror or type(e).__name__


def readable_file(path, what: str = "file") -> bool:
    """True when ``path`` is a regular file (through any links), False when nothing is there.

    Raises
    ------
    InputError
        A dangling symbolic link, a folder, a FIFO, a socket or a device where a ``what`` belongs,
        or a path that cannot be examined (e.g. a component is a file).
    """
    path = Path(path)
    try:
        st = os.stat(path)
    except FileNotFoundError:
        if os.path.islink(path):
            raise InputError(f"{path}: symbolic link to '{os.readlink(path)}', which does not exist; "
                             f"fix or remove the link (the {what} is not there)") from None
        return False
    except NotADirectoryError:
        raise InputError(f"{path}: a part of this path is a file, not a folder; check the path") from None
    except OSError as e:
        raise InputError(f"{path}: cannot examine the {what} ({_reason(e)})") from None
    if not stat.S_ISREG(st.st_mode):
        raise InputError(f"{path}: is {_kind(st.st_mode)}, where the {what} belongs; move it away or "
                         "give the path of a regular file")
    return True


def read_bytes(path, what: str = "file") -> bytes:
    """The bytes of a regular file (see :func:`readable_file`); OS errors become one line."""
    path = Path(path)
    if not readable_file(path, what):
        raise InputError(f"{path}: {what} not found")
    try:
        return path.read_bytes()
    except OSError as e:
        raise InputError(f"{path}: cannot read the {what} ({_reason(e)})") from None


def ensure_folder(path, what: str = "output folder") -> Path:
    """Create folder ``path`` (and parents) or refuse with one line when something else is there."""
    path = Path(path)
    try:
        path.mkdir(parents=True, exist_ok=True)
    except FileExistsError:
        raise InputError(f"{path}: exists but is not a folder; move it away so the {what} can be "
                         "created") from None
    except NotADirectoryError:
        raise InputError(f"{path}: a part of this path is a file, not a folder; cannot create the "
                         f"{what}") from None
    except OSError as e:
        raise InputError(f"{path}: cannot create the {what} ({_reason(e)})") from None
    if not path.is_dir():
        raise InputError(f"{path}: exists but is not a folder; move it away so the {what} can be created")
    return path


def umask_mode(base: int = 0o666) -> int:
    """Permission bits a newly created file gets under the current umask."""
    with _UMASK_LOCK:  # reading the umask means setting it; keep other threads out meanwhile
        mask = os.umask(0o022)
        os.umask(mask)
    return base & ~mask


def resolve_target(path) -> Path:
    """Where a write to ``path`` must land: the file itself, or the end of its chain of links.

    Raises :class:`InputError` for a dangling link or anything that is not a regular file.
    """
    path = Path(path)
    readable_file(path)  # refuses dangling links, folders, FIFOs
    return Path(os.path.realpath(path)) if os.path.islink(path) else path


def write_atomic(path, text: str | bytes) -> None:
    """Write ``text`` (or bytes) to ``path`` atomically: temporary file in the same folder, fsync, rename.

    A symbolic link is written through (the rename replaces its target); the old file's permission bits
    are kept, a new file gets ``0666 & ~umask``.
    """
    target = resolve_target(path)
    ensure_folder(target.parent, "folder")
    try:
        st = os.stat(target)
        mode, owner = stat.S_IMODE(st.st_mode), (st.st_uid, st.st_gid)
    except FileNotFoundError:
        mode, owner = umask_mode(), None
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent)
    except OSError as e:
        raise InputError(f"{target}: cannot write in {target.parent} ({_reason(e)}); check the folder's "
                         "permissions and free space") from None
    try:
        binary = isinstance(text, bytes)
        with (os.fdopen(fd, "wb") if binary else os.fdopen(fd, "w", encoding="utf-8", newline="")) as fh:
            fh.write(text)
            fh.flush()
            if owner is not None and hasattr(os, "fchown"):
                try:  # keep the owner too where we may (root, or our own file)
                    os.fchown(fh.fileno(), *owner)
                except OSError:
                    pass
            os.fchmod(fh.fileno(), mode)
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except OSError as e:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise InputError(f"{target}: cannot write ({_reason(e)}); the old file is unchanged") from None
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    try:  # make the rename itself durable
        dfd = os.open(target.parent, os.O_RDONLY)
        try:
            os.fsync(dfd)
        finally:
            os.close(dfd)
    except OSError:
        pass


__all__ = ["ensure_folder", "read_bytes", "readable_file", "resolve_target", "umask_mode", "write_atomic"]
