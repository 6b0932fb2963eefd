"""Where every file of a case folder and of its hand-over bundle lives: each path defined once.

A bundle is a case folder after ``claimkit report``, packed; so one layout
serves the case (which writes exhibits, findings and references), the dossier
(which writes ``handover/``, ``report/`` and the manifest) and ``verify``
(which reads them all). Every name is relative to the folder's root and uses
``/``, so a bundle can be checked anywhere::

    case.json                     title, case ID, owner (canonical JSON)
    exhibits/E01-NAME.EXT         the disputed file, byte for byte, read-only
    exhibits/E01.json             its intake record
    references/SHA256.EXT         a registered file (marked or master) by its hash
    references/reduced-SHA256.png its reduced-resolution reference, what copies are compared
                                  with (the master goes into a bundle only on request)
    findings/E01.json, E01.npz    the examination: numbers, arrays
    findings/E01-message.npz      the recovered and the prescribed message: drawn from the key,
                                  so in a bundle only with the key disclosure (report --disclose)
    captures/cap-*.warc.gz|json   web captures: the WARC, its record, snapshots, token
    captures/warc-*               a crawler's WARC file that exhibits were taken from
    handover/public-key.pem       the owner's public key
    handover/disclosures/WORK/    per matched work: signed record, timestamps; key material
                                  only when the owner chose to disclose it
    handover/custody-excerpt.json the custody entries of this case and its works, others by hash
    handover/software.json        the versions of the software that made the numbers
    report/dossier.json|pdf|html  the dossier and the data it renders
    report/figures/E01-KIND.png   its figures
    manifest.json, manifest.sig   every file above with its SHA-256, signed

Names read from a bundle are checked by :func:`inside`, which rests on the one
path-safety rule of :func:`claimkit.evidence.storage.outside` (also used by the
disclosure check and by unpacking a zip).
"""

from __future__ import annotations

import re
from pathlib import Path

from claimkit.errors import InputError
from claimkit.evidence.storage import outside, unsafe_name

__all__ = [
    "BUNDLE_PARTS",
    "CAPTURES",
    "CASE_FILE",
    "CUSTODY_COPY",
    "CUSTODY_COPY_V1",
    "DATA",
    "DISCLOSURES",
    "EXHIBITS",
    "EXHIBIT_ID",
    "FIGURES",
    "FINDINGS",
    "HANDOVER",
    "HTML",
    "INTAKE_GLOBS",
    "MANIFEST",
    "MANIFEST_SIG",
    "PDF",
    "PUBLIC_KEY",
    "REFERENCES",
    "REPORT",
    "SOFTWARE",
    "WITHDRAWN",
    "arrays_file",
    "bundle_files",
    "exhibit_file",
    "exhibit_id_for",
    "exhibit_label",
    "exhibit_number",
    "figure_file",
    "finding_file",
    "inside",
    "intake_record",
    "message_arrays",
    "message_arrays_file",
    "reference_file",
    "references_used",
    "unsafe_name",
    "withdrawal_record",
]

CASE_FILE = "case.json"
EXHIBITS = "exhibits"
REFERENCES = "references"
FINDINGS = "findings"
CAPTURES = "captures"
REPORT = "report"
FIGURES = f"{REPORT}/figures"
DATA = f"{REPORT}/dossier.json"
PDF = f"{REPORT}/dossier.pdf"
HTML = f"{REPORT}/dossier.html"
HANDOVER = "handover"
PUBLIC_KEY = f"{HANDOVER}/public-key.pem"
CUSTODY_COPY = f"{HANDOVER}/custody-excerpt.json"
CUSTODY_COPY_V1 = f"{HANDOVER}/custody.jsonl"     # bundles of claimkit 0.2: the whole log
SOFTWARE = f"{HANDOVER}/software.json"
DISCLOSURES = f"{HANDOVER}/disclosures"
MANIFEST = "manifest.json"
MANIFEST_SIG = "manifest.sig"

#: What a bundle holds besides the manifest and its signature: these files and folders.
BUNDLE_PARTS = (CASE_FILE, EXHIBITS, REFERENCES, FINDINGS, CAPTURES, REPORT, HANDOVER)


# Exhibit ids. "E01" read to a forensic examiner as the segment extension of a disk-image
# evidence format, so exhibits are now "exhibit-1", "exhibit-2", ... (shown as "Exhibit 1");
# cases made before keep their E01-style ids and read as before.
EXHIBIT_ID = re.compile(r"exhibit-([1-9][0-9]{0,5})|E([0-9]{2,6})")
#: Intake records, new style and old, in ``exhibits/``.
INTAKE_GLOBS = ("exhibit-[0-9]*.json", "E[0-9][0-9]*.json")
#: Withdrawals (``claimkit case withdraw``): ``exhibits/withdrawn/ID.json``.
WITHDRAWN = f"{EXHIBITS}/withdrawn"


def exhibit_id_for(number: int) -> str:
    """The id of the ``number``-th exhibit of a case."""
    return f"exhibit-{int(number)}"


def exhibit_number(exhibit_id: object) -> int | None:
    """The number of an exhibit id (either style), None if it is not one."""
    m = EXHIBIT_ID.fullmatch(exhibit_id) if isinstance(exhibit_id, str) else None
    return None if m is None else int(m.group(1) or m.group(2))


