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
