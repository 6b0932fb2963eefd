"""Test images and attacks for the engine tests. Attacks use Pillow's own codecs and filters."""

from __future__ import annotations

import io

import numpy as np
from PIL import Image, ImageEnhance, ImageFilter
from skimage import data, draw, filters

from claimkit.evidence.keys import derive_payload_tag
from claimkit.imageio import add_luma_delta, to_luma
from claimkit.mark import format3
from claimkit.mark import payload as pl
from claimkit.mark.embed import mark_delta

SEED = bytes(range(32))
OTHER_SEED = bytes(range(100, 132))
# The benchmarks' fixed keys (any 32-byte values do): the examiner holds every format's keys, and a
# format-3 work is written in family 5. BENCH_BITS is the payload they mark and check.
BENCH_KEYS = format3.MarkKeys(legacy=SEED, sync=bytes(range(32, 64)),
                              families={f: bytes([f]) * 32 for f in range(format3.FAMILIES)})
BENCH_EMBED3 = format3.EmbedKeys(sync=BENCH_KEYS.sync, family=5, family_seed=BENCH_KEYS.families[5])
BENCH_BITS = np.random.default_rng(1000).integers(0, 2, 64).astype(np.uint8)


class BenchPayloads:
    """The benchmarks' payload check, as the owner's (``workflow.PayloadChecker``) works.

    Valid: BENCH_BITS and the 999 serials around its serial, each with a keyed
    tag; ``candidates`` lists them all for the decoder (``mark.payload.PayloadList``),
    so that a wrong pick among close serials would pass the check and show as
    a claim of the wrong work. ``known`` holds the owner tag's bits.
    """

    def __init__(self) -> None:
        owner, serial = pl.unpack(BENCH_BITS)["owner_tag"], pl.unpack(BENCH_BITS)["serial"]
        rows = [BENCH_BITS if s == serial else pl.pack(owner, s, derive_payload_tag(bytes(32), owner, s))
                for s in range(serial - 500, serial + 500)]
        self.candidates = pl.PayloadList(np.stack(rows))
        self.known = np.full(64, -1, dtype=np.int64)
        self.known[:16] = BENCH_BITS[:16]

    def __call__(self, bits) -> bool:
        return bool(np.any(np.all(self.candidates.bits == np.asarray(bits, dtype=np.uint8), axis=1)))


def payload(n: int = 0) -> np.ndarray:
    return np.random.default_rng(1000 + n).integers(0, 2, 64).astype(np.uint8)


def sky(h: int = 480, w: int = 640) -> np.ndarray:
    """A smooth blue sky with faint sensor noise: the hardest case for invisibility."""
    rng = np.random.default_rng(7)
    y = np.linspace(0, 1, h)[:, None]
    base = np.stack([90 + 60 * y, 140 + 50 * y, 220 + 20 * y], axis=-1) * np.ones((1, w, 1))
    return np.clip(base + rng.normal(0, 1.2, base.shape), 0, 255).astype(np.uint8)


def generated(seed: int) -> np.ndarray:
    """A smooth random colour texture with random shapes over it (no two seeds alike)."""
    rng = np.random.default_rng(seed)
    h, w = 420, 560
    base = np.stack([filters.gaussian(rng.normal(size=(h, w)), sigma=rng.uniform(4, 20))
                     for _ in range(3)], axis=-1)
    base = (base - base.min()) / (np.ptp(base) + 1e-9)
    img = (base * 200 + 30).astype(np.uint8)
    shapes, _ = draw.random_shapes((h, w), max_shapes=12, min_size=20, max_size=120,
                                   rng=int(rng.integers(1 << 30)), channel_axis=-1)
    mask = shapes.min(axis=-1) < 255
    img[mask] = (0.6 * img[mask] + 0.4 * shapes[mask]).astype(np.uint8)
    return img


def soft(seed: int, h: int = 480, w: int = 640) -> np.ndarray:
    """A soft colour texture without edges (smoothed noise, sigma 30 px): few corners for ORB."""
    rng = np.random.default_rng(seed)
    base = np.stack([filters.gaussian(rng.normal(size=(h, w)), sigma=30) for _ in range(3)], -1)
    base = (base - base.min()) / (np.ptp(base) + 1e-9)
    return (base * 120 + 60).astype(np.uint8)


def dusk(seed: int) -> np.ndarray:
    """A flat host: a diagonal colour ramp with faint noise (no corners, a broad layout only)."""
    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:450, 0:600] / 600.0
    ramp = 0.6 * x + 0.4 * y
    base = np.stack([70 + 90 * ramp, 60 + 60 * ramp, 120 - 40 * ramp], axis=-1)
    return np.clip(base + rng.normal(0, 1.5, base.shape), 0, 255).astype(np.uint8)


