"""Reading and writing photos: pixels, bit depth, metadata, orientation, bad input.

References used by the checks below are named beside them. Images are small
generated arrays or crops of ``skimage.data`` pictures (coffee, chelsea).
"""

from __future__ import annotations

import hashlib
import os
import struct
import zlib
from pathlib import Path

import numpy as np
import pytest
import skimage.data
import tifffile
from PIL import Image, ImageCms, ImageOps
from skimage.metrics import peak_signal_noise_ratio

from claimkit import imageio
from claimkit.errors import InputError
from claimkit.imageio import (
    Picture,
    add_luma_delta,
    read_picture,
    to_luma,
    write_picture,
)

RNG = np.random.default_rng(20260502)


def sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def coffee(h: int = 120, w: int = 160) -> np.ndarray:
    return np.ascontiguousarray(skimage.data.coffee()[100 : 100 + h, 200 : 200 + w])


def grey8(h: int = 70, w: int = 90) -> np.ndarray:
    return RNG.integers(0, 256, (h, w), dtype=np.uint8)


def grey16(h: int = 70, w: int = 90) -> np.ndarray:
    return RNG.integers(0, 65536, (h, w), dtype=np.uint16)


def rgb16(h: int = 70, w: int = 90) -> np.ndarray:
    return RNG.integers(0, 65536, (h, w, 3), dtype=np.uint16)


def png_bytes(width: int, height: int, bit_depth: int, colour_type: int, rows: bytes) -> bytes:
    """A minimal PNG built by hand (W3C PNG 2nd ed. §5, §11.2.2; filter 0).

    Used where Pillow cannot make the file itself (16-bit colour) and for a
    header that claims more pixels than the file holds.
    """

    def chunk(kind: bytes, body: bytes) -> bytes:
        crc = zlib.crc32(kind + body) & 0xFFFFFFFF
        return struct.pack(">I", len(body)) + kind + body + struct.pack(">I", crc)

    ihdr = struct.pack(">IIBBBBB", width, height, bit_depth, colour_type, 0, 0, 0)
    return (
        b"\x89PNG\r\n\x1a\n"
        + chunk(b"IHDR", ihdr)
        + chunk(b"IDAT", zlib.compress(rows))
        + chunk(b"IEND", b"")
    )


def srgb_icc() -> bytes:
    return ImageCms.ImageCmsProfile(ImageCms.createProfile("sRGB")).tobytes()


XMP = (
    b'<x:xmpmeta xmlns:x="adobe:ns:meta/"><rdf:RDF '
    b'xmlns:rdf="http://www.w3.org/1999/02/22-rdf-syntax-ns#"><rdf:Description '
    b'xmlns:dc="http://purl.org/dc/elements/1.1/" dc:creator="Ilse Marrow, Harwick Bay '
    b'Studio"/></rdf:RDF></x:xmpmeta>'
)


def camera_exif(orientation: int | None = None) -> Image.Exif:
    exif = Image.Exif()
    exif[0x010F] = "Harwick Optics"  # Make
    exif[0x0110] = "HB-7"  # Model
    exif[0x013B] = "Ilse Marrow"  # Artist
    if orientation is not None:
        exif[0x0112] = orientation
    exif[0x8769] = {0x9003: "2025:06:14 07:31:02", 0xA431: "HB7-004211"}
    return exif


# ------------------------------------------------------------- round trips


@pytest.mark.parametrize("suffix", [".png", ".tif", ".tiff"])
@pytest.mark.parametrize("kind", ["grey8", "rgb8", "grey16"])
def test_lossless_round_trip(tmp_path, suffix, kind):
    arr = {"grey8": grey8(), "rgb8": coffee(), "grey16": grey16()}[kind]
    src = tmp_path / f"src{suffix}"
    Image.fromarray(arr).save(src)
    pic = read_picture(src)
    assert pic.pixels.dtype == arr.dtype and pic.bit_depth == arr.dtype.itemsize * 8
    np.testing.assert_array_equal(pic.pixels, arr)
    out = tmp_path / f"out{suffix}"
    write_picture(out, pic.pixels, like=pic)
    # Read back with Pillow directly, not with our reader.
    with Image.open(out) as im:
        back = np.asarray(im)
    np.testing.assert_array_equal(back.astype(arr.dtype), arr)
    np.testing.assert_array_equal(read_picture(out).pixels, arr)


