"""Engine speed and memory on a 24-megapixel colour JPEG (issue 2 targets), printed as ratios.

    python benchmarks/bench_engine.py [--megapixels 24]

Targets: ``mark`` within 1.5x the time Pillow takes to decode and re-encode
the same file; ``examine`` within 2x Pillow's decode time; peak memory of
either under 1.5 GB. Each measurement runs in its own process so that peak
memory (ru_maxrss) is its own; times are the best of three runs, all in this
one run of the script, on this machine.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

CHILD = r"""
import json, os, resource, sys, time
from pathlib import Path
mode, src, work = sys.argv[1], Path(sys.argv[2]), Path(sys.argv[3])
best = float("inf")
if mode in ("mark", "examine"):
    from claimkit.evidence.profile import Profile
    from claimkit import workflow
    prof = Profile.open(work / "home", b"bench")
for i in range(3):
    t = time.perf_counter()
    if mode == "decode":
        from PIL import Image
        Image.open(src).load()
    elif mode == "decode_encode":
        from PIL import Image
        im = Image.open(src); im.load(); im.save(work / "re.jpg", quality=95)
    elif mode == "mark":
        workflow.mark_file(prof, src, work / f"m{i}.jpg")
    elif mode == "examine":
        workflow.examine_file(prof, work / "m0.jpg")
    best = min(best, time.perf_counter() - t)
print(json.dumps({"seconds": best, "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""


def child(mode: str, src: Path, work: Path) -> dict:
    env = dict(os.environ, CLAIMKIT_TEST_FAST_KDF="1", OMP_NUM_THREADS="1")
    out = subprocess.run([sys.executable, "-c", CHILD, mode, str(src), str(work)],
                         capture_output=True, text=True, env=env, check=False)
    if out.returncode != 0:
        raise SystemExit(f"{mode} failed:\n{out.stderr[-2000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--megapixels", type=float, default=24.0)
    args = ap.parse_args()
    import numpy as np
    from PIL import Image
    from skimage import data

    from claimkit.evidence.profile import Profile

    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        os.environ["CLAIMKIT_TEST_FAST_KDF"] = "1"
        Profile.create(work / "home", "Bench Owner", b"bench").close()
        base = Image.fromarray(data.rocket())
        w = round((args.megapixels * 1e6 * 1.5) ** 0.5)
        h = round(w / 1.5)
        big = base.resize((w, h), Image.BICUBIC)
        # Add fine grain so the JPEG is as costly to code as a real photo.
        arr = np.asarray(big).astype(np.int16)
        arr += np.random.default_rng(0).integers(-6, 7, arr.shape, dtype=np.int16)
        src = work / "photo.jpg"
        Image.fromarray(np.clip(arr, 0, 255).astype(np.uint8)).save(src, quality=92)
        print(f"test photo: {w}x{h} ({w * h / 1e6:.1f} MP), {src.stat().st_size / 1e6:.1f} MB JPEG")
        dec = child("decode", src, work)
        decenc = child("decode_encode", src, work)
        mark = child("mark", src, work)
        exam = child("examine", src, work)
        print(f"Pillow decode           {dec['seconds']:.2f} s")
        print(f"Pillow decode+encode    {decenc['seconds']:.2f} s")
        print(f"claimkit mark           {mark['seconds']:.2f} s   ratio to decode+encode "
              f"{mark['seconds'] / decenc['seconds']:.2f} (target <= 1.5)   peak {mark['peak_mb']:.0f} MB")
        print(f"claimkit examine        {exam['seconds']:.2f} s   ratio to decode "
              f"{exam['seconds'] / dec['seconds']:.2f} (target <= 2.0)   peak {exam['peak_mb']:.0f} MB")
        print("peak memory target: < 1500 MB for either")


if __name__ == "__main__":
    main()
