"""Invisibility, robustness and calibration of the mark, with Pillow's codecs and filters as the attacker.

Check values from the trade (common practice, no source): invisible marks aim at
40 dB PSNR or more; ours is required to keep PSNR >= 42 dB and SSIM >= 0.985.
PSNR and SSIM here come from ``skimage.metrics``, not from claimkit.
"""

from __future__ import annotations

import numpy as np
import pytest
from PIL import Image
from skimage import data, metrics

from claimkit.imageio import to_luma
from claimkit.mark import detect
from claimkit.mark.pattern import MARK_FORMAT, key_pattern
from tests.engine_helpers import ATTACKS, OTHER_SEED, SEED, mark, payload, photos


def big_coffee():
    return np.asarray(Image.fromarray(data.coffee()).resize((2000, 1333), Image.BICUBIC))


def examine(rgb, seed=SEED, bits=None):
    want = payload() if bits is None else bits
    known = np.full(64, -1)
    known[:16] = want[:16]   # the owner tag is known to the examiner
    return detect.examine_luma(to_luma(rgb), seed, known_bits=known,
                               payload_check=lambda b: bool(np.array_equal(b, want)))


@pytest.fixture(scope="module")
def marked():
    return {name: (rgb, mark(rgb)) for name, rgb in photos().items()}


def test_invisibility_on_natural_photos_and_a_smooth_sky(marked):
    for name, (rgb, mk) in marked.items():
        psnr = metrics.peak_signal_noise_ratio(rgb, mk, data_range=255)
        ssim = metrics.structural_similarity(rgb, mk, channel_axis=2, data_range=255)
        assert psnr >= 42.0, (name, psnr)
        assert ssim >= 0.985, (name, ssim)


def test_unattacked_copies_are_claimed_with_the_right_payload(marked):
    for name, (_, mk) in marked.items():
        f = examine(mk)
        assert f.detected and f.payload_valid, name
        assert f.payload_bits == payload().tolist()
        assert f.false_alarm_probability <= 1e-9


# Every attack on photos from 300 to 1411 px a side. (The thinnest margin measured,
# blur radius 2 on skimage's busy 512 x 512 immunohistochemistry slide, is left
# to the README's table rather than made a pass/fail test.)
CASES = [(p, a) for p in ("chelsea", "coffee", "hubble", "retina") for a in ATTACKS]


@pytest.fixture(scope="module")
def attacked(marked):
    return {(name, attack): examine(ATTACKS[attack](marked[name][1])) for name, attack in CASES}


@pytest.mark.parametrize("name,attack", CASES)
def test_attacked_copy_is_claimed(attacked, name, attack):
    f = attacked[name, attack]
    assert f.detected, (name, attack, f.log10_false_alarm)
    assert f.payload_valid and f.payload_bits == payload().tolist()
    assert f.mark_format == MARK_FORMAT
    assert f.false_alarm_probability <= 1e-9
    # The recovered message must beat the score of a flat guess clearly.
    assert f.message_psnr_db >= f.message_psnr_flat_db + 2.0


def test_message_psnr_is_computed_as_skimage_does_and_reaches_20_db(attacked, marked):
    """Issue target: the median message PSNR of every attack is at least 20 dB."""
    for f in attacked.values():
        # skimage.metrics: PSNR with data range 1 between the reference message and
        # the recovered one (after the least-squares gain/offset fit).
        ref = f.reference.astype(np.float64)
        ours = metrics.peak_signal_noise_ratio(ref, f.recovered.astype(np.float64), data_range=1.0)
        assert abs(ours - f.message_psnr_db) < 0.01
    # The median is taken over photos from 300 to 2000 px a side: the four above, the
    # rocket, and coffee enlarged to 2000 px (the range).
    extra = {"rocket": marked["rocket"][1], "coffee2000": mark(big_coffee())}
    for attack in ATTACKS:
        values = [attacked[n, a].message_psnr_db for n, a in CASES if a == attack]
        values += [examine(ATTACKS[attack](mk)).message_psnr_db or 0.0 for mk in extra.values()]
        med = float(np.median(values))
        assert med >= 20.0, (attack, med, values)


