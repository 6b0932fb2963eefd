"""Marking without avoidable copies: the shared RGBX buffer and the bytes kept from the write.

The fast paths must give exactly what the plain ones give: the same JPEG bytes, the
same hash as ``sha256sum`` of the file on disk, the same decoded pixels.
"""

from __future__ import annotations

import hashlib
import io
import subprocess

import numpy as np
import pytest
from PIL import Image
from skimage import data

from claimkit.imageio import (
    _encode,
    canvas_like,
    read_picture,
    write_picture_keeping_bytes,
)


def _photo(tmp_path, **save):
    src = tmp_path / "src.jpg"
    Image.fromarray(data.astronaut()).save(src, quality=90, **save)
    return read_picture(src)


@pytest.mark.parametrize("quality", [95, 80])
def test_encoding_from_the_rgbx_canvas_is_byte_identical(tmp_path, quality):
    exif = Image.Exif()
    exif[0x010F] = "Harwick Optics"
    pic = _photo(tmp_path, exif=exif.tobytes())
    canvas = canvas_like(pic.pixels)
    assert canvas.shape == pic.pixels.shape and canvas.base.shape[2] == 4
    canvas.base[..., 3] = 77            # the fourth byte is ignored, whatever it holds
    canvas[...] = pic.pixels
    shared = _encode(tmp_path / "a.jpg", "JPEG", canvas, None, pic, quality)
    plain = _encode(tmp_path / "b.jpg", "JPEG", np.ascontiguousarray(pic.pixels), None, pic,
                    quality)
    assert shared == plain
    # and it is the file Pillow writes from its own RGB copy (the reference encoder)
    buf = io.BytesIO()
    Image.fromarray(np.ascontiguousarray(pic.pixels)).save(
        buf, "JPEG", quality=quality, subsampling=0 if quality >= 90 else 2, exif=pic.exif)
    assert Image.open(io.BytesIO(shared)).tobytes() == Image.open(buf).tobytes()


def test_grey_and_16bit_pixels_get_plain_arrays():
    for pixels in (np.zeros((8, 9), np.uint8), np.zeros((8, 9, 3), np.uint16)):
        c = canvas_like(pixels)
        assert c.shape == pixels.shape and c.dtype == pixels.dtype and c.flags.c_contiguous


def test_the_kept_bytes_are_the_file_on_disk(tmp_path):
    pic = _photo(tmp_path)
    out = tmp_path / "out.jpg"

    def finish(staged_file, staged):      # a metadata step that changes the staged file
        with open(staged_file, "ab") as fh:
            fh.write(b"\0")
        return "done"

    canvas = canvas_like(pic.pixels)
    canvas[...] = pic.pixels
    result, kept = write_picture_keeping_bytes(out, canvas, like=pic, finish=finish)
    assert result == "done" and kept == out.read_bytes()
    # coreutils sha256sum as the outside reference for the hash a mark records
    ref = subprocess.run(["sha256sum", str(out)], capture_output=True, text=True,
                         check=True).stdout.split()[0]
    back = read_picture(out, data=kept)
    assert back.sha256 == hashlib.sha256(kept).hexdigest() == ref
    np.testing.assert_array_equal(back.pixels, read_picture(out).pixels)


@pytest.mark.parametrize("orientation", range(1, 9))
def test_jpeg_decoded_into_numpy_memory_is_pillows_decode(tmp_path, orientation):
    # Reference: Pillow's own decode into its own memory, turned by ImageOps.exif_transpose
    # (Pillow's reading of EXIF 2.32 tag 0x0112), copied out with np.asarray.
    from PIL import ImageOps

    from claimkit.imageio import LUMA_FROM_JPEG_Y, padded_rows

    exif = Image.Exif()
    exif[0x0112] = orientation
    src = tmp_path / "turned.jpg"
    Image.fromarray(data.astronaut()[:301, :457]).save(src, quality=90, exif=exif.tobytes())
    pic = read_picture(src)
    want = np.asarray(ImageOps.exif_transpose(Image.open(src)))
    assert np.array_equal(pic.pixels, want)
    wide = padded_rows(pic.pixels)            # kept on 4 bytes a pixel, even when turned
    assert wide is not None and (wide[..., 3] == 255).all()
    grey = read_picture(src, method=LUMA_FROM_JPEG_Y)
    with Image.open(src) as im:
        im.draft("L", None)
        want_y = np.asarray(ImageOps.exif_transpose(im))
    assert grey.pixels.flags.c_contiguous and np.array_equal(grey.pixels, want_y)


def test_decoding_into_numpy_memory_keeps_the_truncation_error(tmp_path):
    from claimkit.errors import InputError

    src = tmp_path / "whole.jpg"
    Image.fromarray(data.astronaut()).save(src, quality=90)
    cut = tmp_path / "cut.jpg"
    cut.write_bytes(src.read_bytes()[:30_000])
    with pytest.raises(InputError, match="truncated"):
        read_picture(cut)
