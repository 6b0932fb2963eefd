"""Examination methods: the JPEG luma-plane reading against the plain RGB -> luma reading.

``jpeg-y-1`` decodes a colour JPEG to libjpeg's Y plane. It must keep the EXIF
orientation and the examined window, differ from BT.601 luma of the RGB decode
only by the decoder's rounding, and change no detection decision.
"""

from __future__ import annotations

import io

import imagecodecs
import numpy as np
import pytest
from engine_helpers import SEED, mark, payload, photos
from PIL import Image
from skimage import data

from claimkit.errors import InputError
from claimkit.imageio import (
    CURRENT_EXAMINATION_METHOD,
    LUMA_FROM_JPEG_Y,
    LUMA_FROM_RGB,
    read_picture,
    to_luma,
)
from claimkit.workflow import examine_picture, expected_payload_check, read_for_examination

# The luma plane is what the encoder computed from the original RGB (ITU-T T.871 §7, the
# BT.601 weights); luma of the decoded RGB adds the rounding of the YCbCr -> RGB conversion
# and, at 4:2:0, of chroma upsampling. Measured on coffee at quality 85: 0.27 (4:4:4) and
# 0.44 (4:2:0) grey levels rms. Stated bounds:
RMS_BOUND = 0.6        # grey levels, root mean square over the picture
Z_BOUND = 0.5          # change of the pilot z-score between the two readings


def _jpeg(rgb: np.ndarray, path, *, quality: int, subsampling: int, exif=None) -> None:
    kw = {"exif": exif} if exif is not None else {}
    Image.fromarray(rgb).save(path, quality=quality, subsampling=subsampling, **kw)


@pytest.mark.parametrize("subsampling", [0, 2])
def test_luma_plane_is_libjpegs_grey_output_and_close_to_rgb_luma(tmp_path, subsampling):
    f = tmp_path / "a.jpg"
    _jpeg(data.coffee(), f, quality=85, subsampling=subsampling)
    y = read_picture(f, method=LUMA_FROM_JPEG_Y)
    assert y.pixels.dtype == np.uint8 and y.pixels.ndim == 2
    assert y.examination_method == LUMA_FROM_JPEG_Y
    # Independent decoder: imagecodecs' libjpeg-turbo binding asked for grey output.
    ref = imagecodecs.jpeg8_decode(f.read_bytes(), outcolorspace="GRAY")
    np.testing.assert_array_equal(y.pixels, np.squeeze(ref))
    rgb = read_picture(f, method=LUMA_FROM_RGB)
    assert rgb.pixels.ndim == 3
    diff = y.pixels.astype(np.float64) - to_luma(rgb.pixels)
    assert np.sqrt(np.mean(diff ** 2)) < RMS_BOUND
    # Colours outside the RGB cube are clipped by the RGB decode, so a few pixels differ more.
    assert np.mean(np.abs(diff) > 2) < 0.01


