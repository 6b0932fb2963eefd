"""Metadata a marked file keeps, and the rights fields written into it, through exiftool.

Pillow writes the pixels with the EXIF, ICC profile, XMP and resolution it
can carry (:mod:`claimkit.imageio`); everything else a photographer's file
holds (IPTC-IIM, PNG text chunks, maker notes, Photoshop resources, EXIF
fields Pillow cannot re-serialise) is copied here from the original by
exiftool, on the staged output, before it is hashed and registered. Then the
rights fields are written, as IPTC Photo Metadata Standard properties in XMP
(and in IIM where the file has IIM):

=======================  ==============================  =========================
IPTC property            XMP (exiftool tag)              IIM (exiftool tag)
=======================  ==============================  =========================
Creator                  XMP-dc:Creator                  IPTC:By-line
Copyright Notice         XMP-dc:Rights                   IPTC:CopyrightNotice
Credit Line              XMP-photoshop:Credit            IPTC:Credit
Web Statement of Rights  XMP-xmpRights:WebStatement      -
Licensor (URL)           XMP-plus:LicensorURL            -
Image Registry Entry     XMP-iptcExt:RegistryItemID,     -
                         XMP-iptcExt:RegistryOrganisationID
Data Mining              XMP-plus:DataMining             -
=======================  ==============================  =========================

(IPTC Photo Metadata Standard 2023.1 and its TechReference, "etXMP" and
"etIIM" columns; the Data Mining values are the PLUS vocabulary URIs.)
A value already in the original is kept unless the caller asks to replace
it. Afterwards the original and the staged file are read back with exiftool
and every metadata block of the original that the output does not hold is
named (``metadata_dropped``), so a loss is never silent.

Why exiftool: it is the tool photographers and archives use to read and
write these blocks, it knows every container (JPEG APP13, TIFF tag 33723,
PNG ``zTXt``/``iTXt``), and Debian packages it (``libimage-exiftool-perl``).
One process per Python process is kept open (``-stay_open``), so a folder of
photos does not pay Perl's start-up for every file.
"""

from __future__ import annotations

import atexit
import ctypes
import hashlib
import json
import logging
import os
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path

from claimkit.errors import InputError

__all__ = [
    "DATA_MINING",
    "Rights",
    "carry_metadata",
    "exiftool_available",
    "read_tags",
]

log = logging.getLogger("claimkit.exiftool")

#: Environment variable naming the exiftool program (default: ``exiftool`` on PATH).
EXIFTOOL_ENV = "CLAIMKIT_EXIFTOOL"
INSTALL_HINT = ("install exiftool (Debian/Ubuntu: apt-get install libimage-exiftool-perl; "
                "macOS: brew install exiftool), or name it in $CLAIMKIT_EXIFTOOL")

_PLUS_VOCAB = "http://ns.useplus.org/ldf/vocab/"
#: ``--data-mining`` tokens and the PLUS Data Mining vocabulary entry each stands for
#: (IPTC Photo Metadata Standard 2023.1, property "Data Mining").
DATA_MINING = {
    "unspecified": "DMI-UNSPECIFIED",
    "allowed": "DMI-ALLOWED",
    "prohibited-ai-training": "DMI-PROHIBITED-AIMLTRAINING",
    "prohibited-genai-training": "DMI-PROHIBITED-GENAIMLTRAINING",
    "prohibited-except-search": "DMI-PROHIBITED-EXCEPTSEARCHENGINEINDEXING",
    "prohibited": "DMI-PROHIBITED",
}

# exiftool before 12.67 does not know plus:DataMining; this user-defined tag
# adds it to the PLUS namespace table (exiftool's documented config mechanism).
_CONFIG = """%Image::ExifTool::UserDefined = (
    'Image::ExifTool::PLUS::XMP' => { DataMining => { } },
);
1;
"""
_DATA_MINING_BUILTIN = 12.67


