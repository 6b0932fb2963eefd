"""The fast marking path gives the same pixels and numbers as the plain formulas.

``mark_picture`` works band by band (luma, mask times tiled period, change added
to R, G, B, squared error summed) and writes the file on a second thread while
SSIM is measured. Each piece is checked here against the straightforward
whole-array formula it replaces, bit for bit where the arithmetic is the same,
and the recorded measures against outside references named beside each check
(scikit-image's metrics, hashlib's SHA-256).
"""

from __future__ import annotations

import hashlib
import time
from itertools import pairwise

import numpy as np
import pytest
from PIL import Image
from scipy import ndimage
from skimage import data, metrics
from skimage.transform import resize

from claimkit import workflow
from claimkit.errors import InputError
from claimkit.imageio import add_luma_delta, canvas_like, padded_rows, read_picture, to_luma
from claimkit.mark import embed, fingerprint, quality, scales
from claimkit.mark.pattern import TILE
from tests.engine_helpers import SEED, payload

RNG = np.random.default_rng(11)


def big_photo(h: int, w: int) -> np.ndarray:
    """Coffee enlarged to ``h x w`` with fine grain, so the mask has texture to follow."""
    up = resize(data.coffee(), (h, w), order=1, preserve_range=True, anti_aliasing=False)
    grain = np.random.default_rng(5).normal(0, 2.0, up.shape)
    return np.clip(up + grain, 0, 255).astype(np.uint8)


# ------------------------------------------------------------------ luma


def test_luma_is_the_one_pass_einsum_bit_for_bit_on_every_8bit_colour():
    # All 2**24 colours once: the banded form must repeat the float32
    # arithmetic of the former np.einsum exactly, or every mask would move.
    cube = np.stack(np.meshgrid(np.arange(256), np.arange(256), np.arange(256), indexing="ij"),
                    axis=-1).astype(np.uint8).reshape(4096, 4096, 3)
    weights = np.array([0.299, 0.587, 0.114], dtype=np.float32)
    ref = np.einsum("ijk,k->ij", cube, weights, dtype=np.float32)
    assert np.array_equal(to_luma(cube), ref)
    wide = canvas_like(cube)             # RGBX rows, as pictures read from JPEGs are held
    wide[...] = cube
    assert np.array_equal(to_luma(wide), ref)
    c16 = RNG.integers(0, 65536, (301, 777, 3), dtype=np.uint16)
    ref16 = np.einsum("ijk,k->ij", c16, weights, dtype=np.float32) / np.float32(257)
    assert np.array_equal(to_luma(c16), ref16)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16])
def test_add_luma_delta_is_the_per_sample_formula(dtype):
    top = np.iinfo(dtype).max
    px = RNG.integers(0, top + 1, (203, 1301, 3), dtype=dtype)
    delta = (RNG.normal(0, 4, px.shape[:2])).astype(np.float32)
    delta[::7, ::3] = 0.5   # ties: rint rounds half to even
    delta[::5, ::11] = -2.5
    scale = np.float32(257 if dtype == np.uint16 else 1)
    ref = np.clip(np.rint(px.astype(np.float32) + (delta * scale)[..., None]), 0, top).astype(dtype)
    assert np.array_equal(add_luma_delta(px, delta), ref)
    out = np.zeros_like(px)
    assert add_luma_delta(px, delta, out=out) is out and np.array_equal(out, ref)
    grey = px[..., 0]
    assert np.array_equal(add_luma_delta(grey, delta), ref[..., 0])
    if dtype == np.uint8:
        # whole RGBX rows (pictures read from JPEGs, the marking canvas): the same bytes,
        # the padding byte given back its value, so sums over whole rows stay those of RGB
        src, dst = canvas_like(px), canvas_like(px)
        src[...] = px
        src.base[..., 3] = RNG.integers(0, 256, px.shape[:2], dtype=np.uint8)
        assert padded_rows(src[5:17]) is not None and padded_rows(px) is None
        add_luma_delta(src[:100], delta[:100], out=dst[:100])
        add_luma_delta(src[100:], delta[100:], out=dst[100:])
        assert np.array_equal(dst, ref)
        assert np.array_equal(dst.base[..., 3], src.base[..., 3])
        sse = sum(int(v) ** 2 for v in (ref.astype(np.int64) - px).ravel())
        assert quality.squared_error_sum(padded_rows(src), padded_rows(dst)) == sse
        assert quality.squared_error_sum(src, dst) == sse      # strided views too


