"""Reading a bundle safely: a zip unpacked without escaping, or a folder walked without links."""

from __future__ import annotations

import os
import shutil
import stat
import zipfile
from pathlib import Path, PurePosixPath

from claimkit.errors import CheckFailed, InputError
from claimkit.evidence.storage import outside, unsafe_name

__all__ = ["MAX_BUNDLE_BYTES", "MAX_FILES", "folder_files", "safe_extract"]

MAX_BUNDLE_BYTES = 4 << 30      # unpacked size limit (a guard against zip bombs)
MAX_FILES = 100_000


def safe_extract(zip_path: Path, dest: Path) -> list[str]:
    """Unpack a bundle zip into ``dest``, refusing anything that could escape it.

    Raises
    ------
    CheckFailed
        For an entry with an absolute path, ``..``, a link, a device, a
        duplicate name, or sizes beyond the limits.
    """
    try:
        zf = zipfile.ZipFile(zip_path)
    except (zipfile.BadZipFile, OSError) as exc:
        raise InputError(f"not a readable zip file ({exc})", path=zip_path) from None
    names = []
    total = 0
    with zf:
        infos = zf.infolist()
        if len(infos) > MAX_FILES:
            raise CheckFailed(f"bundle holds {len(infos)} entries (limit {MAX_FILES})",
                              path=zip_path)
        seen = set()
        for info in infos:
            why = unsafe_name(info.filename)
            if why:
                raise CheckFailed(f"refused entry {info.filename!r}: it {why}", path=zip_path)
            mode = (info.external_attr >> 16) & 0xFFFF
            # Many zip writers store permission bits only; a file type, when present, must
            # be a regular file or a folder.
            if stat.S_IFMT(mode) and not (stat.S_ISREG(mode) or stat.S_ISDIR(mode)):
                kind = "a symbolic link" if stat.S_ISLNK(mode) else "not a regular file"
                raise CheckFailed(f"refused entry {info.filename!r}: it is {kind}", path=zip_path)
            norm = str(PurePosixPath(info.filename))
            if norm in seen:
                raise CheckFailed(f"refused entry {info.filename!r}: the name appears twice",
                                  path=zip_path)
            seen.add(norm)
            total += info.file_size
            if total > MAX_BUNDLE_BYTES:
                raise CheckFailed("bundle unpacks to more than the size limit", path=zip_path)
        for info in infos:
            if info.is_dir():
                continue
            if outside(dest, info.filename) is not None:
                raise CheckFailed(f"refused entry {info.filename!r}: it leaves the bundle",
                                  path=zip_path)
            target = dest / PurePosixPath(info.filename)
            target.parent.mkdir(parents=True, exist_ok=True)
            with zf.open(info) as src, open(target, "wb") as out:
                shutil.copyfileobj(src, out, 1 << 20)
            names.append(str(PurePosixPath(info.filename)))
    return sorted(names)


def folder_files(root: Path) -> list[str]:
    """Every file of an unpacked bundle folder (hidden ones skipped); refuses links."""
    out = []
    for dirpath, dirnames, filenames in os.walk(root, followlinks=False):
        for d in list(dirnames):
            if Path(dirpath, d).is_symlink():
                raise CheckFailed(f"refused {Path(dirpath, d).relative_to(root)}: a symbolic link",
                                  path=root)
        for f in filenames:
            p = Path(dirpath, f)
            rel = p.relative_to(root)
            if p.is_symlink():
                raise CheckFailed(f"refused {rel}: a symbolic link", path=root)
            if any(x.startswith(".") for x in rel.parts):
                continue
            out.append(rel.as_posix())
    return sorted(out)