def blobs(seed: int) -> np.ndarray:
    """A flat host: scikit-image's generated blobs, smoothed into soft light and dark patches."""
    b = data.binary_blobs(length=512, blob_size_fraction=0.2, volume_fraction=0.5, rng=seed)
    soft_ = filters.gaussian(b.astype(float), sigma=12)
    grey = (60 + 120 * soft_).astype(np.uint8)
    return np.stack([grey, grey, (grey * 0.8).astype(np.uint8)], -1)


def photos() -> dict[str, np.ndarray]:
    """Natural photos from 300 to 1411 px a side (scikit-image's data set) and a sky."""
    return {
        "chelsea": data.chelsea(), "coffee": data.coffee(), "rocket": data.rocket(),
        "hubble": data.hubble_deep_field(), "retina": data.retina(), "sky": sky(),
    }


def mark(rgb: np.ndarray, seed: bytes = SEED, bits: np.ndarray | None = None) -> np.ndarray:
    bits = payload() if bits is None else bits
    return add_luma_delta(rgb, mark_delta(to_luma(rgb), seed, bits))


def jpeg(a: np.ndarray, q: int) -> np.ndarray:
    buf = io.BytesIO()
    Image.fromarray(a).save(buf, "JPEG", quality=q)
    return np.array(Image.open(buf))


def pil_filter(a: np.ndarray, f) -> np.ndarray:
    return np.array(Image.fromarray(a).filter(f))


def gamma(a: np.ndarray, g: float) -> np.ndarray:
    lut = [min(255, int(255 * (i / 255) ** g + 0.5)) for i in range(256)]
    return np.array(Image.fromarray(a).point(lut * (3 if a.ndim == 3 else 1)))


def noise(a: np.ndarray, sigma: float, seed: int = 3) -> np.ndarray:
    rng = np.random.default_rng(seed)
    return np.clip(a + rng.normal(0, sigma, a.shape), 0, 255).astype(np.uint8)