@pytest.mark.parametrize("shape", [(97, 613), (3, 16600)])   # the second: rows summed in uint64
def test_rgbx_fast_path_is_the_float_formula_near_every_half(shape):
    """``_add_padded`` rounds the change once per pixel in 16-bit integers; the bytes must be
    those of ``clip(rint(float32(p) + d))`` even where ``d`` is at or next to a half, beyond
    the 8-bit range, or infinite, and the sum of squared changes exact."""
    from claimkit.imageio import add_luma_delta_sse
    px = RNG.integers(0, 256, shape + (3,), dtype=np.uint8)
    px[:, :40] = np.resize(np.array([0, 255, 128, 1], np.uint8), shape[0])[:, None, None]  # edges
    halves = RNG.integers(-300, 300, shape).astype(np.float32) + np.float32(0.5)
    delta = RNG.normal(0, 6, shape).astype(np.float32)
    pick = RNG.random(shape)
    delta = np.where(pick < 0.15, halves, delta)
    delta = np.where((pick >= 0.15) & (pick < 0.3), np.nextafter(halves, np.float32(1e9)), delta)
    delta = np.where((pick >= 0.3) & (pick < 0.45), np.nextafter(halves, np.float32(-1e9)), delta)
    delta = np.where((pick >= 0.45) & (pick < 0.5), halves - np.float32(2.0 ** -14), delta)
    delta = np.where((pick >= 0.5) & (pick < 0.55), RNG.normal(0, 400, shape), delta)
    delta = delta.astype(np.float32)
    delta[0, :4] = [np.inf, -np.inf, 3e38, -3e38]
    ref = np.clip(np.rint(px.astype(np.float32) + delta[..., None]), 0, 255).astype(np.uint8)
    src, dst = canvas_like(px), canvas_like(px)
    src[...] = px
    src.base[..., 3] = RNG.integers(0, 256, shape, dtype=np.uint8)
    sse = add_luma_delta_sse(src, delta, out=dst)
    assert np.array_equal(dst, ref)
    assert np.array_equal(dst.base[..., 3], src.base[..., 3])
    assert sse == sum(int(v) ** 2 for v in (ref.astype(np.int64) - px).ravel())
    # the plain (strided, float) path gives the same through the same function
    out = np.empty_like(px)
    assert add_luma_delta_sse(px, delta, out=out) == sse and np.array_equal(out, ref)


# ------------------------------------------------------------------ mask and change


def mask_by_formula(luma: np.ndarray) -> np.ndarray:
    """The documented mask, out of place at full size (the form before banding)."""
    step = 2 if luma.size > 4_000_000 else 1
    xs = luma[::step, ::step]
    size = embed.MASK_WINDOW // step or 1
    m = ndimage.uniform_filter(xs, size)
    var = np.maximum(ndimage.uniform_filter(xs * xs, size) - m * m, 0.0)
    amp2 = (1.0 / embed.DEFAULT_LOCAL_SSIM - 1.0) * (2.0 * var + embed.SSIM_C2)
    budget = 255.0 ** 2 / 10 ** (embed.DEFAULT_PSNR_DB / 10.0)
    if float(amp2.mean()) > budget:
        amp2 = np.minimum(amp2, embed._water_level(amp2, budget))
    amp = np.sqrt(amp2, dtype=np.float32)
    amp = np.repeat(np.repeat(amp, step, axis=0), step, axis=1)
    return amp[: luma.shape[0], : luma.shape[1]]