def test_16bit_colour_tiff_round_trip_is_exact(tmp_path):
    arr = rgb16()
    src = tmp_path / "master.tif"
    tifffile.imwrite(src, arr, photometric="rgb")
    pic = read_picture(src)
    assert pic.bit_depth == 16 and pic.pixels.dtype == np.uint16
    np.testing.assert_array_equal(pic.pixels, arr)
    assert not pic.notes
    out = tmp_path / "marked.tif"
    write_picture(out, pic.pixels, like=pic)
    np.testing.assert_array_equal(tifffile.imread(out), arr)  # independent reader
    np.testing.assert_array_equal(read_picture(out).pixels, arr)


def test_16bit_colour_tiff_with_alpha_keeps_alpha(tmp_path):
    arr = rgb16(40, 50)
    alpha = RNG.integers(0, 65536, (40, 50), dtype=np.uint16)
    src = tmp_path / "a.tif"
    tifffile.imwrite(src, np.dstack([arr, alpha]), photometric="rgb", extrasamples=[2])
    pic = read_picture(src)
    np.testing.assert_array_equal(pic.pixels, arr)
    np.testing.assert_array_equal(pic.alpha, alpha)
    out = tmp_path / "b.tif"
    write_picture(out, pic.pixels, like=pic)
    np.testing.assert_array_equal(tifffile.imread(out), np.dstack([arr, alpha]))


def test_16bit_colour_png_is_read_at_full_precision(tmp_path):
    # The PNG is built byte by byte here (png_bytes, after the PNG specification), not by
    # the codec under test, so the check is against independently made data.
    arr = rgb16(20, 30)
    src = tmp_path / "deep.png"
    src.write_bytes(png_bytes(30, 20, 16, 2, b"".join(
        b"\x00" + row.astype(">u2").tobytes() for row in arr)))
    pic = read_picture(src)
    assert pic.bit_depth == 16 and pic.pixels.dtype == np.uint16
    np.testing.assert_array_equal(pic.pixels, arr)


def test_16bit_colour_png_output_stays_16_bit(tmp_path):
    src = tmp_path / "m.tif"
    tifffile.imwrite(src, rgb16(), photometric="rgb")
    pic = read_picture(src)
    out = tmp_path / "out.png"
    write_picture(out, pic.pixels, like=pic)
    # Reader: Python's zlib and the PNG layout (IHDR bit depth 16, colour type 2), not imagecodecs.
    raw = out.read_bytes()
    assert raw[24] == 16 and raw[25] == 2
    np.testing.assert_array_equal(read_picture(out).pixels, pic.pixels)


def test_16bit_to_jpeg_is_rounded_to_8_bits(tmp_path):
    arr16 = (coffee().astype(np.uint16) * 257)
    src = tmp_path / "m.tif"
    tifffile.imwrite(src, arr16, photometric="rgb")
    pic = read_picture(src)
    out = tmp_path / "web.jpg"
    write_picture(out, pic.pixels, like=pic)
    with Image.open(out) as im:
        assert im.mode == "RGB"
        back = np.asarray(im)
    # skimage.metrics PSNR against the 8-bit version: JPEG q95 4:4:4 on this
    # crop is far above 35 dB (common practice, no source, for "visually equal").
    assert peak_signal_noise_ratio(coffee(), back, data_range=255) > 35