@dataclass(frozen=True)
class Rights:
    """The rights fields written into every marked file.

    ``None`` leaves a field out. ``replace`` overwrites values the original
    already holds; without it they are kept.
    """

    creator: str | None = None
    copyright: str | None = None
    credit: str | None = None
    web_statement: str | None = None
    licensor_url: str | None = None
    data_mining: str | None = None
    replace: bool = False

    def merged(self, **overrides) -> Rights:
        """These rights with the given fields replaced (``None`` values ignored)."""
        given = {k: v for k, v in overrides.items() if v is not None}
        out = replace(self, **given)
        out.check()
        return out

    def check(self) -> None:
        for name, value in asdict(self).items():
            if isinstance(value, str) and ("\n" in value or "\r" in value):
                raise InputError(f"the rights field {name} must be one line")
        if self.data_mining is not None and self.data_mining not in DATA_MINING:
            raise InputError(f"data mining value {self.data_mining!r} is not one of "
                             + ", ".join(DATA_MINING))
        for name in ("web_statement", "licensor_url"):
            value = getattr(self, name)
            if value and not value.startswith(("https://", "http://")):
                raise InputError(f"{name.replace('_', ' ')} {value!r} is not an http(s) URL")

    def as_json(self) -> dict:
        d = asdict(self)
        d.pop("replace")
        return d


# ---------------------------------------------------------------- the exiftool process


class _ExifTool:
    """One ``exiftool -stay_open`` process, commands sent one at a time under a lock."""

    def __init__(self) -> None:
        self._lock = threading.Lock()
        self._proc: subprocess.Popen | None = None
        self._pid = 0
        self._count = 0
        self.version = 0.0

    def program(self) -> str | None:
        name = os.environ.get(EXIFTOOL_ENV) or "exiftool"
        return shutil.which(name)

    def _start(self) -> subprocess.Popen:
        program = self.program()
        if program is None:
            raise InputError("exiftool is needed to keep the photo's metadata and write the "
                             "rights fields, and was not found", hint=INSTALL_HINT)
        ver = subprocess.run([program, "-ver"], capture_output=True, text=True, check=False)
        try:
            self.version = float(ver.stdout.strip() or 0)
        except ValueError:
            self.version = 0.0
        cmd = [program]
        if self.version < _DATA_MINING_BUILTIN:
            cmd += ["-config", str(_config_file())]
        cmd += ["-stay_open", "True", "-@", "-"]
        # In -stay_open mode exiftool keeps polling its argument file after end of
        # file, so it outlives a process that dies without closing it (a pool worker
        # ends with os._exit, which skips atexit). On Linux the kernel ends it with us.
        proc = subprocess.Popen(cmd, stdin=subprocess.PIPE, stdout=subprocess.PIPE,
                                stderr=subprocess.PIPE,
                                preexec_fn=_die_with_parent)  # noqa: PLW1509 - one syscall
        self._pid = os.getpid()
        return proc

    def run(self, args: list[str]) -> tuple[str, list[str]]:
        """Run one command; its standard output and its error/warning lines."""
        for a in args:
            if "\n" in a or "\r" in a:
                raise InputError(f"exiftool argument on more than one line: {a!r}")
        with self._lock:
            if self._proc is None or self._pid != os.getpid() or self._proc.poll() is not None:
                # A forked worker must not share its parent's pipes: start its own.
                self._proc = _starter().submit(self._start).result()
            self._count += 1
            n = self._count
            lines = [*args, "-echo4", f"{{done{n}}}", f"-execute{n}"]
            proc = self._proc
            assert proc.stdin is not None and proc.stdout is not None and proc.stderr is not None
            proc.stdin.write(("\n".join(lines) + "\n").encode("utf-8"))
            proc.stdin.flush()
            out = _read_until(proc.stdout, f"{{ready{n}}}")
            err = _read_until(proc.stderr, f"{{done{n}}}")
        messages = [m for m in err.splitlines() if m.strip()]
        return out, messages

    def close(self) -> None:
        proc, self._proc = self._proc, None
        if proc is not None and self._pid == os.getpid() and proc.poll() is None:
            try:
                assert proc.stdin is not None
                proc.stdin.write(b"-stay_open\nFalse\n")
                proc.stdin.flush()
                proc.wait(timeout=5)
            except (OSError, subprocess.TimeoutExpired):
                proc.kill()


def _config_file() -> Path:
    """The exiftool configuration, written once per content (shared, never a leftover per run)."""
    digest = hashlib.sha256(_CONFIG.encode("utf-8")).hexdigest()[:16]
    path = Path(tempfile.gettempdir()) / f"claimkit-exiftool-{os.getuid()}-{digest}.config"
    if not path.is_file():
        fd, staged = tempfile.mkstemp(dir=path.parent, prefix=".claimkit-exiftool-")
        with os.fdopen(fd, "w") as f:
            f.write(_CONFIG)
        os.replace(staged, path)
    return path


