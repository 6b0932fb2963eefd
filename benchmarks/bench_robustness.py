"""Robustness and message PSNR of the mark under the stress battery (issue 2 and 3 figures).

    python benchmarks/bench_robustness.py [--quick]

Marks eight pictures from 300 to 2000 px a side at the default strength
(five photos of scikit-image's data set, the coffee photo enlarged to 2000 px,
the busy 512 x 512 immunohistochemistry slide and a generated smooth sky),
runs every attack of ``claimkit.stress.battery()`` on each (Pillow and
scikit-image do the attacking) and prints, per attack: how many copies were
claimed with the right payload at P_fa <= 1e-9, the weakest bound, and the
median and lowest message PSNR. The published figures of the phase-dispersion
method are printed beside the attacks they name (their attack strengths and
message image are not known, so they compare only roughly). Invisibility of
each marked picture is measured with skimage.metrics. Nothing is asserted;
the README quotes this table.
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from PIL import Image
from skimage import data, metrics

from claimkit import stress
from claimkit.imageio import add_luma_delta, to_luma
from claimkit.mark import scales, stats
from claimkit.mark.formats import CURRENT

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from tests.engine_helpers import BENCH_BITS as BITS
from tests.engine_helpers import BENCH_EMBED3 as EMBED
from tests.engine_helpers import BENCH_KEYS as KEYS
from tests.engine_helpers import (
    SEED,
    BenchPayloads,
    sky,  # the tests' smooth sky, the same picture
)

# Extracted-message PSNRs reported for the phase-dispersion method, by the battery row
# closest to the attack they name (strengths unknown).
PUBLISHED = {"blur 1": 25.02, "contrast 0.6": 26.19, "jpeg 50": 24.62, "crop 25 %": 27.33,
             "noise 8": 23.46, "rotate 17": 11.39}


def pictures() -> dict[str, np.ndarray]:
    coffee = data.coffee()
    return {
        "chelsea": data.chelsea(), "coffee": coffee, "rocket": data.rocket(),
        "hubble": data.hubble_deep_field(), "retina": data.retina(),
        "coffee-2000": np.asarray(Image.fromarray(coffee).resize((2000, 1333), Image.BICUBIC)),
        "slide": data.immunohistochemistry(), "sky": sky(),
    }


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true", help="the short battery")
    ap.add_argument("--format", type=int, choices=(2, 3), default=int(CURRENT.name[-1]),
                    help="the mark format written (the examiner holds the keys of every format)")
    ap.add_argument("--only", help="comma-separated picture names (default: all eight)")
    args = ap.parse_args()
    embed_keys = EMBED if args.format == 3 else SEED

    # The owner's payload check, with the allocated payloads listed for the decoder (as
    # `claimkit stress` examines: workflow.owner_payload_check).
    check = BenchPayloads()
    rows: dict[str, list[dict]] = {}
    t0 = time.perf_counter()
    print(f"mark format claimkit-mark/{args.format}, default strength")
    for name, rgb in pictures().items():
        if args.only and name not in args.only.split(","):
            continue
        # Both components (fine and coarse) where the picture is large enough for a
        # coarse level (short side >= 614 px: coffee-2000, hubble, retina).
        marked = add_luma_delta(rgb, scales.multiscale_delta(to_luma(rgb), embed_keys, BITS))
        psnr = metrics.peak_signal_noise_ratio(rgb, marked, data_range=255)
        ssim = metrics.structural_similarity(rgb, marked, channel_axis=2, data_range=255)
        print(f"  {name:12s} {rgb.shape[1]}x{rgb.shape[0]}  PSNR {psnr:5.2f} dB  SSIM {ssim:.4f}")
        for row in stress.run_battery(marked, KEYS, check, quick=args.quick):
            rows.setdefault(row["attack"], []).append(row)
    print(f"\n{'attack':30s} {'claimed':>8s} {'weakest P_fa':>13s} {'msg PSNR median':>16s} "
          f"{'min':>6s} {'published':>10s}")
    total = claimed = 0
    for attack, rs in rows.items():
        ok = [r for r in rs if r["detected"] and r["same_payload"] is not False]
        total, claimed = total + len(rs), claimed + len(ok)
        worst = max(r["log10_false_alarm_probability"] for r in rs)
        psnrs = [r["message_psnr_db"] if r["message_psnr_db"] is not None else float("nan") for r in rs]
        pub = PUBLISHED.get(attack)
        print(f"{attack:30s} {len(ok):>3d}/{len(rs):<4d} {stats.describe(worst):>13s} "
              f"{np.nanmedian(psnrs):>16.1f} {np.nanmin(psnrs):>6.1f} "
              f"{'' if pub is None else f'{pub:.2f}':>10s}")
    print(f"\nclaimed {claimed} of {total} copies in {time.perf_counter() - t0:.0f} s "
          "(a copy whose mark was not found counts as a miss; its message PSNR is left out)")


if __name__ == "__main__":
    main()
