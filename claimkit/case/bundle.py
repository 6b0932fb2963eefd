"""Pack the hand-over bundle of a case into one zip file.

The bundle is what ``claimkit report`` listed in the signed manifest, plus
the manifest and its signature. Export refuses when anything changed since
the manifest was signed (run ``claimkit report`` again), so that the zip
always verifies. Entries are regular files with plain relative names,
stored in sorted order with a fixed date, so the same case gives the same
zip bytes.
"""

from __future__ import annotations

import os
import tempfile
import zipfile
from pathlib import Path

from claimkit.case.documents import ManifestDoc
from claimkit.case.layout import MANIFEST, MANIFEST_SIG, bundle_files
from claimkit.case.store import Case
from claimkit.errors import CheckFailed, InputError
from claimkit.evidence.storage import fsync_dir, sha256_file

__all__ = ["export_bundle"]

_DATE = (2020, 1, 1, 0, 0, 0)


def export_bundle(case: Case, out: str | os.PathLike, profile=None, *, force: bool = False,
                  disclose: bool = False) -> dict:
    """Write the bundle zip of ``case`` to ``out``; returns its SHA-256 and file count.

    The zip carries what ``report`` put in the bundle: key material only if the
    report was built with it. ``disclose=True`` asks for it, and refuses a
    bundle built without (so that the choice is never made silently here).
    """
    out = Path(out)
    root = case.root
    if out.exists() and not force:
        raise InputError("already exists; use --force to replace it", path=out)
    if out.suffix.lower() != ".zip":
        raise InputError("the bundle is a zip file; name it *.zip", path=out)
    if not (root / MANIFEST).is_file():
        raise InputError("no manifest yet: run claimkit report first", path=root)
    try:
        manifest = ManifestDoc.read(root / MANIFEST)
        listed = {rel: f["sha256"] for rel, f in manifest.listed().items()}
    except (InputError, KeyError, TypeError):
        raise CheckFailed("manifest.json is damaged: run claimkit report again",
                          path=root / MANIFEST) from None
    if profile is not None and not profile.verify_signature((root / MANIFEST).read_bytes(),
                                                            (root / MANIFEST_SIG).read_bytes()):
        raise CheckFailed("the manifest signature does not verify with this profile's key",
                          path=root / MANIFEST_SIG)
    key_material = manifest.get("key_material", "disclosed")
    if disclose and key_material != "disclosed":
        raise InputError("the report was built without key material: run claimkit report "
                         "with --disclose first", path=root)
    present = bundle_files(root, include_original=bool(manifest.get("include_original")),
                           include_message=key_material == "disclosed")
    changed = [rel for rel in present if rel not in listed or sha256_file(root / rel) != listed[rel]]
    changed += [rel for rel in listed if rel not in present]
    if changed:
        raise CheckFailed(f"{len(changed)} file(s) changed since the report was built "
                          f"(first: {min(changed)}); run claimkit report again", path=root)
    names = sorted(listed) + [MANIFEST, MANIFEST_SIG]
    parent = out.parent if str(out.parent) else Path(".")
    if not parent.is_dir():
        raise InputError("folder does not exist", path=parent)
    fd, tmp = tempfile.mkstemp(dir=parent, prefix=f".{out.name}.", suffix=".part")
    os.close(fd)
    try:
        with zipfile.ZipFile(tmp, "w", compression=zipfile.ZIP_DEFLATED) as zf:
            for rel in names:
                info = zipfile.ZipInfo(rel, date_time=_DATE)
                info.external_attr = 0o100644 << 16     # a regular file, never a link
                info.compress_type = zipfile.ZIP_DEFLATED
                with open(root / rel, "rb") as src, zf.open(info, "w") as dst:
                    while block := src.read(1 << 20):
                        dst.write(block)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, out)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    fsync_dir(parent)
    digest = sha256_file(out)
    if profile is not None:
        profile.log_action("bundle exported",
                           items={"bundle": digest, "manifest": sha256_file(root / MANIFEST)},
                           details={"case_id": case.case_id, "files": len(names),
                                    "file": out.name, "key_material": key_material})
    return {"output": str(out), "sha256": digest, "files": len(names),
            "key_material": key_material}
