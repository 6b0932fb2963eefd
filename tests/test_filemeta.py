"""Photographers' files through ``claimkit mark``: every metadata block kept, rights written.

The held-out files are built here with Pillow (pixels, EXIF, ICC, dpi, PNG
text) and exiftool (IPTC-IIM, XMP). The independent reader of every check is
exiftool (``exiftool -a -G1``, the tool photographers and archives use),
never claimkit's own code; the property names are those of the IPTC Photo
Metadata Standard (2023.1, TechReference columns etXMP and etIIM).
"""

from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
import tifffile
from PIL import Image, ImageCms
from PIL.PngImagePlugin import PngInfo
from skimage import data

from claimkit.cli import main

pytestmark = pytest.mark.skipif(shutil.which("exiftool") is None,
                                reason="exiftool (libimage-exiftool-perl) is not installed")

OWNER = "Ilse Marrow"
CMYK_ICC = Path("/usr/share/color/icc/ghostscript/default_cmyk.icc")
# Groups that describe the file itself, not metadata a photographer put in it.
_NOT_METADATA = {"ExifTool", "System", "File", "Composite", "JFIF", "PNG-pHYs"}


def exif_groups(path: Path) -> dict[str, dict]:
    """``exiftool -a -G1 -j``: family-1 group -> {tag: value} (the independent reader)."""
    out = subprocess.run(["exiftool", "-j", "-a", "-G1", "-n", str(path)],
                         capture_output=True, check=True).stdout
    groups: dict[str, dict] = {}
    for key, value in json.loads(out)[0].items():
        if ":" in key:
            g, tag = key.split(":", 1)
            groups.setdefault(g, {})[tag] = value
    return groups


def exiftool_value(path: Path, tag: str) -> str:
    return subprocess.run(["exiftool", "-s3", "-n", f"-{tag}", str(path)],
                          capture_output=True, text=True, check=True).stdout.strip()


def exiftool_binary(path: Path, tag: str) -> bytes:
    return subprocess.run(["exiftool", "-b", f"-{tag}", str(path)],
                          capture_output=True, check=True).stdout


def exiftool_write(path: Path, *assignments: str) -> None:
    subprocess.run(["exiftool", "-q", "-overwrite_original", *assignments, str(path)],
                   check=True)


def srgb_icc() -> bytes:
    return ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB")).tobytes()


def photo() -> np.ndarray:
    return data.coffee()[:256, :320]


@pytest.fixture
def jpeg_full(tmp_path) -> Path:
    """JPEG with EXIF (IFD0, ExifIFD, GPS), IPTC-IIM, XMP and an ICC profile, 300 dpi."""
    src = tmp_path / "harbour.jpg"
    exif = Image.Exif()
    exif[0x010F] = "Fictional Camera Works"
    exif[0x0110] = "FC-1"
    exif[0x0112] = 1
    exif.get_ifd(0x8769)[0x9003] = "2024:05:01 18:42:10"
    exif.get_ifd(0x8825)[1] = "N"
    Image.fromarray(photo()).save(src, quality=94, exif=exif.tobytes(), icc_profile=srgb_icc(),
                                  dpi=(300, 300))
    exiftool_write(src, "-IPTC:Keywords=harbour", "-IPTC:Keywords=dusk", "-IPTC:City=Portwick",
                   "-IPTC:ObjectName=Harbour at dusk", "-XMP-dc:Title=Harbour at dusk",
                   "-XMP-dc:Subject=harbour")
    return src