@pytest.mark.parametrize("shape", [(300, 451), (2003, 2001)])  # mask step 1 and step 2, odd sizes
def test_banded_change_is_mask_times_tiled_period(shape):
    luma = to_luma(big_photo(*shape))
    bits = payload(3)
    plan = embed.mark_plan(luma, SEED, bits, strength=1.3)
    assert plan.step == (2 if luma.size > 4_000_000 else 1)
    ref = mask_by_formula(luma) * embed.tiled(plan.tile, luma.shape)
    whole = embed.mark_delta(luma, SEED, bits, strength=1.3)
    assert np.array_equal(whole, ref)
    # bands of any height and start (odd, across period boundaries) join up exactly
    cuts = np.unique(np.r_[0, RNG.integers(1, shape[0], 12), TILE - 1, TILE + 1, shape[0]])
    bands = [plan.rows(int(a), int(b)) for a, b in pairwise(cuts)]
    assert np.array_equal(np.concatenate(bands), ref)
    assert np.array_equal(embed.perceptual_mask(luma), mask_by_formula(luma))
    assert np.array_equal(embed.apply_tiled(embed.perceptual_mask(luma), plan.tile), ref)


# ------------------------------------------------------------------ fingerprint, PSNR, SSIM


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_thumbnail_is_the_whole_picture_reduceat(dtype):
    # mixed magnitudes make the summation order visible in float64
    x = (RNG.choice([1e16, 1.0, -1e16, 3.0, 1e-3], size=(1001, 777))
         * RNG.random((1001, 777))).astype(dtype)
    rows = fingerprint._edges(x.shape[0], fingerprint.THUMB)
    cols = fingerprint._edges(x.shape[1], fingerprint.THUMB)
    sums = np.add.reduceat(x, rows[:-1], axis=0, dtype=np.float64)
    sums = np.add.reduceat(sums, cols[:-1], axis=1, dtype=np.float64)
    ref = sums / np.outer(np.diff(rows), np.diff(cols))
    assert np.array_equal(fingerprint._area_thumbnail(x), ref)


@pytest.mark.parametrize("dtype", [np.uint8, np.uint16])
def test_squared_error_sum_is_exact_and_psnr_matches_scikit_image(dtype):
    top = int(np.iinfo(dtype).max)
    a = RNG.integers(0, top + 1, (517, 389, 3), dtype=dtype)
    b = RNG.integers(0, top + 1, a.shape, dtype=dtype)
    exact = sum(int(v) ** 2 for v in (a.astype(np.int64) - b).ravel())  # Python integers
    assert quality.squared_error_sum(a, b) == exact
    # skimage.metrics.peak_signal_noise_ratio
    ref = metrics.peak_signal_noise_ratio(a, b, data_range=top)
    assert quality.psnr(a, b, peak=top) == pytest.approx(ref, rel=1e-12)
    assert quality.psnr_from_sse(exact, a.size, peak=top) == quality.psnr(a, b, peak=top)


def test_sampled_ssim_agrees_with_scikit_image_on_its_sample():
    a = big_photo(2100, 3000)            # 6.3 MP: above SAMPLE_ABOVE, so patches are used
    b = np.clip(a + RNG.normal(0, 2.0, a.shape), 0, 255).astype(np.uint8)
    est = quality.ssim_estimate(a, b, grey=to_luma)
    assert est.sampled and quality.ssim(a, b, grey=to_luma) == (est.value, True)
    # the documented sample: one patch wholly inside each cell of a 16 x 12 grid (16 along
    # the long side)
    corners = quality.sample_patches(a.shape[:2])
    assert list(est.patches) == corners and len(corners) == 192
    (h, w), p = a.shape[:2], quality.PATCH
    for k, (r, c) in enumerate(corners):       # row by row
        i, j = divmod(k, 16)
        assert i * h // 12 <= r and r + p <= (i + 1) * h // 12
        assert j * w // 16 <= c and c + p <= (j + 1) * w // 16
    ref = []
    for r, c in corners:
        win = (slice(r, r + quality.PATCH), slice(c, c + quality.PATCH))
        # skimage.metrics.structural_similarity with the Wang et al. settings
        ref.append(metrics.structural_similarity(
            to_luma(a[win]).astype(np.float64), to_luma(b[win]).astype(np.float64),
            data_range=255, gaussian_weights=True, sigma=1.5, use_sample_covariance=False))
    assert est.value == pytest.approx(float(np.mean(ref)), abs=1e-5)
    assert est.standard_error == pytest.approx(np.std(ref, ddof=1) / np.sqrt(192), rel=1e-3)