@pytest.mark.parametrize("suffix", [".jpg", ".jpeg", ".webp"])
def test_lossy_round_trip_is_close(tmp_path, suffix):
    arr = coffee()
    src = tmp_path / "src.png"
    Image.fromarray(arr).save(src)
    pic = read_picture(src)
    out = tmp_path / f"out{suffix}"
    write_picture(out, pic.pixels, like=pic)
    back = read_picture(out).pixels
    assert back.shape == arr.shape
    # skimage.metrics PSNR; quality 95 keeps well above 35 dB.
    assert peak_signal_noise_ratio(arr, back, data_range=255) > 35


def test_jpeg_quality_95_uses_444_chroma(tmp_path):
    from PIL import JpegImagePlugin

    src = tmp_path / "s.png"
    Image.fromarray(coffee()).save(src)
    pic = read_picture(src)
    write_picture(tmp_path / "hi.jpg", pic.pixels, like=pic)
    write_picture(tmp_path / "lo.jpg", pic.pixels, like=pic, quality=75)
    with Image.open(tmp_path / "hi.jpg") as hi, Image.open(tmp_path / "lo.jpg") as lo:
        # Pillow's own reading of the frame header: 0 is 4:4:4, 2 is 4:2:0.
        assert JpegImagePlugin.get_sampling(hi) == 0
        assert JpegImagePlugin.get_sampling(lo) == 2


def test_alpha_is_kept_in_png_and_dropped_only_by_jpeg(tmp_path):
    rgba = np.dstack([coffee(64, 80), RNG.integers(0, 256, (64, 80), dtype=np.uint8)])
    src = tmp_path / "t.png"
    Image.fromarray(rgba, "RGBA").save(src)
    pic = read_picture(src)
    assert pic.pixels.shape == (64, 80, 3)
    np.testing.assert_array_equal(pic.alpha, rgba[..., 3])
    for suffix in (".png", ".tif"):
        write_picture(tmp_path / f"o{suffix}", pic.pixels, like=pic)
        with Image.open(tmp_path / f"o{suffix}") as im:
            assert im.mode == "RGBA"
            np.testing.assert_array_equal(np.asarray(im), rgba)
    write_picture(tmp_path / "o.jpg", pic.pixels, like=pic)
    with Image.open(tmp_path / "o.jpg") as im:
        assert im.mode == "RGB"


def test_grey_with_alpha_and_palette_with_transparency(tmp_path):
    la = np.dstack([grey8(64, 64), RNG.integers(0, 256, (64, 64), dtype=np.uint8)])
    Image.fromarray(la, "LA").save(tmp_path / "la.png")
    pic = read_picture(tmp_path / "la.png")
    np.testing.assert_array_equal(pic.pixels, la[..., 0])
    np.testing.assert_array_equal(pic.alpha, la[..., 1])

    pal = Image.fromarray(coffee(64, 64)).quantize(16)
    pal.info["transparency"] = 0
    pal.save(tmp_path / "p.png", transparency=0)
    with Image.open(tmp_path / "p.png") as im:
        ref = np.asarray(im.convert("RGBA"))  # Pillow's own palette expansion
    pic = read_picture(tmp_path / "p.png")
    assert pic.pixels.shape == (64, 64, 3)
    np.testing.assert_array_equal(pic.pixels, ref[..., :3])
    np.testing.assert_array_equal(pic.alpha, ref[..., 3])


def test_cmyk_without_profile_is_converted_and_noted(tmp_path):
    src = tmp_path / "print.jpg"
    Image.fromarray(coffee()).convert("CMYK").save(src, quality=95)
    pic = read_picture(src)
    assert pic.pixels.shape == coffee().shape and pic.pixels.dtype == np.uint8
    assert any("CMYK" in n and "without colour management" in n for n in pic.notes)


def test_animated_gif_uses_first_frame(tmp_path):
    frames = [Image.fromarray(np.full((70, 70), v, np.uint8)) for v in (10, 120, 240)]
    src = tmp_path / "anim.gif"
    frames[0].save(src, save_all=True, append_images=frames[1:])
    pic = read_picture(src)
    assert pic.pixels.shape[:2] == (70, 70)
    assert np.all(pic.pixels == 10)
    assert any("3 frames" in n for n in pic.notes)


# ------------------------------------------------------------- metadata