def test_jpeg_keeps_every_block_and_gets_the_rights(profile_home, jpeg_full, tmp_path, capsys):
    out = tmp_path / "web" / "harbour.jpg"          # the folder does not exist yet
    assert main(["mark", str(jpeg_full), "--out", str(out), "--json",
                 "--web-statement", "https://marrow.example/terms",
                 "--licensor-url", "https://marrow.example/licence",
                 "--data-mining", "prohibited"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert rep["metadata_dropped"] == []
    before, after = exif_groups(jpeg_full), exif_groups(out)
    # exiftool: every metadata group of the original is in the marked file ...
    assert set(before) - _NOT_METADATA <= set(after)
    # ... with every tag, and the same values (Orientation 1 both).
    for group in set(before) - _NOT_METADATA - {"XMP-x"}:
        for tag, value in before[group].items():
            assert after[group].get(tag) == value, (group, tag)
    # exiftool -b: the ICC profile byte for byte.
    assert exiftool_binary(out, "ICC_Profile") == exiftool_binary(jpeg_full, "ICC_Profile")
    # exiftool: 300 dpi kept (JFIF density; inches).
    assert after["JFIF"]["XResolution"] == 300 and after["JFIF"]["ResolutionUnit"] == 1
    # exiftool: the IPTC Photo Metadata Standard rights properties, XMP and IIM.
    assert after["XMP-dc"]["Creator"] == OWNER
    assert OWNER in after["XMP-dc"]["Rights"]
    assert after["XMP-photoshop"]["Credit"] == OWNER
    assert after["XMP-xmpRights"]["WebStatement"] == "https://marrow.example/terms"
    assert after["XMP-plus"]["LicensorURL"] == "https://marrow.example/licence"
    assert after["XMP-plus"]["DataMining"] == "http://ns.useplus.org/ldf/vocab/DMI-PROHIBITED"
    assert after["XMP-iptcExt"]["RegistryItemID"] == rep["work_id"]
    assert after["IPTC"]["By-line"] == OWNER and OWNER in after["IPTC"]["CopyrightNotice"]
    assert after["IPTC"]["Credit"] == OWNER
    # The registered hash is that of the final bytes, metadata included.
    assert main(["works", "show", rep["work_id"], "--json"]) == 0
    shown = json.loads(capsys.readouterr().out)
    import hashlib
    assert shown["record"]["marked"]["sha256"] == hashlib.sha256(out.read_bytes()).hexdigest()
    # The mark survives the metadata step.
    assert main(["examine", str(out), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["work_id"] == rep["work_id"]


def test_existing_rights_are_kept_unless_replaced(profile_home, jpeg_full, tmp_path, capsys):
    exiftool_write(jpeg_full, "-XMP-dc:Creator=Agency Staff", "-IPTC:By-line=Agency Staff")
    out = tmp_path / "kept.jpg"
    assert main(["mark", str(jpeg_full), "--out", str(out), "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert "creator" in rep["rights_kept"]
    assert exiftool_value(out, "XMP-dc:Creator") == "Agency Staff"      # exiftool
    assert exiftool_value(out, "IPTC:By-line") == "Agency Staff"
    out2 = tmp_path / "replaced.jpg"
    assert main(["mark", str(jpeg_full), "--out", str(out2), "--replace-rights"]) == 0
    assert exiftool_value(out2, "XMP-dc:Creator") == OWNER
    assert exiftool_value(out2, "IPTC:By-line") == OWNER


def test_rights_set_become_the_defaults(profile_home, jpeg_full, tmp_path, capsys):
    assert main(["rights", "set", "--copyright", "© 2024 Ilse Marrow, Portwick",
                 "--web-statement", "https://marrow.example/terms"]) == 0
    assert main(["rights", "show", "--json"]) == 0
    capsys.readouterr()
    out = tmp_path / "m.png"
    assert main(["mark", str(jpeg_full), "--out", str(out)]) == 0
    assert exiftool_value(out, "XMP-dc:Rights") == "© 2024 Ilse Marrow, Portwick"   # exiftool
    assert exiftool_value(out, "XMP-xmpRights:WebStatement") == "https://marrow.example/terms"
    assert main(["rights", "set", "--web-statement", "not a url"]) == 2
    assert "URL" in capsys.readouterr().err


def test_16bit_tiff_stays_16bit_with_its_fields(profile_home, tmp_path, capsys):
    src = tmp_path / "scan.tif"
    rgb = (data.coffee()[:200, :260].astype(np.uint16) * 257
           + np.arange(260, dtype=np.uint16)[None, :, None])
    tifffile.imwrite(src, rgb, photometric="rgb", resolution=(300, 300), resolutionunit="INCH")
    exiftool_write(src, "-IFD0:Artist=Ilse Marrow", "-IPTC:City=Portwick",
                   "-XMP-dc:Title=Scan", "-ExifIFD:DateTimeOriginal=2024:05:01 10:00:00")
    for name in ("scan-m.tif", "scan-m.png"):
        out = tmp_path / name
        assert main(["mark", str(src), "--out", str(out), "--json"]) == 0
        rep = json.loads(capsys.readouterr().out)
        assert rep["bit_depth"] == 16
        # exiftool: 16 bits per sample in the file as written.
        bits = exiftool_value(out, "BitsPerSample" if name.endswith("tif") else "BitDepth")
        assert bits.split()[0] == "16"
        got = exif_groups(out)
        assert got["XMP-dc"]["Title"] == "Scan"
        assert got["ExifIFD"]["DateTimeOriginal"] == "2024:05:01 10:00:00"
        if name.endswith("tif"):
            assert got["IFD0"]["Artist"] == "Ilse Marrow" and got["IPTC"]["City"] == "Portwick"
            assert got["IFD0"]["XResolution"] == 300 and rep["metadata_dropped"] == []


def test_png_text_and_dpi_kept_and_named_when_the_format_cannot(profile_home, tmp_path, capsys):
    src = tmp_path / "poster.png"
    info = PngInfo()
    info.add_text("Artist", "Ilse Marrow")
    info.add_text("Copyright", "(c) Ilse Marrow")
    Image.fromarray(photo()).save(src, pnginfo=info, dpi=(300, 300))
    out = tmp_path / "poster-m.png"
    assert main(["mark", str(src), "--out", str(out), "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    got = exif_groups(out)
    assert rep["metadata_dropped"] == []
    assert got["PNG"]["Artist"] == "Ilse Marrow" and got["PNG"]["Copyright"] == "(c) Ilse Marrow"
    assert got["PNG-pHYs"]["PixelsPerUnitX"] == 11811 and got["PNG-pHYs"]["PixelUnits"] == 1
    # JPEG has no PNG text chunks: named per file, in JSON and in words.
    jpg = tmp_path / "poster-m.jpg"
    assert main(["mark", str(src), "--out", str(jpg), "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert [d["block"] for d in rep["metadata_dropped"]] == ["PNG text"]
    assert rep["metadata_dropped"][0]["tags"] == ["Artist", "Copyright"]
    assert exiftool_value(jpg, "JFIF:XResolution") == "300"      # exiftool
    jpg2 = tmp_path / "poster-m2.jpg"
    assert main(["mark", str(src), "--out", str(jpg2)]) == 0
    assert "metadata not kept: PNG text (Artist, Copyright)" in capsys.readouterr().out


@pytest.mark.skipif(not CMYK_ICC.is_file(), reason="Ghostscript's CMYK profile (libgs-common)")
def test_cmyk_jpeg_is_converted_through_its_profile(profile_home, tmp_path, capsys):
    src = tmp_path / "print.jpg"
    cmyk_icc = CMYK_ICC.read_bytes()
    Image.fromarray(photo()).convert("CMYK").save(src, quality=95, icc_profile=cmyk_icc)
    out = tmp_path / "print-m.jpg"
    assert main(["mark", str(src), "--out", str(out), "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert any("embedded ICC profile" in n for n in rep["notes"])
    # exiftool: the marked file is RGB with an RGB (sRGB) profile, not the CMYK one.
    assert exiftool_value(out, "ICC_Profile:ColorSpaceData").strip() == "RGB"
    assert exiftool_value(out, "File:ColorComponents") == "3"
    # The pixels follow LittleCMS's conversion (the library Pillow binds), not the plain formula.
    with Image.open(src) as im:
        ref = np.asarray(ImageCms.profileToProfile(
            im, ImageCms.ImageCmsProfile(CMYK_ICC.open("rb")), ImageCms.createProfile("sRGB"),
            outputMode="RGB"), dtype=float)
        plain = np.asarray(im.convert("RGB"), dtype=float)
    got = np.asarray(Image.open(out).convert("RGB"), dtype=float)
    assert np.abs(got - ref).mean() < np.abs(got - plain).mean()


def test_failed_marks_use_no_serial_and_replace_nothing(profile_home, jpeg_full, tmp_path,
                                                         capsys):
    from claimkit.evidence.profile import Profile

    def next_serial():
        with Profile.open_public(profile_home) as p:
            return int(p.registry.meta("next_serial"))

    start = next_serial()
    existing = tmp_path / "exists.jpg"
    existing.write_bytes(b"keep me")
    bad = tmp_path / "broken.jpg"
    bad.write_bytes(jpeg_full.read_bytes()[:3000])
    for argv in (["mark", str(jpeg_full), "--out", str(tmp_path / "x.bmp")],
                 ["mark", str(jpeg_full), "--out", str(existing)],
                 ["mark", str(bad), "--out", str(tmp_path / "b.jpg")],
                 ["mark", str(jpeg_full), "--out", str(jpeg_full), "--force"]):
        assert main(argv) == 2, argv
        assert capsys.readouterr().err.startswith("claimkit: error: ")
    assert next_serial() == start
    assert existing.read_bytes() == b"keep me"


def test_exiftool_ends_with_a_worker_that_ends_without_cleanup():
    # A pool worker ends with os._exit (no atexit). exiftool in -stay_open mode keeps polling
    # its argument file after end of file, so without a parent-death signal it would run on
    # forever: seen as a hundred orphaned perl processes after one test session.
    import os
    import time

    from claimkit import filemeta

    read, write = os.pipe()
    pid = os.fork()
    if pid == 0:  # the worker
        os.close(read)
        filemeta._TOOL.run(["-ver"])
        os.write(write, str(filemeta._TOOL._proc.pid).encode())
        os._exit(0)
    os.close(write)
    child_tool = int(os.read(read, 32))
    os.close(read)
    os.waitpid(pid, 0)
    deadline = time.monotonic() + 10
    while Path(f"/proc/{child_tool}").exists() and time.monotonic() < deadline:
        time.sleep(0.05)
    stat = Path(f"/proc/{child_tool}/stat")
    # Gone, or a zombie waiting for init to reap it ("Z" in /proc/PID/stat, proc(5)).
    assert not stat.exists() or stat.read_text().split(") ")[1].startswith("Z")


def test_exiftool_outlives_the_short_lived_thread_that_first_needed_it():
    # mark writes (and runs exiftool) on a helper thread that ends with the file. Linux sends
    # the parent-death signal when the thread that started a child ends (prctl(2)), so the
    # tool must not be started from that thread: the next command would find it killed.
    import threading
    import time

    from claimkit import filemeta

    tool = filemeta._ExifTool()
    try:
        t = threading.Thread(target=tool.run, args=(["-ver"],))
        t.start()
        t.join()
        first = tool._proc
        time.sleep(0.5)                        # time for a signal to arrive
        assert first is not None and first.poll() is None
        out, _ = tool.run(["-ver"])
        assert out.strip() and tool._proc is first     # the same process, not a new one
    finally:
        tool.close()