def test_sampled_ssim_estimates_the_whole_picture_within_its_stated_error(monkeypatch):
    """Against scikit-image's SSIM of the whole picture (patches and threshold scaled down)."""
    monkeypatch.setattr(quality, "PATCH", 32)
    monkeypatch.setattr(quality, "SAMPLE_ABOVE", 400_000)
    a = big_photo(700, 1000)
    rng = np.random.default_rng(5)
    for sigma in (1.0, 3.0):
        b = np.clip(a + rng.normal(0, sigma, a.shape), 0, 255).astype(np.uint8)
        est = quality.ssim_estimate(a, b, grey=to_luma)
        whole = metrics.structural_similarity(
            to_luma(a).astype(np.float64), to_luma(b).astype(np.float64),
            data_range=255, gaussian_weights=True, sigma=1.5, use_sample_covariance=False)
        assert est.sampled and 0 < est.standard_error < 0.05
        # stated tolerance: three standard errors (plus float32 rounding)
        assert abs(est.value - whole) < 3 * est.standard_error + 1e-4, (est, whole)


# ------------------------------------------------------------------ the file-level path


def test_mark_picture_records_what_the_files_hold(tmp_path):
    rgb = big_photo(2101, 2003)          # 4.2 MP: the half-resolution mask
    src = tmp_path / "harwick-bay.png"
    Image.fromarray(rgb).save(src)
    pic, sha = workflow.load_original(src)
    assert sha == hashlib.sha256(src.read_bytes()).hexdigest()   # hashlib SHA-256
    bits = payload(4)

    png = tmp_path / "marked.png"
    facts = workflow.mark_picture(pic, png, SEED, bits)
    marked = np.asarray(Image.open(png))
    # the plain whole-array construction (fine and coarse components) gives the same pixels
    assert np.array_equal(marked, add_luma_delta(rgb, scales.multiscale_delta(to_luma(rgb), SEED, bits)))
    assert facts["sha256_marked"] == hashlib.sha256(png.read_bytes()).hexdigest()
    psnr = metrics.peak_signal_noise_ratio(rgb, marked, data_range=255)
    assert facts["quality"]["psnr_db"] == round(psnr, 3) and psnr >= 42.0
    ssim = metrics.structural_similarity(to_luma(rgb), to_luma(marked), data_range=255,
                                         gaussian_weights=True, sigma=1.5,
                                         use_sample_covariance=False)
    assert facts["quality"]["ssim"] == pytest.approx(ssim, abs=1e-5) and ssim >= 0.985
    assert "psnr_db_file" not in facts["quality"]
    assert facts["fingerprint"] == fingerprint.perceptual_fingerprint(to_luma(rgb))

    jpg = tmp_path / "marked.jpg"
    facts_j = workflow.mark_picture(pic, jpg, SEED, bits)
    written = read_picture(jpg).pixels
    assert facts_j["sha256_marked"] == hashlib.sha256(jpg.read_bytes()).hexdigest()
    assert facts_j["quality"]["psnr_db_file"] == round(
        metrics.peak_signal_noise_ratio(rgb, written, data_range=255), 3)
    assert facts_j["quality"]["psnr_db"] == facts["quality"]["psnr_db"]


def test_a_16bit_photo_written_as_jpeg_is_measured_on_its_own_scale(tmp_path):
    rgb16 = (big_photo(300, 400).astype(np.uint16) * 257)
    src = tmp_path / "harwick-sixteen.png"
    Image.fromarray(rgb16[..., 0]).save(src)   # Pillow writes a 16-bit grey PNG ("I;16")
    pic, _ = workflow.load_original(src)
    assert pic.pixels.dtype == np.uint16
    jpg = tmp_path / "marked.jpg"
    facts = workflow.mark_picture(pic, jpg, SEED, payload(5))
    written = read_picture(jpg).pixels.astype(np.float64) * 257.0
    expect = metrics.peak_signal_noise_ratio(pic.pixels.astype(np.float64), written,
                                             data_range=65535)
    assert facts["quality"]["psnr_db_file"] == round(expect, 3)
    assert facts["quality"]["psnr_db_file"] > 38.0      # not the 6 dB of comparing 16 with 8 bits


