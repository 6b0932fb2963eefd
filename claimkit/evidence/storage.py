"""Streaming SHA-256 and crash-safe writes.

Every file claimkit writes as evidence goes through :func:`atomic_write`: the
bytes go to a temporary name in the same folder, are flushed to the disk, and
the name is then swapped in one ``rename``. A crash or Ctrl-C leaves either the
old file or the new one, never half of one.
"""

from __future__ import annotations

import errno
import hashlib
import os
import tempfile
from pathlib import Path, PurePosixPath

from claimkit.errors import AlreadyExists, DiskFull, InputError

__all__ = ["atomic_write", "fsync_dir", "sha256_file", "sha256_hex", "write_new_file"]

_CHUNK = 1 << 20


def sha256_hex(data: bytes) -> str:
    """Hex SHA-256 of bytes (FIPS 180-4)."""
    return hashlib.sha256(data).hexdigest()


def sha256_file(path: str | os.PathLike) -> str:
    """Hex SHA-256 of a file, read in 1 MiB pieces so memory stays flat.

    Raises
    ------
    InputError
        When the file cannot be read, naming it and the cause.
    """
    h = hashlib.sha256()
    try:
        with open(path, "rb") as fh:
            while True:
                block = fh.read(_CHUNK)
                if not block:
                    break
                h.update(block)
    except FileNotFoundError:
        raise InputError("no such file", path=path) from None
    except IsADirectoryError:
        raise InputError("is a folder, not a file", path=path) from None
    except OSError as exc:
        raise InputError(f"cannot read: {exc.strerror or exc}", path=path) from None
    return h.hexdigest()


def fsync_dir(path: str | os.PathLike) -> None:
    """Flush a folder's entry list, so that a rename in it survives a power cut."""
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:
        return  # some platforms cannot open folders; the rename is still atomic
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


_PART = ".part"


def unfinished_writes(path: str | os.PathLike) -> list[Path]:
    """Temporary files :func:`atomic_write` left beside ``path`` when a process was killed."""
    path = Path(path)
    return sorted(path.parent.glob(f".{path.name}.*{_PART}"))


def atomic_write(path: str | os.PathLike, data: bytes, *, mode: int | None = None,
                 replace: bool = True) -> None:
    """Write ``data`` to ``path`` all at once: temp file in the same folder, fsync, rename.

    Parameters
    ----------
    path : path-like
        The destination.
    data : bytes
        The whole content.
    mode : int, optional
        Permission bits (e.g. ``0o600`` for key files). Default: ``0o666``
        less the process umask, as for any new file.
    replace : bool
        Replace an existing file (default). When false, the finished file is
        put in place with a hard link, which fails if the name exists, so a
        file that another process created meanwhile is never replaced.

    Raises
    ------
    InputError
        When the folder is missing or not writable, or (``replace=False``)
        the file exists, naming the file.
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    if mode is None:
        umask = os.umask(0)
        os.umask(umask)
        mode = 0o666 & ~umask
    try:
        fd, tmp = tempfile.mkstemp(dir=folder, prefix=f".{path.name}.", suffix=_PART)
    except FileNotFoundError:
        raise InputError("folder does not exist", path=folder) from None
    except OSError as exc:
        raise _write_error(exc, path) from None
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
        os.chmod(tmp, mode)
        if replace:
            os.replace(tmp, path)
        else:
            _link_new(tmp, path)
    except BaseException as exc:
        try:
            os.unlink(tmp)
        except OSError:
            pass
        if isinstance(exc, OSError):
            raise _write_error(exc, path) from None
        raise
    fsync_dir(folder)


def _write_error(exc: OSError, path: Path) -> InputError:
    """The typed error for a failed write (a full disk is told apart by its errno)."""
    cls = DiskFull if exc.errno in (errno.ENOSPC, errno.EDQUOT) else InputError
    return cls(f"cannot write: {exc.strerror or exc}", path=path)


def _link_new(tmp: str, path: Path) -> None:
    try:
        os.link(tmp, path)
    except FileExistsError:
        raise AlreadyExists("already exists (will not overwrite)", path=path) from None
    except OSError:
        if path.exists():
            raise AlreadyExists("already exists (will not overwrite)", path=path) from None
        os.replace(tmp, path)   # a file system without hard links
        return
    os.unlink(tmp)


def unsafe_name(name: str) -> str | None:
    """Why a relative name read from a bundle is unsafe, or None when it is fine.

    Refuses what could leave the folder or mean different files on different
    systems: absolute paths (POSIX or drive letters), ``..``, backslashes, NUL.
    """
    if not name or "\\" in name or "\x00" in name:
        return "has a backslash or an empty or NUL name"
    p = PurePosixPath(name)
    if p.is_absolute() or name.startswith("/") or (len(name) > 1 and name[1] == ":"):
        return "is an absolute path"
    if any(part == ".." for part in p.parts):
        return "climbs out of its folder (..)"
    return None


def outside(root: Path, rel: str) -> str | None:
    """Why ``root / rel`` is not safely inside ``root``, or None when it is.

    The one path-safety rule: ``rel`` must be a plain relative name
    (:func:`unsafe_name`), must not be a symbolic link, and must resolve
    inside ``root`` (a linked folder on the way is caught by the resolution).
    """
    why = unsafe_name(rel)
    if why:
        return why
    p = Path(root) / rel
    if p.is_symlink():
        return "is a symbolic link"
    if not p.resolve().is_relative_to(Path(root).resolve()):
        return "leads out of its folder"
    return None


def write_new_file(path: str | os.PathLike, data: bytes, *, mode: int | None = None) -> None:
    """Like :func:`atomic_write`, but never replace an existing file (race-free)."""
    atomic_write(path, data, mode=mode, replace=False)
