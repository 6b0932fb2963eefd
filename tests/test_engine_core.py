"""The numeric core against independent references (named beside each check)."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats as sps
from skimage import data, metrics

from claimkit.mark import detect, ecc, payload, quality, stats
from claimkit.mark.pattern import TILE, key_pattern, mark_tile
from tests.engine_helpers import SEED

CODES = {"rate_half": (ecc.RATE_HALF, 144), "rate_third": (ecc.RATE_THIRD, 216)}


@pytest.mark.parametrize("name", CODES)
def test_convolutional_code_round_trip_and_correction(name):
    code_, length = CODES[name]
    rng = np.random.default_rng(0)
    for _ in range(20):
        bits = rng.integers(0, 2, 64)
        code = code_.encode(bits)
        assert code.size == length == code_.coded_length(64)
        assert np.array_equal(code_.decode(2.0 * code - 1.0, 64), bits)
        # Per-symbol SNR 2 (about 2 % raw symbol errors): the code must fix them all.
        noisy = 2.0 * (2.0 * code - 1.0) + rng.normal(0, 1, code.size)
        assert (np.sign(noisy) != 2 * code - 1).sum() > 0
        assert np.array_equal(code_.decode(noisy, 64), bits)


@pytest.mark.parametrize("name, generators", [("rate_half", (0o561, 0o753)),
                                              ("rate_third", (0o557, 0o663, 0o711))])
def test_encoder_matches_generator_polynomials_by_hand(name, generators):
    # A single 1 followed by zeros: the output is the impulse response, i.e. the
    # generator polynomials (octal) read bit by bit from the MSB.
    code = CODES[name][0]
    k = len(generators)
    out = code.encode(np.array([1] + [0] * 8)).reshape(-1, k)[:9]
    for j, g in enumerate(generators):
        taps = [(g >> (8 - t)) & 1 for t in range(9)]
        assert out[:, j].tolist() == taps


def test_free_distances_match_the_published_table():
    # K. J. Larsen, IEEE Trans. Inf. Theory 19(3), 1973, tables I and II: constraint 9,
    # rate 1/2 (561, 753) has free distance 12; rate 1/3 (557, 663, 711) has 18.
    assert ecc.RATE_HALF.free_distance() == 12
    assert ecc.RATE_THIRD.free_distance() == 18


def test_known_bits_keep_the_decoder_to_them():
    rng = np.random.default_rng(5)
    bits = rng.integers(0, 2, 64)
    known = np.full(64, -1)
    known[:16] = 1 - bits[:16]        # the examiner "knows" the wrong owner tag
    out = ecc.RATE_HALF.decode(2.0 * ecc.RATE_HALF.encode(bits) - 1.0, 64, known=known)
    # Known bits are obeyed even when wrong; past the code's memory (8 bits) the
    # clean symbols win again.
    assert np.array_equal(out[:16], known[:16]) and np.array_equal(out[24:], bits[24:])


def test_current_format_pilots_are_a_prefix_of_the_older_format():
    from claimkit.mark.pattern import FORMAT_1, FORMAT_2
    new, old = key_pattern(SEED, fmt=FORMAT_2), key_pattern(SEED, fmt=FORMAT_1)
    assert new.pilot_pos.shape == (48, 2) and old.pilot_pos.shape == (64, 2)
    assert np.array_equal(new.pilot_pos, old.pilot_pos[:48])
    assert np.array_equal(new.pilot_sign, old.pilot_sign[:48])
    assert np.array_equal(new.carrier_phase, old.carrier_phase)
    assert new.code_pos.shape == (144, 2) and old.code_pos.shape == (216, 2)


def test_carrier_has_flat_magnitude_and_delta_autocorrelation():
    # Computed with numpy's FFT independently of the module's own conventions.
    pat = key_pattern(SEED)
    carrier = np.real(np.fft.ifft2(pat.carrier_phase))
    assert np.abs(np.fft.ifft2(pat.carrier_phase).imag).max() < 1e-12
    mag = np.abs(np.fft.fft2(carrier))
    assert np.allclose(mag[pat.band], mag[pat.band][0], rtol=1e-9)
    acf = np.real(np.fft.ifft2(np.abs(np.fft.fft2(carrier)) ** 2))
    off = np.abs(acf.ravel()[1:]).max()
    assert off < 0.01 * acf[0, 0]
    tile = mark_tile(pat, np.zeros(144, dtype=int))
    assert tile.shape == (TILE, TILE) and abs(float(tile.mean())) < 1e-5


def test_keys_give_different_patterns_and_are_deterministic():
    a, b = key_pattern(SEED), key_pattern(bytes(32))
    assert not np.allclose(a.carrier_phase, b.carrier_phase)
    assert np.array_equal(key_pattern(SEED).pilot_pos, a.pilot_pos)


def test_payload_packing():
    bits = payload.pack(0xBEEF, 123456, 0xABCDEF)
    assert bits.size == 64
    assert payload.unpack(bits) == {"owner_tag": 0xBEEF, "serial": 123456, "tag": 0xABCDEF}
    with pytest.raises(ValueError):
        payload.pack(1 << 16, 1, 1)


@pytest.mark.parametrize("z", [0.5, 1, 2, 3, 5, 8, 12, 20, 37])
def test_tail_bound_is_above_the_gaussian_tail(z):
    # scipy.stats.norm.logsf is the exact Gaussian tail; ours must never be smaller.
    ours = stats.log10_tail_bound(z)
    exact = sps.norm.logsf(z) / math.log(10)
    assert ours >= exact
    # ... and not absurdly loose: Gordon's Mills-ratio inequality Q(z) >= phi(z) z / (1 + z^2)
    # bounds the gap by sqrt(2 pi) (1 + z^2) / z.
    assert ours - exact <= math.log10(math.sqrt(2 * math.pi) * (1 + z * z) / z) + 1e-12


def test_false_alarm_arithmetic_by_hand():
    h, space = detect.hypotheses(), payload.PAYLOAD_SPACE
    lp = stats.log10_false_alarm(z_pilot=9.0, z_full=None, hypotheses=h, payload_space=space)
    assert lp == pytest.approx(math.log10(2 * h * math.exp(-81 / 2)))
    lp2 = stats.log10_false_alarm(z_pilot=5.0, z_full=30.0, hypotheses=h, payload_space=space)
    assert lp2 == pytest.approx(math.log10(2 * h * space) - 900 / 2 / math.log(10))
    assert stats.log10_false_alarm(z_pilot=0.5, z_full=None, hypotheses=h, payload_space=space) == 0.0
    # Format 1-2 search: 3 geometries x 8 variants x 4 phases x 128^2 shifts.
    assert h == 3 * 8 * 4 * 128 * 128 == stats.legacy_hypotheses(geometries=3, dihedral=8, phases=4,
                                                                  tile=128)
    # Format 3's claim: (3 sync placements + the file's own grid at up to 3 geometries)
    # x 16 families x 4^2 offsets.
    assert detect.format3_hypotheses() == 6 * 16 * 16
    # The best of two tests pays a factor two.
    assert stats.log10_best_of(bounds=[-20.0, -5.0]) == pytest.approx(math.log10(2) - 20.0)
    assert stats.as_probability(-5000.0) > 0.0
    assert stats.describe(-40.0) == "below 1e-12"


def test_scores_are_standardised_over_keys_for_a_fixed_picture():
    # The bound rests on this: for a fixed unmarked picture, the score at a fixed
    # placement is a zero-mean, unit-variance, near-Gaussian variable over the key.
    prep = detect.prepare(data.brick().astype(np.float32))
    rng = np.random.default_rng(5)
    zs = []
    ramps = detect._ramps(TILE)
    for _ in range(300):
        surf = detect._surfaces(prep, key_pattern(rng.bytes(32)), ramps)
        zs.append(surf[0, 0, 0, 17, 91])
    key_pattern.cache_clear()
    zs = np.asarray(zs)
    assert abs(zs.mean()) < 0.2 and 0.85 < zs.std() < 1.15
    assert sps.kstest(zs, "norm").pvalue > 1e-3   # scipy.stats Kolmogorov-Smirnov vs N(0, 1)


def test_psnr_and_ssim_match_scikit_image():
    a = data.coffee()[..., 1].astype(np.float64)
    b = np.clip(a + np.random.default_rng(0).normal(0, 3, a.shape), 0, 255)
    assert quality.psnr(a, b, peak=255) == pytest.approx(
        metrics.peak_signal_noise_ratio(a, b, data_range=255), rel=1e-9)
    ours, sampled = quality.ssim(a, b)
    ref = metrics.structural_similarity(a, b, data_range=255, gaussian_weights=True,
                                        sigma=1.5, use_sample_covariance=False)
    assert not sampled and ours == pytest.approx(ref, abs=1e-5)


@pytest.mark.parametrize("angle,scale", [(0.0, 0.7), (17.0, 1.0), (-128.0, 1.3)])
def test_fold_resampled_recovers_the_period_of_a_distorted_tiling(angle, scale):
    # Distortion made by scikit-image (skimage.transform.warp), undone by our splatting fold.
    from skimage import transform as sk
    rng = np.random.default_rng(2)
    tile = ndi_smooth(rng.normal(size=(TILE, TILE)))
    plane = np.tile(tile, (6, 6))
    # copy(y) = plane(A^-1 y): A maps original (row, col) to copy (row, col).
    th = np.radians(angle)
    a = scale * np.array([[np.cos(th), np.sin(th)], [-np.sin(th), np.cos(th)]])
    a_inv = np.linalg.inv(a)
    centre = np.array(plane.shape) / 2
    out_shape = (500, 500)

    def inverse_map(xy):   # skimage passes (col, row) output coordinates
        rc = xy[:, ::-1] - np.array(out_shape) / 2
        src = rc @ a_inv.T + centre
        return src[:, ::-1]

    copy = sk.warp(plane, inverse_map, output_shape=out_shape, order=3)
    f = detect.fold_resampled(copy, a, TILE)
    # Undo the grid offset by cross-correlation, then compare with the true period.
    spec = np.fft.fft2(f) * np.conj(np.fft.fft2(tile))
    peak = np.unravel_index(np.argmax(np.real(np.fft.ifft2(spec))), f.shape)
    aligned = np.roll(f, (-peak[0], -peak[1]), axis=(0, 1))
    r = np.corrcoef(aligned.ravel(), tile.ravel())[0, 1]
    assert r > 0.9, r


def ndi_smooth(x):
    from scipy import ndimage
    return ndimage.gaussian_filter(x, 2.0, mode="wrap")


def test_a_perfectly_flat_picture_is_examined_not_a_fault():
    # A blank frame whitens to zeros: every fold has no energy. It used to end in LAPACK's
    # "SVD did not converge" (0 / 0 in the spectral weight and the scores); it must read as
    # no mark, with finite numbers (JSON cannot hold NaN). Formats 1-2 and format 3 keys.
    from tests.engine_helpers import BENCH_KEYS

    flat = np.full((300, 400), 128.0, dtype=np.float32)
    for keys in (SEED, BENCH_KEYS):
        f = detect.examine_luma(flat, keys)
        assert not f.detected
        assert f.z_pilot == 0.0
        assert all(math.isfinite(v) for v in (f.z_sync or 0.0, f.z_full or 0.0))