@pytest.mark.parametrize("suffix", [".jpg", ".png", ".tif", ".webp"])
def test_exif_icc_xmp_are_carried_over(tmp_path, suffix):
    icc = srgb_icc()
    src = tmp_path / "photo.jpg"
    Image.fromarray(coffee()).save(
        src, quality=92, exif=camera_exif().tobytes(), icc_profile=icc, xmp=XMP
    )
    pic = read_picture(src)
    assert pic.capture == {
        "Make": "Harwick Optics",
        "Model": "HB-7",
        "DateTimeOriginal": "2025:06:14 07:31:02",
        "BodySerialNumber": "HB7-004211",
    }
    assert pic.icc_profile == icc and pic.xmp == XMP
    out = tmp_path / f"marked{suffix}"
    write_picture(out, pic.pixels, like=pic)
    with Image.open(out) as im:
        assert im.info.get("icc_profile") == icc
        exif = im.getexif()
        assert exif.get(0x010F) == "Harwick Optics" and exif.get(0x013B) == "Ilse Marrow"
        sub = exif.get_ifd(0x8769)
        assert sub.get(0x9003) == "2025:06:14 07:31:02"
        assert sub.get(0xA431) == "HB7-004211"
        xmp = im.info.get("xmp")
        if xmp is None and suffix == ".tif":
            xmp = im.tag_v2.get(700)
        if isinstance(xmp, str):
            xmp = xmp.encode()
        assert xmp == XMP


def test_16bit_colour_tiff_keeps_icc_xmp_and_ifd0_fields(tmp_path):
    """What the tifffile path claims: ICC, XMP and descriptive IFD0 tags."""
    icc = srgb_icc()
    src = tmp_path / "m.tif"
    tifffile.imwrite(src, rgb16(), photometric="rgb",
                     extratags=[(34675, "B", len(icc), icc, True), (700, "B", len(XMP), XMP, True),
                                (0x010F, "s", 0, "Harwick Optics", True)])
    pic = read_picture(src)
    assert pic.icc_profile == icc and pic.xmp == XMP and pic.capture["Make"] == "Harwick Optics"
    out = tmp_path / "o.tif"
    write_picture(out, pic.pixels, like=pic)
    with tifffile.TiffFile(out) as tif:
        tags = tif.pages[0].tags
        assert bytes(tags[34675].value) == icc
        assert bytes(tags[700].value) == XMP
        assert tags[0x010F].value == "Harwick Optics"


def test_tiff_structure_tags_are_not_copied_as_exif(tmp_path):
    src = tmp_path / "s.tif"
    Image.fromarray(coffee()).save(src, exif=camera_exif().tobytes())
    pic = read_picture(src)
    exif = Image.Exif()
    exif.load(pic.exif)
    assert exif.get(0x010F) == "Harwick Optics"
    assert 273 not in exif and 279 not in exif  # StripOffsets, StripByteCounts (TIFF 6.0)


def test_grey_icc_is_not_put_on_colour_output(tmp_path):
    grey_icc = ImageCms.ImageCmsProfile(ImageCms.createProfile("LAB")).tobytes()
    assert grey_icc[16:20] != b"RGB "
    src = tmp_path / "g.png"
    Image.fromarray(grey8()).save(src)
    pic = read_picture(src)
    pic.icc_profile = grey_icc
    write_picture(tmp_path / "o.webp", pic.pixels, like=pic)  # WebP stores grey as RGB
    with Image.open(tmp_path / "o.webp") as im:
        assert "icc_profile" not in im.info or not im.info["icc_profile"]


# ------------------------------------------------------------- orientation


def oriented_file(tmp_path: Path, orientation: int, suffix: str = ".png") -> tuple[Path, np.ndarray]:
    stored = coffee(60, 90)
    path = tmp_path / f"o{orientation}{suffix}"
    Image.fromarray(stored).save(path, exif=camera_exif(orientation).tobytes())
    return path, stored