def exhibit_label(exhibit_id: str) -> str:
    """How people read an exhibit id: "Exhibit 3"."""
    n = exhibit_number(exhibit_id)
    return f"Exhibit {n}" if n is not None else str(exhibit_id)


def withdrawal_record(exhibit_id: str) -> str:
    """The withdrawal of an exhibit (kept in the record, never deleted)."""
    return f"{WITHDRAWN}/{exhibit_id}.json"


def intake_record(exhibit_id: str) -> str:
    """The intake record of an exhibit."""
    return f"{EXHIBITS}/{exhibit_id}.json"


def exhibit_file(exhibit_id: str, name: str) -> str:
    """The stored copy of an exhibit (``name`` already made safe by the caller)."""
    return f"{EXHIBITS}/{exhibit_id}-{name}"


def finding_file(exhibit_id: str) -> str:
    """The finding of an exhibit (numbers, canonical JSON)."""
    return f"{FINDINGS}/{exhibit_id}.json"


def arrays_file(exhibit_id: str) -> str:
    """The arrays of a finding (``.npz``)."""
    return f"{FINDINGS}/{exhibit_id}.npz"


def reference_file(sha256: str, suffix: str) -> str:
    """A registered file kept by its hash, with its (lower-case) suffix."""
    return f"{REFERENCES}/{sha256}{suffix.lower()}"


def message_arrays_file(exhibit_id: str) -> str:
    """The message arrays of a finding (``.npz``): recovered and prescribed message.

    The prescribed message is the key's spot pattern; set beside a published marked
    file it lets anyone estimate the key's carrier, so these go into a bundle only
    with key material.
    """
    return f"{FINDINGS}/{exhibit_id}-message.npz"


def figure_file(exhibit_id: str, kind: str) -> str:
    """A figure of the dossier (``kind``: thumbnail, message, surface, decoys, aligned)."""
    return f"{FIGURES}/{exhibit_id}-{kind}.png"


def inside(root: Path, rel: object, folder: str) -> str | None:
    """Why ``rel`` (named inside a bundle file) is not a safe path under ``root/folder``, or None."""
    if not isinstance(rel, str):
        return f"{rel!r} is not a path"
    if not unsafe_name(rel) and not rel.startswith(folder + "/"):
        return f"{rel!r} is outside {folder}/"
    why = outside(root, rel)
    return None if why is None else f"{rel!r} {why}"


def references_used(root: Path) -> dict[str, str]:
    """Reference files the findings use: relative path -> kind.

    Kinds: "reduced" (the reduced-resolution reference copies are compared with),
    "marked" (the registered marked file) and "original" (the unmarked master),
    the last two also when a reduced reference was made from them.
    """
    import json

    out = {}
    for p in sorted((root / FINDINGS).glob("*.json")):
        try:
            ref = json.loads(p.read_bytes()).get("reference") or {}
        except (OSError, ValueError, AttributeError):
            continue
        if not isinstance(ref, dict):
            continue
        if isinstance(ref.get("file"), str):
            out[ref["file"]] = ref.get("kind", "original")
        src = ref.get("made_from")
        if isinstance(src, dict) and isinstance(src.get("file"), str):
            out[src["file"]] = src.get("kind", "original")
    return out


def message_arrays(root: Path) -> set[str]:
    """The message-array files the findings name (see :func:`message_arrays_file`)."""
    import json

    out = set()
    for p in sorted((root / FINDINGS).glob("*.json")):
        try:
            m = json.loads(p.read_bytes()).get("message_arrays") or {}
        except (OSError, ValueError, AttributeError):
            continue
        if isinstance(m, dict) and isinstance(m.get("file"), str):
            out.add(m["file"])
    return out


def bundle_files(root: Path, *, include_original: bool = False,
                 include_message: bool = False) -> list[str]:
    """Relative paths of every file that goes into the bundle (sorted; no links, no hidden).

    Of ``references/`` only the files a finding uses go in (the reduced
    reference and the registered marked file), and an unmarked master only
    with ``include_original``: the published marked file is what the other
    side may see; the master is the owner's to give or keep. The message arrays
    (:func:`message_arrays_file`) go in only with ``include_message`` (with key material).

    Raises
    ------
    InputError
        When the folder holds a symbolic link: bundles never do.
    """
    used = references_used(root)
    keyed = set() if include_message else message_arrays(root)
    out = []
    for part in BUNDLE_PARTS:
        p = root / part
        if p.is_file() and not p.is_symlink():
            out.append(part)
        elif p.is_dir():
            for q in sorted(p.rglob("*")):
                rel = q.relative_to(root)
                if any(x.startswith(".") for x in rel.parts):
                    continue
                if q.is_symlink():
                    raise InputError("the case holds a symbolic link; bundles never do", path=q)
                if not q.is_file():
                    continue
                if part == REFERENCES and (rel.as_posix() not in used or (
                        used[rel.as_posix()] not in ("marked", "reduced")
                        and not include_original)):
                    continue
                if rel.as_posix() in keyed:
                    continue
                out.append(rel.as_posix())
    return sorted(out)
