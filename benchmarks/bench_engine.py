"""Engine speed and memory on a 24-megapixel colour JPEG (issue 2 targets), printed as ratios.

    python benchmarks/bench_engine.py [--megapixels 24]

Targets: ``mark`` within 1.5x the time Pillow takes to decode and re-encode
the same file; ``examine`` within 2x Pillow's decode time; peak memory of
either under 1.5 GB. Each measurement runs in its own process so that peak
memory (ru_maxrss) is its own; times are the best of three runs, all in this
one run of the script, on this machine. Beside each wall time the process's
CPU time is printed: on a shared machine the wall time moves with other
load, and ``mark`` overlaps writing the file with measuring SSIM on a
second thread, so its CPU time can exceed its wall time.

``--breakdown`` also times the steps of one ``mark`` run one after another
(thread pools replaced by direct calls) and prints each step's share.
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
best_cpu = float("inf")
for i in range(3):
    t = time.perf_counter()
    c = time.process_time()
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
    best_cpu = min(best_cpu, time.process_time() - c)
print(json.dumps({"seconds": best, "cpu_seconds": best_cpu,
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}))
"""

# One mark, step by step: each function mark_file calls is wrapped with a timer
# and the thread pools are replaced by direct calls, so the steps add up.
BREAKDOWN = r"""
import json, os, sys, time
from concurrent.futures import Future
from pathlib import Path
from claimkit import workflow
from claimkit.evidence.profile import Profile
src, work = Path(sys.argv[1]), Path(sys.argv[2])
prof = Profile.open(work / "home", b"bench")

class Direct:
    def __init__(self, *a, **k): pass
    def __enter__(self): return self
    def __exit__(self, *exc): return False
    def submit(self, fn, *a, **k):
        f = Future()
        try:
            f.set_result(fn(*a, **k))
        except BaseException as exc:
            f.set_exception(exc)
        return f
    def map(self, fn, *iterables):
        return [fn(*args) for args in zip(*iterables)]

workflow.ThreadPoolExecutor = Direct
spent = {}
def timed(label, fn):
    def wrapper(*a, **k):
        t = time.perf_counter()
        try:
            return fn(*a, **k)
        finally:
            spent[label] = spent.get(label, 0.0) + time.perf_counter() - t
    return wrapper

reads = iter(["read + decode original", "read back + decode marked file"] * 9)
orig_read_picture = workflow.read_picture
def read_picture(*a, **k):
    return timed(next(reads), orig_read_picture)(*a, **k)
workflow.read_picture = read_picture
workflow.to_luma = timed("luma (BT.601, full size)", workflow.to_luma)
workflow.perceptual_fingerprint = timed("perceptual fingerprint", workflow.perceptual_fingerprint)
class Proxy:
    # the module, with some functions replaced (only as workflow sees them)
    def __init__(self, module, **replaced):
        self._module = module
        self.__dict__.update(replaced)
    def __getattr__(self, name):
        return getattr(self._module, name)

q = workflow.quality
workflow.embed = Proxy(workflow.embed, mark_plan=timed(
    "mask (SSIM-derived, half size) + key pattern", workflow.embed.mark_plan))
workflow.add_luma_delta = timed("add change to R,G,B (band by band)", workflow.add_luma_delta)
workflow.write_picture = timed("encode JPEG q95 4:4:4 + atomic write", workflow.write_picture)
workflow.quality = Proxy(
    q, squared_error_sum=timed("PSNR of the marked pixels (exact sum)", q.squared_error_sum),
    psnr=timed("PSNR of the file as written", q.psnr),
    ssim=timed("SSIM (24 patches of 512x512)", q.ssim))
best = None
for i in range(3):
    spent.clear()
    reads = iter(["read + decode original", "read back + decode marked file"])
    t = time.perf_counter()
    workflow.mark_file(prof, src, work / f"b{i}.jpg")
    total = time.perf_counter() - t
    if best is None or total < best[0]:
        best = (total, dict(spent))
print(json.dumps({"total": best[0], "steps": best[1]}))
"""


def child(mode: str, src: Path, work: Path) -> dict:
    env = dict(os.environ, CLAIMKIT_TEST_FAST_KDF="1", OMP_NUM_THREADS="1")
    argv = ([sys.executable, "-c", BREAKDOWN, str(src), str(work)] if mode == "breakdown"
            else [sys.executable, "-c", CHILD, mode, str(src), str(work)])
    out = subprocess.run(argv, capture_output=True, text=True, env=env, check=False)
    if out.returncode != 0:
        raise SystemExit(f"{mode} failed:\n{out.stderr[-2000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--megapixels", type=float, default=24.0)
    ap.add_argument("--breakdown", action="store_true",
                    help="also time the steps of one mark, one after another")
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
        print(f"Pillow decode           {dec['seconds']:.2f} s  (cpu {dec['cpu_seconds']:.2f} s)")
        print(f"Pillow decode+encode    {decenc['seconds']:.2f} s  (cpu {decenc['cpu_seconds']:.2f} s)")
        print(f"claimkit mark           {mark['seconds']:.2f} s  (cpu {mark['cpu_seconds']:.2f} s)"
              f"   ratio to decode+encode {mark['seconds'] / decenc['seconds']:.2f} (target <= 1.5)"
              f"   cpu ratio {mark['cpu_seconds'] / decenc['cpu_seconds']:.2f}"
              f"   peak {mark['peak_mb']:.0f} MB")
        print(f"claimkit examine        {exam['seconds']:.2f} s  (cpu {exam['cpu_seconds']:.2f} s)"
              f"   ratio to decode {exam['seconds'] / dec['seconds']:.2f} (target <= 2.0)"
              f"   peak {exam['peak_mb']:.0f} MB")
        print("peak memory target: < 1500 MB for either")
        if args.breakdown:
            bd = child("breakdown", src, work)
            total = bd["total"]
            print(f"\nmark, step by step (no overlap), best of 3: {total:.2f} s"
                  f" = {total / decenc['seconds']:.2f} x decode+encode")
            rest = total
            for label, sec in sorted(bd["steps"].items(), key=lambda kv: -kv[1]):
                rest -= sec
                print(f"  {label:46s} {sec:5.2f} s  {100 * sec / total:4.0f} %")
            print(f"  {'other (registry, signing, checks, hashing)':46s} {rest:5.2f} s"
                  f"  {100 * rest / total:4.0f} %")


if __name__ == "__main__":
    main()