@pytest.mark.parametrize("orientation", [2, 3, 4, 5, 6, 7, 8])
def test_orientation_matches_pillow_exif_transpose(tmp_path, orientation):
    path, _ = oriented_file(tmp_path, orientation)
    with Image.open(path) as im:
        ref = np.asarray(ImageOps.exif_transpose(im))  # Pillow's own implementation
    pic = read_picture(path)
    np.testing.assert_array_equal(pic.pixels, ref)


@pytest.mark.parametrize("orientation", [6, 8])
def test_orientation_6_and_8_follow_the_exif_definition(tmp_path, orientation):
    path, stored = oriented_file(tmp_path, orientation)
    pic = read_picture(path)
    h, w = stored.shape[:2]
    assert pic.pixels.shape[:2] == (w, h)
    # EXIF 2.32 (CIPA DC-008) tag 0x0112: for 6 the stored 0th row is the
    # visual right-hand side and the 0th column the visual top; for 8 the 0th
    # row is the visual left-hand side and the 0th column the visual bottom.
    if orientation == 6:
        np.testing.assert_array_equal(pic.pixels[:, -1], stored[0])
        np.testing.assert_array_equal(pic.pixels[0, ::-1], stored[:, 0])
    else:
        np.testing.assert_array_equal(pic.pixels[::-1, 0], stored[0])
        np.testing.assert_array_equal(pic.pixels[-1, :], stored[:, 0])
    # Written back upright with Orientation 1, so no reader rotates twice.
    out = tmp_path / "up.png"
    write_picture(out, pic.pixels, like=pic)
    with Image.open(out) as im:
        assert im.getexif().get(0x0112) == 1
        np.testing.assert_array_equal(np.asarray(ImageOps.exif_transpose(im)), pic.pixels)
    np.testing.assert_array_equal(read_picture(out).pixels, pic.pixels)


@pytest.mark.parametrize("orientation", [1, 2, 3, 4, 5, 6, 7, 8])
@pytest.mark.parametrize("suffix", [".png", ".jpg"])
def test_region_read_is_the_part_of_the_upright_picture(tmp_path, orientation, suffix):
    # The part asked for is cut from the picture Pillow's own exif_transpose gives.
    stored = coffee(60, 90)
    path = tmp_path / f"r{orientation}{suffix}"
    rgba = np.dstack([stored, np.tile(np.arange(90, dtype=np.uint8), (60, 1))])
    if suffix == ".png":
        Image.fromarray(rgba, "RGBA").save(path, exif=camera_exif(orientation).tobytes())
    else:
        Image.fromarray(stored).save(path, quality=90, exif=camera_exif(orientation).tobytes())
    with Image.open(path) as im:
        upright = np.asarray(ImageOps.exif_transpose(im))
    part = (7, 11, 23, 31)
    pic = read_picture(path, region=lambda size: part)
    np.testing.assert_array_equal(pic.pixels, upright[7:30, 11:42, :3])
    if suffix == ".png":
        np.testing.assert_array_equal(pic.alpha, upright[7:30, 11:42, 3])
    assert pic.region == part and (pic.height, pic.width) == upright.shape[:2]
    assert pic.sha256 == read_picture(path).sha256


def test_region_read_of_16bit_colour_tiff(tmp_path):
    rgb16 = (RNG.integers(0, 65536, (40, 50, 3))).astype(np.uint16)
    path = tmp_path / "c16.tif"
    tifffile.imwrite(path, rgb16, photometric="rgb")
    pic = read_picture(path, region=lambda size: (5, 6, 20, 30))
    np.testing.assert_array_equal(pic.pixels, rgb16[5:25, 6:36])
    assert (pic.height, pic.width) == (40, 50) and pic.bit_depth == 16