def test_copies_of_the_older_format_are_still_read(marked):
    """A copy marked in format 1 (64 pilots, rate-1/3 code) is found by the same search."""
    from claimkit.imageio import add_luma_delta
    from claimkit.mark import embed
    from claimkit.mark.pattern import FORMAT_1, mark_tile
    rgb, _ = marked["coffee"]
    pat = key_pattern(SEED, fmt=FORMAT_1)
    luma = to_luma(rgb)
    old = add_luma_delta(rgb, embed.apply_tiled(embed.perceptual_mask(luma),
                                                mark_tile(pat, pat.codeword(payload()))))
    f = examine(ATTACKS["jpeg75"](old))
    assert f.detected and f.payload_valid and f.mark_format == FORMAT_1.name
    assert f.payload_bits == payload().tolist()
    # Two formats' payloads are counted in the bound.
    assert f.payload_space == 2 * detect.DEFAULT_PAYLOAD_SPACE


def test_unmarked_and_other_owner_are_never_claimed(marked):
    for name, (rgb, mk) in marked.items():
        assert not examine(rgb).detected, name
        assert not examine(mk, seed=OTHER_SEED).detected, name


def test_calibration_on_unmarked_pictures_including_textures():
    """Fraction of unmarked pictures with P_fa <= p must be at most p (many pictures x keys)."""
    textures = [data.brick(), data.grass(), data.gravel(), data.text(), data.checkerboard(),
                data.moon(), data.coins(), data.page()]
    naturals = [to_luma(x) for x in (data.chelsea(), data.coffee(), data.rocket())]
    tiled_floor = np.kron((np.indices((16, 16)).sum(0) % 2) * 120 + 60, np.ones((32, 32)))
    pics = [t.astype(np.float32) for t in textures] + naturals + [tiled_floor.astype(np.float32)]
    rng = np.random.default_rng(11)
    pvals = []
    for pic in pics:
        prep = detect.prepare(pic)   # key-independent; reused for every key
        for _ in range(25):
            f = detect.examine_luma(pic, rng.bytes(32), payload_check=lambda b: False,
                                    prepared=prep)
            assert not f.detected
            pvals.append(f.false_alarm_probability)
    key_pattern.cache_clear()
    pvals = np.asarray(pvals)
    for p in (0.01, 0.05, 0.2):
        assert np.mean(pvals <= p) <= p, p


@pytest.mark.parametrize("oy,ox,mirror", [(37, 53, False), (200, 301, False), (37, 53, True)])
def test_grid_offset_and_mirror_reported_exactly(marked, oy, ox, mirror):
    # The original's grid origin lies at (-ox mod 128, -oy mod 128) in a crop made at
    # (ox, oy); a mirror of a W-wide copy puts it at W - 1 - x.
    _, mk = marked["hubble"]
    copy = mk[oy:oy + 500, ox:ox + 600]
    x0, y0 = (-ox) % 128, (-oy) % 128
    if mirror:
        copy = copy[:, ::-1]
        x0 = (599 - x0) % 128
    g = examine(np.ascontiguousarray(copy)).geometry
    assert g["flipped"] is mirror and g["rotation_deg"] == 0.0 and g["scale"] == 1.0
    assert g["shift_px"][0] % 128 == x0 and g["shift_px"][1] % 128 == y0


def test_large_photo_read_through_its_examined_window_gives_the_same_finding(tmp_path):
    # A photo over detect.MAX_EXAMINE_PIXELS, stored turned (EXIF orientation 6):
    # reading only the examined window must give the finding of the whole read.
    from PIL import Image

    from claimkit import workflow
    from claimkit.imageio import CURRENT_EXAMINATION_METHOD, read_picture

    base = np.asarray(Image.fromarray(data.coffee()).resize((2400, 1800), Image.BICUBIC))
    upright = mark(base)
    exif = Image.Exif()
    exif[0x0112] = 6          # EXIF 2.32 tag 0x0112: stored turned a quarter counter-clockwise
    path = tmp_path / "large.jpg"
    Image.fromarray(np.ascontiguousarray(np.rot90(upright, 1))).save(path, quality=85, exif=exif.tobytes())
    # the whole picture read by the same examination method as the window
    whole = read_picture(path, method=CURRENT_EXAMINATION_METHOD)
    part = workflow.read_for_examination(path)
    assert part.region == detect.central_window(upright.shape[:2]) != (0, 0, *upright.shape[:2])
    a, b = workflow.examine_picture(whole, SEED), workflow.examine_picture(part, SEED)
    assert a.detected and a.to_json() == b.to_json()
    assert workflow.report_for(path, whole, a) == workflow.report_for(path, part, b)
