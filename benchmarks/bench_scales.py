"""Web copies of a large master, and small copies of 1-2 megapixel photos (the mark's coarse component).

    python benchmarks/bench_scales.py [--skip-master]

1. A generated 24-megapixel master (6000 x 4000, ``tests.engine_helpers.landscape``)
   is marked at the default strength (fine and coarse components) and copied the
   way platforms copy it: Pillow's Lanczos filter to 2048, 1600, 1080, 800 and
   640 px wide and JPEG 85, and a social copy (1080 wide, cropped to 4:5, JPEG 75
   with 4:2:0 chroma). Each copy is examined blind; printed: claimed or not, the
   scale it was found at, the pilot score z, the false-alarm bound, the estimated
   scale against the true one, and the time of each examination.
2. Fourteen held-out photos of 1 to 2 megapixels (photos and textures of
   scikit-image's data set, some enlarged 2-3x with grain, and generated
   landscapes; none was used to tune the mark) are marked and downscaled to 25 %
   of their width with Pillow's Lanczos (plain and then JPEG 85) and with
   scikit-image's ``rescale``; printed: PSNR and SSIM of each marked photo
   (``skimage.metrics``) and the share of copies claimed.

Every copy is examined as the owner's examination does it: the decoder keeps to the owner
tag's 16 bits, and where it finds no valid payload the best of the owner's allocated payloads
(here 1000, the marked one among them) is scored (``mark.payload.PayloadList``).

Nothing is asserted; the README quotes these figures.
"""

from __future__ import annotations

import argparse
import io
import sys
import time
from pathlib import Path

import numpy as np
from PIL import Image
from skimage import data, metrics
from skimage.transform import rescale

from claimkit.imageio import add_luma_delta, to_luma
from claimkit.mark import scales, stats

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from tests.engine_helpers import BENCH_BITS as BITS
from tests.engine_helpers import BENCH_EMBED3, SEED, BenchPayloads, lanczos, landscape, sky
from tests.engine_helpers import BENCH_KEYS as KEYS  # the examiner holds every format's keys

FORMAT = {"n": 3}
WRONG = [0]   # copies claimed with another allocated payload than the marked one
# The owner's examination: the owner tag's bits known to the decoder, the allocated payloads
# listed (the marked one and the 999 serials around it).
LISTED = BenchPayloads()


def mark_scales(rgb: np.ndarray) -> np.ndarray:
    """Both components, in the format asked for (``--format``)."""
    keys = SEED if FORMAT["n"] == 2 else BENCH_EMBED3
    return add_luma_delta(rgb, scales.multiscale_delta(to_luma(rgb), keys, BITS))


def check(bits) -> bool:
    """The marked payload (what a copy must be claimed with)."""
    return bits is not None and bool(np.array_equal(np.asarray(bits), BITS))


def examine(copy: np.ndarray):
    return scales.examine(to_luma(copy), KEYS, payload_check=LISTED, known_bits=LISTED.known,
                          payload_candidates=LISTED.candidates)


def jpeg(a: np.ndarray, q: int) -> np.ndarray:
    buf = io.BytesIO()
    Image.fromarray(a).save(buf, "JPEG", quality=q, subsampling=2)
    return np.asarray(Image.open(buf))


def enlarged(a: np.ndarray, f: float, grain: float, seed: int) -> np.ndarray:
    h, w = a.shape[:2]
    x = np.asarray(Image.fromarray(a).resize((round(w * f), round(h * f)), Image.Resampling.BICUBIC),
                   dtype=np.float32)
    x += np.random.default_rng(seed).normal(0, grain, x.shape).astype(np.float32)
    return np.clip(np.rint(x), 0, 255).astype(np.uint8)


def grey3(a: np.ndarray) -> np.ndarray:
    return np.repeat(a[..., None], 3, axis=2)


def held_out() -> dict[str, np.ndarray]:
    textures = np.block([[data.brick(), data.grass()], [data.gravel(), data.moon()]])
    return {
        "retina": data.retina(), "hubble": data.hubble_deep_field(),
        "coffee x2": enlarged(data.coffee(), 2, 2.0, 1), "rocket x2": enlarged(data.rocket(), 2, 2.0, 2),
        "chelsea x3": enlarged(data.chelsea(), 3, 2.0, 3),
        "slide x2": enlarged(data.immunohistochemistry(), 2, 2.0, 4),
        "textures": grey3(textures), "cells x2": grey3(enlarged(data.cell(), 2, 1.5, 5)),
        "sky": sky(800, 1200), "landscape a": landscape(1000, 1500, seed=21),
        "landscape b": landscape(900, 1350, seed=22), "landscape c": landscape(1200, 1200, seed=23),
        "colour wheel x3": enlarged(data.colorwheel()[..., :3], 3, 2.0, 6),
        "coins x3": grey3(enlarged(data.coins(), 3, 2.0, 7)),
    }