_STARTER: tuple[int, ThreadPoolExecutor] | None = None


def _starter() -> ThreadPoolExecutor:
    """One long-lived thread of this process that starts exiftool.

    Linux's parent-death signal (``PR_SET_PDEATHSIG``) fires when the
    *thread* that forked the child ends, not the process: started from a
    marking writer thread, which ends after every photo, exiftool was killed
    and started again (about 1.5 s of Perl start-up) for each file. Started
    from this thread, which lives as long as the process, it ends with the
    process, as intended.
    """
    global _STARTER
    if _STARTER is None or _STARTER[0] != os.getpid():
        _STARTER = (os.getpid(), ThreadPoolExecutor(max_workers=1,
                                                    thread_name_prefix="claimkit-exiftool"))
    return _STARTER[1]


# prctl is looked up here, in the parent, so that the forked child only makes one system
# call before exec (no dynamic loading, no lock another thread might hold at the fork).
_PRCTL = ctypes.CDLL(None, use_errno=True).prctl if sys.platform.startswith("linux") else None


def _die_with_parent() -> None:
    """In the exiftool child: ask Linux to send SIGTERM when the parent ends."""
    if _PRCTL is not None:
        _PRCTL(1, signal.SIGTERM)  # PR_SET_PDEATHSIG = 1 (prctl(2))


def _read_until(stream, marker: str) -> str:
    """Everything ``stream`` gives up to the line ``marker``.

    Read in large chunks straight from the pipe, not line by line: the
    marking writer thread calls this while another thread computes SSIM, and
    every Python-level read waits its turn for the interpreter lock (about
    5 ms), so a few hundred readline calls cost seconds; a few os.read calls
    cost nothing.
    """
    fd = stream.fileno()
    end = ("\n" + marker + "\n").encode()
    buf = bytearray(b"\n")
    while not buf.endswith(end) and not buf.endswith(end.replace(b"\n", b"\r\n")):
        chunk = os.read(fd, 1 << 16)
        if not chunk:
            raise RuntimeError("exiftool stopped unexpectedly")
        buf += chunk
    text = bytes(buf[1:]).decode("utf-8", "replace")
    return text[:text.rindex(marker)]


_TOOL = _ExifTool()
atexit.register(_TOOL.close)


def exiftool_available() -> bool:
    return _TOOL.program() is not None


def read_tags(*paths: str | os.PathLike) -> list[dict]:
    """Every tag of each file, as ``exiftool -j -a -G0:1 -n`` reports it."""
    out, messages = _TOOL.run(["-j", "-a", "-G0:1", "-n", "-charset", "filename=utf8",
                               *map(str, paths)])
    for m in messages:
        if m.startswith("Error"):
            raise InputError(f"exiftool cannot read the file: {m}", path=paths[0])
        log.info("exiftool: %s", m)
    try:
        return json.loads(out) if out.strip() else [{} for _ in paths]
    except ValueError:
        raise InputError("exiftool gave unreadable output", path=paths[0]) from None


# ---------------------------------------------------------------- blocks

# Tags of the PNG group that describe the picture's coding, not metadata.
_PNG_CODING = {"ImageWidth", "ImageHeight", "BitDepth", "ColorType", "Compression", "Filter",
               "Interlace", "ProfileName", "SRGBRendering", "Gamma", "WhitePointX",
               "WhitePointY", "RedX", "RedY", "GreenX", "GreenY", "BlueX", "BlueY",
               "Palette", "Transparency", "BackgroundColor", "SignificantBits"}
_BLOCKS = {"EXIF": "EXIF", "MakerNotes": "EXIF maker notes", "IPTC": "IPTC-IIM", "XMP": "XMP",
           "ICC_Profile": "ICC profile", "Photoshop": "Photoshop resources",
           "FlashPix": "FlashPix", "MPF": "multi-picture", "Ducky": "Ducky",
           "GeoTiff": "GeoTIFF"}