def test_orientation_applies_to_jpeg_and_alpha(tmp_path):
    rgba = np.dstack([coffee(60, 90), np.tile(np.arange(90, dtype=np.uint8), (60, 1))])
    path = tmp_path / "a.png"
    Image.fromarray(rgba, "RGBA").save(path, exif=camera_exif(6).tobytes())
    pic = read_picture(path)
    assert pic.alpha.shape == (90, 60)
    np.testing.assert_array_equal(pic.alpha, np.rot90(rgba[..., 3], -1))
    jpath, stored = oriented_file(tmp_path, 8, ".jpg")
    assert read_picture(jpath).pixels.shape[:2] == stored.shape[1::-1]


# ------------------------------------------------------------- writing rules


def make_source(tmp_path: Path) -> tuple[Path, Picture]:
    src = tmp_path / "original.jpg"
    Image.fromarray(coffee()).save(src, quality=90, exif=camera_exif().tobytes())
    return src, read_picture(src)


def test_original_is_byte_identical_after_read_and_write(tmp_path):
    src, _ = make_source(tmp_path)
    before = sha256(src)
    pic = read_picture(src)
    write_picture(tmp_path / "marked.jpg", add_luma_delta(pic.pixels, np.ones(pic.pixels.shape[:2],
                                                                            np.float32)), like=pic)
    write_picture(tmp_path / "marked.jpg", pic.pixels, like=pic, force=True)
    assert sha256(src) == before


def test_never_writes_over_the_original_even_with_force(tmp_path):
    src, pic = make_source(tmp_path)
    before = sha256(src)
    with pytest.raises(InputError, match="original") as err:
        write_picture(src, pic.pixels, like=pic, force=True)
    assert err.value.path == str(src)
    link = tmp_path / "alias.jpg"
    os.link(src, link)  # another name for the same file
    with pytest.raises(InputError, match="original"):
        write_picture(link, pic.pixels, like=pic, force=True)
    assert sha256(src) == before


def test_existing_output_needs_force(tmp_path):
    src, pic = make_source(tmp_path)
    out = tmp_path / "out.png"
    out.write_bytes(b"keep me")
    with pytest.raises(InputError, match="already exists; use --force") as err:
        write_picture(out, pic.pixels, like=pic)
    assert err.value.path == str(out)
    assert out.read_bytes() == b"keep me"
    write_picture(out, pic.pixels, like=pic, force=True)
    np.testing.assert_array_equal(read_picture(out).pixels, pic.pixels)


def test_unknown_extension_and_missing_folder_are_refused(tmp_path):
    _, pic = make_source(tmp_path)
    with pytest.raises(InputError, match="unknown output extension"):
        write_picture(tmp_path / "out.bmp", pic.pixels, like=pic)
    with pytest.raises(InputError, match="does not exist"):
        write_picture(tmp_path / "nope" / "out.png", pic.pixels, like=pic)


@pytest.mark.parametrize("force", [False, True])
def test_failed_write_leaves_nothing_behind(tmp_path, monkeypatch, force):
    _, pic = make_source(tmp_path)
    out = tmp_path / "out.png"
    if force:
        out.write_bytes(b"previous")
    before = sorted(p.name for p in tmp_path.iterdir())

    def broken_fsync(fd):
        raise OSError(5, "Input/output error")

    monkeypatch.setattr(imageio.os, "fsync", broken_fsync)
    with pytest.raises(InputError, match="cannot write") as err:
        write_picture(out, pic.pixels, like=pic, force=force)
    assert err.value.path == str(out)
    assert sorted(p.name for p in tmp_path.iterdir()) == before
    if force:
        assert out.read_bytes() == b"previous"


def test_failed_encoding_leaves_nothing_behind(tmp_path, monkeypatch):
    _, pic = make_source(tmp_path)

    def broken_save(self, fp, format=None, **kw):
        fp.write(b"half a file")
        raise OSError("encoder error -2")

    monkeypatch.setattr(Image.Image, "save", broken_save)
    with pytest.raises(InputError, match="cannot encode as JPEG"):
        write_picture(tmp_path / "out.jpg", pic.pixels, like=pic)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["original.jpg"]


# ------------------------------------------------------------- bad input