def crop_quarter(a: np.ndarray, oy: int = 37, ox: int = 53) -> np.ndarray:
    """Keep a quarter of the area at an offset that is no multiple of anything."""
    h, w = a.shape[:2]
    return a[oy:oy + h // 2, ox:ox + w // 2]


ATTACKS = {
    "jpeg30": lambda a: jpeg(a, 30),
    "jpeg50": lambda a: jpeg(a, 50),
    "jpeg75": lambda a: jpeg(a, 75),
    "blur1": lambda a: pil_filter(a, ImageFilter.GaussianBlur(1)),
    "blur2": lambda a: pil_filter(a, ImageFilter.GaussianBlur(2)),
    "median3": lambda a: pil_filter(a, ImageFilter.MedianFilter(3)),
    "noise8": lambda a: noise(a, 8),
    "contrast0.6": lambda a: np.array(ImageEnhance.Contrast(Image.fromarray(a)).enhance(0.6)),
    "gamma1.5": lambda a: gamma(a, 1.5),
    "crop25": crop_quarter,
}


def landscape(h: int, w: int, seed: int = 11) -> np.ndarray:
    """A generated photo: a smooth sky over ground with 1/f texture, and sensor grain.

    Natural photos have about a 1/f amplitude spectrum (Field, "Relations
    between the statistics of natural images and the response properties of
    cortical cells", JOSA A 4(12), 1987); the texture is made so, at a fraction
    of the size and enlarged, so that a 24-megapixel master takes a few
    seconds. The upper third is a plain sky, the hardest place for a mark to
    hide.
    """
    rng = np.random.default_rng(seed)

    def texture(th: int, tw: int, beta: float) -> np.ndarray:
        fy = np.fft.fftfreq(th)[:, None]
        fx = np.fft.rfftfreq(tw)[None, :]
        f = np.hypot(fy, fx)
        f[0, 0] = 1.0
        spec = (rng.standard_normal((th, fx.shape[1])) + 1j * rng.standard_normal((th, fx.shape[1])))
        spec /= f ** beta
        spec[0, 0] = 0
        x = np.fft.irfft2(spec, s=(th, tw)).astype(np.float32)
        x /= x.std()
        return np.array(Image.fromarray(x, mode="F").resize((w, h), Image.Resampling.BICUBIC))

    coarse = texture(max(8, h // 8), max(8, w // 8), 1.0)
    fine = texture(max(8, h // 4), max(8, w // 4), 0.8)
    y = np.linspace(0.0, 1.0, h, dtype=np.float32)[:, None]
    horizon = 0.33 + 0.05 * np.sin(np.linspace(0.0, 6.0, w, dtype=np.float32))[None, :]
    ground = y > horizon
    lum = coarse
    lum *= 35
    lum += 12 * fine + 110
    grain = rng.standard_normal((h, w), dtype=np.float32)
    grain *= 1.2
    out = np.empty((h, w, 3), np.uint8)
    plane = np.empty((h, w), np.float32)
    for c, (gain, off, top, slope) in enumerate(((1.05, 0, 150, 40), (1.0, 5, 185, 30), (0.8, -10, 235, 10))):
        np.multiply(lum, np.float32(gain), out=plane)
        plane += off
        np.copyto(plane, np.broadcast_to(top + slope * y, plane.shape), where=~ground)
        plane += grain
        np.rint(plane, out=plane)
        np.clip(plane, 0, 255, out=plane)
        out[..., c] = plane
    return out


def mark_scales(rgb: np.ndarray, seed: bytes = SEED, bits: np.ndarray | None = None) -> np.ndarray:
    """Mark with both components (the fine mark alone on pictures too small for a coarse level)."""
    from claimkit.mark.scales import multiscale_delta

    bits = payload() if bits is None else bits
    return add_luma_delta(rgb, multiscale_delta(to_luma(rgb), seed, bits))


def lanczos(a: np.ndarray, size: tuple[int, int]) -> np.ndarray:
    """Pillow's Lanczos resize to ``size`` = (width, height)."""
    return np.asarray(Image.fromarray(a).resize(size, Image.Resampling.LANCZOS))


def transplant_mark(marked: np.ndarray, host: np.ndarray, *, gain: float = 1.5,
                    tile: int | None = 128) -> np.ndarray:
    """The copy attack, in numpy only (no claimkit code): estimate a tiled mark, add it elsewhere.

    The attacker knows the published method (a pattern repeated every ``tile``
    pixels from the top-left corner) but not the key: the high-pass residual
    of the marked file (luma minus its 5 x 5 box mean) is averaged over every
    whole tile, which keeps the repeated mark and averages the picture away,
    and the estimate is tiled over an unrelated photo, on all three channels.

    ``tile=None`` is the strongest form, which needs no period at all: the
    whole residual of the marked file is added (tiled where the host is
    larger). It carries every component of any mark that does not depend on
    the picture, format 3's keyed claim included; the content line catches it.
    """
    y = marked[..., :3].astype(np.float64) @ np.array([0.299, 0.587, 0.114])
    k = 5
    p = np.pad(y, k // 2, mode="reflect")
    c = np.pad(np.cumsum(np.cumsum(p, 0), 1), ((1, 0), (1, 0)))
    mean = (c[k:, k:] - c[:-k, k:] - c[k:, :-k] + c[:-k, :-k]) / (k * k)
    res = y - mean
    if tile is None:
        est = res
    else:
        h, w = (res.shape[0] // tile) * tile, (res.shape[1] // tile) * tile
        est = res[:h, :w].reshape(h // tile, tile, w // tile, tile).mean(axis=(0, 2))
    H, W = host.shape[:2]
    big = np.tile(est, (-(-H // est.shape[0]), -(-W // est.shape[1])))[:H, :W]
    out = host[..., :3].astype(np.float64) + gain * big[..., None]
    return np.clip(out, 0, 255).round().astype(np.uint8)


# ---------------------------------------------------------------- the estimation attacker (numpy only)
# Shared by tests/test_mark_format3.py and benchmarks/bench_estimation.py: the attacker knows the
# published method, not the key, and uses no claimkit code.

def _luma(a: np.ndarray) -> np.ndarray:
    a = a.astype(np.float64)
    return 0.299 * a[..., 0] + 0.587 * a[..., 1] + 0.114 * a[..., 2]


def _box(a: np.ndarray, k: int) -> np.ndarray:
    p = k // 2
    x = np.pad(a, p, mode="reflect")
    c = np.pad(np.cumsum(np.cumsum(x, 0), 1), ((1, 0), (1, 0)))
    return (c[k:, k:] - c[:-k, k:] - c[k:, :-k] + c[:-k, :-k]) / (k * k)


def residual(a: np.ndarray) -> np.ndarray:
    """The high-pass residual an attacker estimates from: luma minus its 5 x 5 box mean."""
    r = _luma(a)
    return r - _box(r, 5)


def fold_estimate(a: np.ndarray, period: int) -> np.ndarray:
    """High-pass residual averaged over every period (origin at the file's (0, 0))."""
    r = residual(a)
    acc, cnt = np.zeros((period, period)), np.zeros((period, period))
    for r0 in range(0, r.shape[0], period):
        for c0 in range(0, r.shape[1], period):
            blk = r[r0:r0 + period, c0:c0 + period]
            acc[:blk.shape[0], :blk.shape[1]] += blk
            cnt[:blk.shape[0], :blk.shape[1]] += 1
    e = acc / np.maximum(cnt, 1)
    return e - e.mean()


def tiled(e: np.ndarray, shape) -> np.ndarray:
    p = e.shape[0]
    return np.tile(e, (-(-shape[0] // p), -(-shape[1] // p)))[:shape[0], :shape[1]]


def add(a: np.ndarray, d: np.ndarray) -> np.ndarray:
    """A luma pattern added to all three channels, rounded and clipped as a saved file would be."""
    return np.clip(np.rint(a.astype(np.float64) + d[..., None]), 0, 255).astype(np.uint8)


def psnr(a: np.ndarray, b: np.ndarray) -> float:
    return float(10 * np.log10(255.0 ** 2 / max(np.mean((a.astype(float) - b.astype(float)) ** 2),
                                                1e-12)))