# Tags that are about the file's coding in any block (rewritten by design).
_CODING_TAGS = {"Orientation", "XResolution", "YResolution", "ResolutionUnit",
                "ExifImageWidth", "ExifImageHeight", "ThumbnailOffset", "ThumbnailLength",
                "ThumbnailImage", "Compression", "YCbCrPositioning", "ColorSpace"}


def _split(key: str) -> tuple[str, str, str]:
    parts = key.split(":")
    if len(parts) == 3:
        return parts[0], parts[1], parts[2]
    if len(parts) == 2:
        return parts[0], parts[0], parts[1]
    return "", "", key


def blocks_of(tags: dict) -> dict[str, list[str]]:
    """Metadata blocks in an exiftool ``-G0:1`` dict: block name -> its tag names."""
    out: dict[str, list[str]] = {}
    for key in tags:
        g0, g1, name = _split(key)
        if g0 == "PNG" and g1 == "PNG" and name not in _PNG_CODING:
            block = "PNG text"
        elif g0 == "File" and name == "Comment":
            block = "JPEG comment"
        else:
            block = _BLOCKS.get(g0)
        if block is None:
            continue
        out.setdefault(block, []).append(name)
    return out


def resolution_of(tags: dict) -> tuple[float, float, str] | None:
    """``(x, y, unit)`` of a file as exiftool reads it; unit ``inch``, ``cm`` or ``m``."""
    # EXIF/TIFF ResolutionUnit: 2 inch, 3 cm (TIFF 6.0); JFIF units: 1 inch, 2 cm (JFIF 1.02).
    for prefix, units in (("EXIF:IFD0:", {2: "inch", 3: "cm"}), ("JFIF:", {1: "inch", 2: "cm"})):
        x, y, u = (tags.get(prefix + k) for k in ("XResolution", "YResolution", "ResolutionUnit"))
        if x and y and units.get(int(u or 0)):
            return float(x), float(y), units[int(u)]
    x, y, u = (tags.get("PNG:PNG-pHYs:" + k) for k in ("PixelsPerUnitX", "PixelsPerUnitY",
                                                        "PixelUnits"))
    if x and y and int(u or 0) == 1:
        return float(x), float(y), "m"
    return None


def _per_inch(res: tuple[float, float, str]) -> tuple[float, float]:
    scale = {"inch": 1.0, "cm": 2.54, "m": 0.0254}[res[2]]
    return res[0] * scale, res[1] * scale


# ---------------------------------------------------------------- carrying over


@dataclass
class Carried:
    """What :func:`carry_metadata` did to one staged file."""

    dropped: list[dict] = field(default_factory=list)
    rights_written: list[str] = field(default_factory=list)
    rights_kept: list[str] = field(default_factory=list)


# (field, XMP tag, IIM tag) per rights field; the XMP tag is also what marks it as present.
_RIGHTS_TAGS = (
    ("creator", "XMP-dc:Creator", "IPTC:By-line"),
    ("copyright", "XMP-dc:Rights", "IPTC:CopyrightNotice"),
    ("credit", "XMP-photoshop:Credit", "IPTC:Credit"),
    ("web_statement", "XMP-xmpRights:WebStatement", None),
    ("licensor_url", "XMP-plus:LicensorURL", None),
    ("data_mining", "XMP-plus:DataMining", None),
)


def _has(tags: dict, group_tag: str) -> bool:
    g1, name = group_tag.split(":")
    g0 = "XMP" if g1.startswith("XMP") else g1
    key = f"{g0}:{g1}:{name}" if g0 != g1 else f"{g0}:{name}"
    value = tags.get(key)
    return value not in (None, "", [])