def assert_input_error(path: Path, pattern: str, **kw) -> InputError:
    with pytest.raises(InputError, match=pattern) as err:
        read_picture(path, **kw)
    assert err.value.path == str(path)
    assert str(path) in err.value.line()
    return err.value


def test_missing_file(tmp_path):
    assert_input_error(tmp_path / "absent.jpg", "no such file")


def test_folder_instead_of_file(tmp_path):
    assert_input_error(tmp_path, "folder")


@pytest.mark.skipif(os.name != "posix" or os.geteuid() == 0, reason="root reads any file")
def test_unreadable_file(tmp_path):
    path = tmp_path / "locked.png"
    Image.fromarray(grey8()).save(path)
    path.chmod(0)
    try:
        assert_input_error(path, "permission denied")
    finally:
        path.chmod(0o644)


def test_permission_error_is_named(tmp_path, monkeypatch):
    # Runs as root too (where chmod 0 does not stop reading): the OS error
    # itself is simulated, the mapping to a one-line cause is what is tested.
    path = tmp_path / "locked.png"
    Image.fromarray(grey8()).save(path)

    def denied(self):
        raise PermissionError(13, "Permission denied", str(self))

    monkeypatch.setattr(Path, "read_bytes", denied)
    assert_input_error(path, "permission denied")


def test_empty_file(tmp_path):
    path = tmp_path / "empty.jpg"
    path.write_bytes(b"")
    assert_input_error(path, "truncated image data")


@pytest.mark.parametrize("suffix,keep", [(".jpg", 0.5), (".png", 0.5), (".png", 40 / 1e9)])
def test_truncated_file(tmp_path, suffix, keep):
    whole = tmp_path / f"whole{suffix}"
    Image.fromarray(coffee()).save(whole)
    data = whole.read_bytes()
    cut = tmp_path / f"cut{suffix}"
    cut.write_bytes(data[: max(int(len(data) * keep), 40)])
    assert_input_error(cut, "truncated image data")


def test_not_an_image(tmp_path):
    path = tmp_path / "notes.jpg"
    path.write_text("Tidewater Home Goods order list\n" * 20)
    assert_input_error(path, "not an image Pillow can read")


def test_pixel_limit_from_argument_and_environment(tmp_path, monkeypatch):
    path = tmp_path / "s.png"
    Image.fromarray(grey8(100, 100)).save(path)
    err = assert_input_error(path, "10000 pixels exceeds the limit of 9999", max_pixels=9999)
    assert "--max-pixels" in err.message
    assert read_picture(path, max_pixels=10000).pixels.shape == (100, 100)
    monkeypatch.setenv("CLAIMKIT_MAX_PIXELS", "5000")
    assert_input_error(path, "exceeds the limit of 5000")
    monkeypatch.setenv("CLAIMKIT_MAX_PIXELS", "lots")
    with pytest.raises(InputError, match="CLAIMKIT_MAX_PIXELS"):
        read_picture(path)


def test_decompression_bomb_is_refused_from_the_header(tmp_path):
    # A 30000 x 30000 header over a few bytes of data: 900 megapixels claimed,
    # refused before any decoding; Pillow's own global limit is left as it was.
    path = tmp_path / "bomb.png"
    path.write_bytes(png_bytes(30000, 30000, 8, 0, b"\x00" * 64))
    pil_limit = Image.MAX_IMAGE_PIXELS
    assert_input_error(path, "900000000 pixels exceeds the limit of 200000000")
    assert Image.MAX_IMAGE_PIXELS == pil_limit


def test_float_pixels_are_refused(tmp_path):
    path = tmp_path / "f.tif"
    Image.fromarray(RNG.random((64, 64), dtype=np.float32), "F").save(path)
    assert_input_error(path, "floating-point")


# ------------------------------------------------------------- luma