@pytest.mark.parametrize("orientation", [3, 6, 8])
def test_luma_plane_keeps_the_exif_orientation_and_the_window(tmp_path, orientation):
    f = tmp_path / "turned.jpg"
    exif = Image.Exif()
    exif[0x0112] = orientation
    _jpeg(data.chelsea(), f, quality=90, subsampling=2, exif=exif.tobytes())
    y = read_picture(f, method=LUMA_FROM_JPEG_Y)
    rgb = read_picture(f)
    assert y.pixels.shape == rgb.pixels.shape[:2]          # turned like the RGB reading
    assert np.sqrt(np.mean((y.pixels - to_luma(rgb.pixels)) ** 2)) < RMS_BOUND

    def win(hw):
        return (hw[0] // 4, hw[1] // 3, hw[0] // 2, hw[1] // 2)

    part = read_picture(f, method=LUMA_FROM_JPEG_Y, region=win)
    r0, c0, h, w = win(y.pixels.shape)
    np.testing.assert_array_equal(part.pixels, y.pixels[r0:r0 + h, c0:c0 + w])


def test_other_files_are_read_as_before(tmp_path):
    rgb = data.rocket()
    Image.fromarray(rgb).save(tmp_path / "a.png")
    Image.fromarray(rgb).convert("CMYK").save(tmp_path / "c.jpg", quality=90)
    for name in ("a.png", "c.jpg"):
        a = read_picture(tmp_path / name, method=LUMA_FROM_JPEG_Y)
        b = read_picture(tmp_path / name)
        np.testing.assert_array_equal(a.pixels, b.pixels)
    with pytest.raises(InputError, match="unknown examination method"):
        read_picture(tmp_path / "a.png", method="jpeg-y-9")


@pytest.mark.slow
def test_no_decision_changes_and_z_moves_little(tmp_path):
    """Marked and unmarked JPEGs at 4:4:4 and 4:2:0: the same verdicts, payloads, geometry."""
    bits = payload(3)
    check = expected_payload_check(bits)
    cases = []
    pictures = photos()
    for name in ("coffee", "sky"):
        marked = mark(pictures[name], SEED, bits)
        for q, sub in ((95, 0), (75, 2)):
            cases.append(tmp_path / f"{name}-marked-{q}.jpg")
            _jpeg(marked, cases[-1], quality=q, subsampling=sub)
    cases.append(tmp_path / "rocket-plain-85.jpg")
    _jpeg(pictures["rocket"], cases[-1], quality=85, subsampling=2)
    detected = 0
    for f in cases:
        got = {}
        for method in (LUMA_FROM_RGB, LUMA_FROM_JPEG_Y):
            pic = read_for_examination(f, method=method)
            got[method] = examine_picture(pic, SEED, payload_check=check)
        a, b = got[LUMA_FROM_RGB], got[LUMA_FROM_JPEG_Y]
        assert a.detected == b.detected, f.name
        assert abs(a.z_pilot - b.z_pilot) < Z_BOUND, (f.name, a.z_pilot, b.z_pilot)
        if a.detected:
            detected += 1
            np.testing.assert_array_equal(a.payload_bits, b.payload_bits)
            assert a.geometry["flipped"] == b.geometry["flipped"]
            assert abs(a.geometry["rotation_deg"] - b.geometry["rotation_deg"]) < 0.05
        assert "plain" not in f.name or not a.detected
    assert detected >= 3      # the comparison covered detections, not only misses


def test_reports_name_the_method(tmp_path, profile):
    from claimkit.workflow import examine_file

    f = tmp_path / "a.jpg"
    _jpeg(data.coffee(), f, quality=85, subsampling=2)
    rep, _ = examine_file(profile, f)
    assert rep["examination_method"] == CURRENT_EXAMINATION_METHOD == LUMA_FROM_JPEG_Y


def test_decoded_y_plane_matches_a_whole_file_decode_of_the_window(tmp_path):
    """The window read from the Y decode holds what a decode of the whole file holds there."""
    big = np.tile(data.rocket(), (5, 4, 1))[:2100, :2300]   # over the window size
    f = tmp_path / "big.jpg"
    _jpeg(big, f, quality=80, subsampling=2)
    part = read_for_examination(f)
    whole = np.asarray(Image.open(io.BytesIO(f.read_bytes())).convert("L"))
    r0, c0, h, w = part.region
    assert part.pixels.shape == (h, w)
    # Pillow's convert("L") is luma of the RGB decode: the same bound as above.
    d = part.pixels.astype(np.float64) - whole[r0:r0 + h, c0:c0 + w]
    assert np.sqrt(np.mean(d ** 2)) < RMS_BOUND


@pytest.mark.parametrize("orientation", [1, 6])
def test_overview_of_the_luma_plane_is_the_reduced_whole_plane(tmp_path, orientation):
    """The coarse views' overview under ``jpeg-y-1``: Pillow's box reduction of the upright Y plane.

    It is what ``examine_picture`` builds from a picture read whole by the same method, and it
    differs from the RGB reading's overview only by the decoder's rounding (bound above).
    """
    from claimkit.mark import scales
    from claimkit.workflow import _overview

    big = np.tile(data.rocket(), (5, 4, 1))[:1700, :2500]   # over the window size, step 2
    f = tmp_path / "big.jpg"
    exif = Image.Exif()
    exif[0x0112] = orientation
    _jpeg(big, f, quality=85, subsampling=2, exif=exif.tobytes())
    part = read_for_examination(f, method=LUMA_FROM_JPEG_Y)
    whole = read_picture(f, method=LUMA_FROM_JPEG_Y)
    step = scales.overview_step(whole.pixels.shape)
    assert part.overview_step == step == 2 and part.overview is not None
    assert part.overview.ndim == 2 and part.overview.dtype == np.uint8
    np.testing.assert_array_equal(to_luma(part.overview), _overview(whole.pixels, step))
    rgb = read_for_examination(f, method=LUMA_FROM_RGB)
    assert rgb.overview is not None and rgb.overview.shape[:2] == part.overview.shape
    d = part.overview.astype(np.float64) - to_luma(rgb.overview)
    assert np.sqrt(np.mean(d ** 2)) < RMS_BOUND


@pytest.mark.parametrize("method,orientation", [(LUMA_FROM_JPEG_Y, 1), (LUMA_FROM_JPEG_Y, 6),
                                                (LUMA_FROM_RGB, 8)])
def test_the_whole_picture_kept_by_the_examination_read_is_a_whole_read(tmp_path, method,
                                                                        orientation):
    """``examine`` weighs its content line on the examination's own decoding (``keep_whole``):
    the very pixels a second, whole read by the same method gives (which it no longer makes)."""
    big = np.tile(data.rocket(), (5, 4, 1))[:2100, :2300]   # over the window size
    f = tmp_path / "big.jpg"
    exif = Image.Exif()
    exif[0x0112] = orientation
    _jpeg(big, f, quality=85, subsampling=2, exif=exif.tobytes())
    part = read_for_examination(f, method=method, keep_whole=True)
    whole = read_picture(f, method=method)
    assert part.whole is not None and part.whole.dtype == whole.pixels.dtype
    np.testing.assert_array_equal(part.whole, whole.pixels)
    np.testing.assert_array_equal(to_luma(part.whole), to_luma(whole.pixels))
    r0, c0, h, w = part.region
    np.testing.assert_array_equal(part.pixels, whole.pixels[r0:r0 + h, c0:c0 + w])
    assert read_for_examination(f, method=method).whole is None     # kept only when asked
