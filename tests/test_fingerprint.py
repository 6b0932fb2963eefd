"""Perceptual fingerprint: invariances, the distance, and the match threshold.

Copies are made with Pillow's own resampling, JPEG encoder and enhancers;
pictures are the ``skimage.data`` images the project may use.
"""

from __future__ import annotations

import io
import itertools

import numpy as np
import pytest
import skimage.data
from PIL import Image, ImageEnhance

from claimkit.imageio import to_luma
from claimkit.mark.fingerprint import (
    FINGERPRINT_BITS,
    LEVELS,
    MATCH_DISTANCE,
    _levels,
    _thermometer,
    fingerprint_distance,
    perceptual_fingerprint,
)

NAMES = [
    "coffee", "chelsea", "rocket", "hubble_deep_field", "immunohistochemistry", "retina",
    "brick", "grass", "gravel", "text", "moon", "coins",
]


def fp_of(im: Image.Image) -> str:
    return perceptual_fingerprint(to_luma(np.asarray(im)))


def copies(im: Image.Image) -> dict[str, Image.Image]:
    """The altered copies the threshold must tolerate, all made by Pillow."""
    w, h = im.size
    buf = io.BytesIO()
    im.save(buf, "JPEG", quality=50)
    buf.seek(0)
    side = 0.9**0.5  # a crop keeping 90 % of the area
    cw, ch = round(w * side), round(h * side)
    return {
        "resize 0.5": im.resize((w // 2, h // 2), Image.Resampling.LANCZOS),
        "JPEG 50": Image.open(buf).convert(im.mode),
        "contrast 0.8": ImageEnhance.Contrast(im).enhance(0.8),
        "crop 90% area, top-left": im.crop((0, 0, cw, ch)),
        "crop 90% area, bottom-right": im.crop((w - cw, h - ch, w, h)),
        "crop 90% each side, centred": im.crop(
            (round(0.05 * w), round(0.05 * h), round(0.95 * w), round(0.95 * h))
        ),
        "mirror": im.transpose(Image.Transpose.FLIP_LEFT_RIGHT),
    }


@pytest.fixture(scope="module")
def table():
    originals = {n: perceptual_fingerprint(to_luma(getattr(skimage.data, n)())) for n in NAMES}
    altered = {
        n: {k: fp_of(c) for k, c in copies(Image.fromarray(getattr(skimage.data, n)())).items()}
        for n in NAMES
    }
    return originals, altered


def test_copies_stay_within_the_threshold(table):
    originals, altered = table
    worst = {
        (n, k): fingerprint_distance(originals[n], f)
        for n in NAMES
        for k, f in altered[n].items()
    }
    over = {key: d for key, d in worst.items() if d > MATCH_DISTANCE}
    assert not over, f"copies beyond MATCH_DISTANCE={MATCH_DISTANCE}: {over}"
    # The threshold is not vacuous: copies do move the fingerprint.
    assert max(worst.values()) > 0


def test_different_pictures_stay_above_the_threshold(table):
    originals, altered = table
    pairs = {
        (a, b): fingerprint_distance(originals[a], originals[b])
        for a, b in itertools.combinations(NAMES, 2)
    }
    assert min(pairs.values()) > MATCH_DISTANCE, min(pairs.items(), key=lambda t: t[1])
    # An altered copy of one picture does not match another picture either.
    cross = {
        (a, k, b): fingerprint_distance(originals[b], f)
        for a in NAMES
        for k, f in altered[a].items()
        for b in NAMES
        if b != a
    }
    assert min(cross.values()) > MATCH_DISTANCE, min(cross.items(), key=lambda t: t[1])


def test_format_and_determinism():
    luma = to_luma(skimage.data.coffee())
    fp = perceptual_fingerprint(luma)
    assert len(fp) * 4 == FINGERPRINT_BITS == 128
    assert fp == fp.lower() and int(fp, 16) >= 0
    assert perceptual_fingerprint(luma.astype(np.float64)) == fp
    assert perceptual_fingerprint(luma.copy()) == fp


def test_brightness_and_contrast_leave_it_unchanged():
    # Without clipping, a*L + b changes only the DC term and the scale of the
    # AC terms, which the quantile steps follow.
    luma = to_luma(skimage.data.chelsea()).astype(np.float64)
    fp = perceptual_fingerprint(luma)
    for gain, offset in ((0.6, 30.0), (1.7, -12.0), (0.05, 200.0)):
        other = perceptual_fingerprint(gain * luma + offset)
        assert fingerprint_distance(fp, other, allow_mirror=False) == 0


def test_mirror_is_matched_exactly_for_even_widths():
    luma = to_luma(skimage.data.rocket())  # 640 columns
    assert luma.shape[1] % 2 == 0
    fp, flipped = perceptual_fingerprint(luma), perceptual_fingerprint(luma[:, ::-1])
    assert fingerprint_distance(fp, flipped, allow_mirror=False) > MATCH_DISTANCE
    assert fingerprint_distance(fp, flipped) == 0
    assert fingerprint_distance(flipped, fp) == 0


def test_distance_is_hamming_and_symmetric():
    rng = np.random.default_rng(7)
    for _ in range(200):
        a = rng.bytes(16).hex()
        b = rng.bytes(16).hex()
        # Independent popcount with Python integers.
        assert fingerprint_distance(a, b, allow_mirror=False) == bin(int(a, 16) ^ int(b, 16)).count("1")
        assert fingerprint_distance(a, b) == fingerprint_distance(b, a)
        assert fingerprint_distance(a, b) <= fingerprint_distance(a, b, allow_mirror=False)
        assert fingerprint_distance(a, a) == 0


def test_thermometer_code_turns_hamming_into_level_difference():
    rng = np.random.default_rng(11)
    for _ in range(100):
        la, lb = rng.integers(0, LEVELS, 32), rng.integers(0, LEVELS, 32)
        hamming = int(np.count_nonzero(_thermometer(la) != _thermometer(lb)))
        assert hamming == int(np.abs(la - lb).sum())


def test_levels_are_balanced_and_sign_symmetric():
    c = np.random.default_rng(3).normal(size=32)
    lv = _levels(c)
    np.testing.assert_array_equal(_levels(-c), LEVELS - 1 - lv)
    np.testing.assert_array_equal(_levels(5.0 * c), lv)
    counts = np.bincount(lv, minlength=LEVELS)
    assert counts[LEVELS // 2] == pytest.approx(32 / 5, abs=1)  # |c| below the 20 % quantile


def test_small_and_flat_pictures_are_handled():
    assert len(perceptual_fingerprint(np.zeros((5, 7)))) == 32
    assert len(perceptual_fingerprint(np.arange(12.0).reshape(3, 4))) == 32


@pytest.mark.parametrize(
    "bad",
    [np.zeros((4, 4, 3)), np.zeros((0, 5)), np.array([[1.0, np.nan], [0.0, 1.0]])],
)
def test_bad_luma_is_refused(bad):
    with pytest.raises(ValueError):
        perceptual_fingerprint(bad)


@pytest.mark.parametrize("bad", ["", "xyz", "ab" * 8, "ab" * 17])
def test_bad_fingerprint_strings_are_refused(bad):
    with pytest.raises(ValueError):
        fingerprint_distance(bad, "00" * 16)


def test_an_8_bit_luma_plane_gives_the_fingerprint_of_its_float_luma():
    # `claimkit examine` hands a JPEG's 8-bit luma plane to the fingerprint as it is (no
    # full-size float copy): the cell sums are exact in float64 either way, so the same bits.
    for name in ("coffee", "rocket", "text"):
        img = getattr(skimage.data, name)()
        grey = np.asarray(Image.fromarray(img).convert("L"))      # Pillow's 8-bit luma
        assert perceptual_fingerprint(grey) == perceptual_fingerprint(to_luma(grey))