def test_to_luma_matches_pillow_bt601():
    rgb = skimage.data.chelsea()
    # Pillow's convert("L") documents the ITU-R 601-2 luma transform
    # L = R*299/1000 + G*587/1000 + B*114/1000 (integer arithmetic, so within
    # one level of the exact value).
    ref = np.asarray(Image.fromarray(rgb).convert("L")).astype(np.float32)
    luma = to_luma(rgb)
    assert luma.dtype == np.float32 and luma.shape == rgb.shape[:2]
    assert np.abs(luma - ref).max() <= 1.0
    # and the weights themselves, computed here in float64
    exact = rgb.astype(np.float64) @ np.array([0.299, 0.587, 0.114])
    assert np.abs(luma - exact).max() < 1e-3


def test_picture_carries_the_hash_of_the_bytes_it_was_decoded_from(tmp_path):
    path = tmp_path / "c.jpg"
    Image.fromarray(coffee()).save(path, quality=85)
    # FIPS 180-4 SHA-256 through hashlib, of the file as it is on disk
    assert read_picture(path).sha256 == sha256(path)


def test_to_luma_16bit_is_on_the_8bit_scale():
    a16 = grey16()
    np.testing.assert_allclose(to_luma(a16), a16 / 257.0, rtol=1e-6)
    c16 = coffee().astype(np.uint16) * 257
    np.testing.assert_allclose(to_luma(c16), to_luma(coffee()), atol=1e-3)
    assert to_luma(np.full((2, 2), 65535, np.uint16)).max() == pytest.approx(255.0)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16])
def test_add_luma_delta_moves_luma_and_keeps_colour(dtype):
    base = coffee().astype(dtype) * (257 if dtype == np.uint16 else 1)
    delta = RNG.normal(0, 2.0, base.shape[:2]).astype(np.float32)
    out = add_luma_delta(base, delta)
    assert out.dtype == base.dtype and out.shape == base.shape
    scale = 257.0 if dtype == np.uint16 else 1.0
    clipped = np.any((out == 0) | (out == np.iinfo(dtype).max), axis=2)
    change = (to_luma(out) - to_luma(base))[~clipped]
    # rounding each channel to a level moves luma by at most half a level
    assert np.abs(change - delta[~clipped]).max() <= 0.5 / scale + 1e-4
    # BT.601 colour differences (ITU-R BT.601-7 §2.5.2, Cb ∝ B - Y, Cr ∝ R - Y)
    # are unchanged up to the same rounding.
    for a, b in ((base, out),):
        fa, fb = a.astype(np.float64) / scale, b.astype(np.float64) / scale
        ya, yb = fa @ [0.299, 0.587, 0.114], fb @ [0.299, 0.587, 0.114]
        for c in (0, 2):
            diff = (fb[..., c] - yb) - (fa[..., c] - ya)
            assert np.abs(diff[~clipped]).max() <= 1.0 / scale + 1e-6


def test_add_luma_delta_clips_and_handles_grey():
    grey = np.array([[0, 128, 255]], np.uint8)
    out = add_luma_delta(grey, np.array([[-5.0, 0.4, 7.0]], np.float32))
    np.testing.assert_array_equal(out, [[0, 128, 255]])
    out = add_luma_delta(grey, np.array([[3.0, -2.6, -10.0]], np.float32))
    np.testing.assert_array_equal(out, [[3, 125, 245]])
    g16 = np.array([[65535, 1000]], np.uint16)
    np.testing.assert_array_equal(add_luma_delta(g16, np.array([[1.0, 1.0]], np.float32)),
                                  [[65535, 1257]])


@pytest.mark.parametrize("size", [(1, 1), (37, 5), (641, 480)])
def test_whole_image_rgb_unpacking_equals_pillows_own(size):
    """The one-call unpacker gives exactly the bytes Pillow's np.asarray path gives."""
    from claimkit.imageio import _rgb_array
    rgb = np.random.default_rng(size[0]).integers(0, 256, (size[1], size[0], 3), dtype=np.uint8)
    im = Image.fromarray(rgb)
    got = _rgb_array(im)
    assert got.dtype == np.uint8 and got.shape == rgb.shape
    np.testing.assert_array_equal(got, np.asarray(im))
    np.testing.assert_array_equal(got, rgb)