@pytest.mark.parametrize("threads", ["1", "2"])
def test_the_canvas_is_let_go_before_the_written_file_is_decoded(tmp_path, monkeypatch, threads):
    """The decode for the PSNR as saved can reuse the marked canvas's memory: nothing holds
    the canvas (nor the luma that lived in it) by then, with one thread or two."""
    import weakref
    monkeypatch.setenv(workflow.THREADS_ENV, threads)
    src = tmp_path / "tidewater-copy.png"
    Image.fromarray(data.chelsea()).save(src)
    pic, _ = workflow.load_original(src)
    canvases, alive = [], []
    real_write, real_read = workflow.write_picture_keeping_bytes, workflow.read_picture

    def write(out, pixels, **kw):
        canvases.append(weakref.ref(pixels.base))
        return real_write(out, pixels, **kw)

    def read(*a, **kw):
        if "data" in kw:       # the read-back
            # the other thread may still be measuring SSIM: give it a moment to let go
            for _ in range(200):
                if canvases[0]() is None:
                    break
                time.sleep(0.01)
            alive.append(canvases[0]() is not None)
        return real_read(*a, **kw)

    monkeypatch.setattr(workflow, "write_picture_keeping_bytes", write)
    monkeypatch.setattr(workflow, "read_picture", read)
    facts = workflow.mark_picture(pic, tmp_path / "marked.jpg", SEED, payload())
    assert alive == [False] and facts["quality"]["psnr_db_file"] > 38.0


@pytest.mark.parametrize("threads", ["1", "2"])
def test_a_failure_while_measuring_leaves_no_marked_file(tmp_path, monkeypatch, threads):
    monkeypatch.setenv(workflow.THREADS_ENV, threads)
    src = tmp_path / "tidewater-copy.png"
    Image.fromarray(data.chelsea()).save(src)
    pic, _ = workflow.load_original(src)
    out = tmp_path / "marked.jpg"

    def broken(*args, **kwargs):
        raise RuntimeError("measurement failed")

    monkeypatch.setattr(workflow.quality, "ssim_estimate", broken)
    with pytest.raises(RuntimeError, match="measurement failed"):
        workflow.mark_picture(pic, out, SEED, payload())
    assert not out.exists()
    assert not list(tmp_path.glob(".marked.jpg.*"))  # no temporary left either


def test_an_existing_output_is_left_alone(tmp_path):
    src = tmp_path / "original.png"
    Image.fromarray(data.chelsea()).save(src)
    pic, _ = workflow.load_original(src)
    out = tmp_path / "taken.jpg"
    out.write_bytes(b"someone else's file")
    with pytest.raises(InputError, match="already exists"):
        workflow.mark_picture(pic, out, SEED, payload())
    assert out.read_bytes() == b"someone else's file"


def test_one_core_marks_the_same_pixels_in_place(tmp_path, monkeypatch):
    """CLAIMKIT_THREADS=1 (what each batch worker gets) runs every step in the caller's thread."""
    import threading

    rgb = big_photo(700, 900)
    src = tmp_path / "harwick-one-core.png"
    Image.fromarray(rgb).save(src)
    pic, _ = workflow.load_original(src)
    two = workflow.mark_picture(pic, tmp_path / "two.png", SEED, payload(6))
    monkeypatch.setenv("CLAIMKIT_THREADS", "1")
    assert workflow.band_threads() == 1
    started = threading.active_count()
    seen = []
    real = workflow._luma_band

    def spy(*a):
        seen.append(threading.active_count())
        return real(*a)

    monkeypatch.setattr(workflow, "_luma_band", spy)
    one = workflow.mark_picture(pic, tmp_path / "one.png", SEED, payload(6))
    assert seen and max(seen) == started          # no helper thread was started
    assert one == two
    assert (tmp_path / "one.png").read_bytes() == (tmp_path / "two.png").read_bytes()


def test_ssim_window_means_are_scipys_gaussian_filter_inside_the_border():
    # Reference: scipy.ndimage.gaussian_filter (sigma 1.5, truncate 3.5, float64), whose
    # reflected borders lie in the 5 pixels the mean SSIM leaves out.
    z = (RNG.random((67, 93)) * 255).astype(np.float32)
    ref = ndimage.gaussian_filter(z.astype(np.float64), 1.5, truncate=3.5, mode="reflect")
    got = quality._window_mean_valid(z)
    assert got.dtype == np.float32 and got.shape == (57, 83)
    assert np.allclose(got, ref[5:-5, 5:-5], rtol=0, atol=2e-4)   # float32 sums of 0..255