def row(name: str, copy: np.ndarray, truth: float, original_shape) -> None:
    t = time.perf_counter()
    f = examine(copy)
    dt = time.perf_counter() - t
    ok = f.detected and check(f.payload_bits)
    WRONG[0] += bool(f.detected and f.payload_valid and not ok)
    view = (f.geometry.get("level") or {}).get("view", "native") if f.detected else "-"
    est = scales.relative_to_original(f.geometry, original_shape).get("scale") if f.detected else None
    print(f"  {name:28s} {copy.shape[1]:>5d}x{copy.shape[0]:<5d} {'claimed' if ok else 'NOT found':9s} "
          f"{view:10s} z {f.z_pilot:6.2f}  P_fa {stats.describe(f.log10_false_alarm):>11s} "
          f"(log10 {f.log10_false_alarm:7.1f})  scale {truth:.4f} -> "
          f"{'-' if est is None else f'{est:.4f}'}  {dt:5.2f} s")


def master_copies() -> None:
    t = time.perf_counter()
    master = landscape(4000, 6000, seed=11)
    print(f"24 MP master generated in {time.perf_counter() - t:.1f} s")
    t = time.perf_counter()
    mk = mark_scales(master)
    crop_ssim = metrics.structural_similarity(master[1000:3000, 2000:4000],
                                              mk[1000:3000, 2000:4000],
                                              channel_axis=2, data_range=255)
    print(f"marked (fine + coarse, in memory) in {time.perf_counter() - t:.1f} s; "
          f"PSNR {metrics.peak_signal_noise_ratio(master, mk, data_range=255):.2f} dB "
          f"(SSIM on a 2000 x 2000 crop {crop_ssim:.4f})")
    del master
    for width in (2048, 1600, 1080, 800, 640):
        copy = jpeg(lanczos(mk, (width, round(4000 * width / 6000))), 85)
        row(f"{width} px, Lanczos, JPEG 85", copy, width / 6000, mk.shape[:2])
    small = lanczos(mk, (1080, 720))
    c0 = (1080 - 576) // 2
    row("1080 px, 4:5, JPEG 75 4:2:0", jpeg(np.ascontiguousarray(small[:, c0:c0 + 576]), 75), 0.18,
        mk.shape[:2])


def held_out_copies() -> None:
    kinds = {"Pillow Lanczos": lambda a, f: lanczos(a, (round(a.shape[1] * f), round(a.shape[0] * f))),
             "Pillow Lanczos + JPEG 85": lambda a, f: jpeg(
                 lanczos(a, (round(a.shape[1] * f), round(a.shape[0] * f))), 85),
             "scikit-image rescale": lambda a, f: np.clip(np.rint(rescale(
                 a.astype(np.float64) / 255, f, anti_aliasing=True, channel_axis=2, order=3) * 255),
                 0, 255).astype(np.uint8)}
    counts = {k: 0 for k in kinds}
    pics = held_out()
    for name, rgb in pics.items():
        mk = mark_scales(rgb)
        psnr = metrics.peak_signal_noise_ratio(rgb, mk, data_range=255)
        ssim = metrics.structural_similarity(rgb, mk, channel_axis=2, data_range=255)
        line = f"  {name:16s} {rgb.shape[1]}x{rgb.shape[0]}  PSNR {psnr:5.2f}  SSIM {ssim:.4f} |"
        for kind, make in kinds.items():
            f = examine(make(mk, 0.25))
            ok = f.detected and check(f.payload_bits)
            WRONG[0] += bool(f.detected and f.payload_valid and not ok)
            counts[kind] += ok
            line += f" {'Y' if ok else 'n'} {f.log10_false_alarm:7.1f}"
        print(line, flush=True)
    for kind, n in counts.items():
        print(f"  25 % copies claimed, {kind}: {n} of {len(pics)}")


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--skip-master", action="store_true")
    ap.add_argument("--skip-held-out", action="store_true")
    ap.add_argument("--format", type=int, choices=(2, 3), default=3, help="mark format written")
    args = ap.parse_args()
    FORMAT["n"] = args.format
    print(f"mark format claimkit-mark/{args.format}")
    if not args.skip_master:
        master_copies()
    if args.skip_held_out:
        return
    print("held-out photos, copies at 25 % of the width (columns: Lanczos, Lanczos + JPEG 85, rescale)")
    held_out_copies()
    print(f"copies claimed with a wrong work: {WRONG[0]}")


if __name__ == "__main__":
    main()