def carry_metadata(staged: Path, original: Path, *, rights: Rights | None, work_id: str | None,
                   registry: str | None, copy_icc: bool, reasons: dict[str, str] | None = None,
                   ) -> Carried:
    """Copy the original's metadata onto ``staged``, write the rights fields, list what was lost.

    Parameters
    ----------
    staged : Path
        The encoded output, not yet in place (it is changed in place).
    original : Path
        The photo the output was made from (only read).
    rights : Rights or None
        Fields to write; None writes none (but still copies).
    work_id, registry : str or None
        The Image Registry Entry written (item id and organisation id).
    copy_icc : bool
        Copy the original's ICC profile as a block (when the encoder could not embed it
        and the profile describes the output's colour space).
    reasons : dict, optional
        Why a block may be missing (block name -> reason), for the drop list.
    """
    orig = read_tags(original)[0]
    have_iim = "IPTC" in {(_split(k)[0]) for k in orig}
    args = ["-m", "-overwrite_original", "-charset", "filename=utf8",
            "-tagsFromFile", str(original), "-all:all",
            # Orientation: the pixels are upright now; ICC: the encoder embedded it (or it does
            # not fit); JFIF and Adobe: coding of the original's JPEG stream, not metadata.
            "--Orientation", "--ICC_Profile:all", "--JFIF:all", "--Adobe:all"]
    if copy_icc:
        args.append("-ICC_Profile")
    writes: list[str] = []
    done = Carried()
    if rights is not None:
        rights.check()
        for name, xmp_tag, iim_tag in _RIGHTS_TAGS:
            value = getattr(rights, name)
            if value is None:
                continue
            if not rights.replace and (_has(orig, xmp_tag) or (iim_tag and _has(orig, iim_tag))):
                done.rights_kept.append(name)
                continue
            args.append(f"--{xmp_tag}")
            if name == "licensor_url":
                writes.append(f"-XMP-plus:Licensor+={{LicensorURL={_struct_escape(value)}}}")
            elif name == "data_mining":
                writes.append(f"-XMP-plus:DataMining={_PLUS_VOCAB}{DATA_MINING[value]}")
            else:
                writes.append(f"-{xmp_tag}={value}")
            if iim_tag and have_iim and (rights.replace or not _has(orig, iim_tag)):
                args.append(f"--{iim_tag}")
                writes.append(f"-{iim_tag}={value}")
            done.rights_written.append(name)
        if have_iim and done.rights_written and not orig.get("IPTC:CodedCharacterSet"):
            writes.append("-IPTC:CodedCharacterSet=UTF8")
    if work_id:
        entry = f"RegItemId={_struct_escape(work_id)}"
        if registry:
            entry += f",RegOrgId={_struct_escape(registry)}"
        writes.append(f"-XMP-iptcExt:RegistryID+={{{entry}}}")
    _, messages = _TOOL.run([*args, *writes, str(staged)])
    errors = [m for m in messages if m.startswith("Error")]
    for m in messages:
        if m not in errors:
            log.info("exiftool: %s", m)
    if errors:
        raise InputError(f"exiftool could not write the metadata: {errors[0]}", path=staged)
    new = read_tags(staged)[0]
    done.dropped = dropped_blocks(orig, new, reasons or {})
    return done


def _struct_escape(value: str) -> str:
    # exiftool structure syntax: | escapes the special characters , } { [ ] and |.
    for ch in "|,{}[]":
        value = value.replace(ch, "|" + ch)
    return value


def dropped_blocks(orig: dict, new: dict, reasons: dict[str, str]) -> list[dict]:
    """Blocks (and resolution) of ``orig`` that ``new`` does not hold."""
    before, after = blocks_of(orig), blocks_of(new)
    out = []
    for block, names in sorted(before.items()):
        content = [n for n in names if n not in _CODING_TAGS]
        if not content or block in after:
            continue
        out.append({"block": block, "tags": sorted(set(content)),
                    "reason": reasons.get(block, "the output format has no place for it")})
    res_before, res_after = resolution_of(orig), resolution_of(new)
    if res_before is not None:
        if res_after is None:
            out.append({"block": "resolution", "tags": ["XResolution", "YResolution",
                                                        "ResolutionUnit"],
                        "reason": reasons.get("resolution", "not written")})
        elif any(abs(a - b) > 0.01 * max(a, 1.0)
                 for a, b in zip(_per_inch(res_before), _per_inch(res_after), strict=True)):
            out.append({"block": "resolution", "tags": ["XResolution", "YResolution"],
                        "reason": f"written as {res_after[0]:g}x{res_after[1]:g} per "
                                  f"{res_after[2]}, was {res_before[0]:g}x{res_before[1]:g} "
                                  f"per {res_before[2]}"})
    return out


def describe_dropped(dropped: list[dict]) -> str:
    """One line for people: which blocks were not kept, and why."""
    return "; ".join(f"{d['block']} ({', '.join(d['tags'][:4])}"
                     f"{', ...' if len(d['tags']) > 4 else ''}): {d['reason']}" for d in dropped)
