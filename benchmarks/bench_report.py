"""Benchmark: a case with 20 exhibits reports in under 30 s (issue 5).

Builds a fictional case (scikit-image's ``coffee``, marked, and 20 copies
made with Pillow: resized, cropped, turned, recompressed), examines it, then
times ``report`` (the figure drawing, PDF, PAdES signature, HTML, manifest)
and, for reference, ``verify``. Prints the measured times and their ratios to
the targets, measured in this one run.

    python benchmarks/bench_report.py [--exhibits 20] [--decoys 16]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path

os.environ.setdefault("CLAIMKIT_TEST_FAST_KDF", "1")   # key derivation is not what is measured

import numpy as np
from PIL import Image
from skimage import data

from claimkit.case.bundle import export_bundle
from claimkit.case.examine import examine_case
from claimkit.case.store import add_exhibit, new_case
from claimkit.demo import make_copy
from claimkit.dossier.build import build_report
from claimkit.evidence.profile import Profile
from claimkit.verify import verify_bundle
from claimkit.workflow import mark_file

REPORT_TARGET_S = 30.0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--exhibits", type=int, default=20)
    ap.add_argument("--decoys", type=int, default=16)
    args = ap.parse_args()
    rng = np.random.default_rng(5)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        p = Profile.create(root / "home", "Ilse Marrow", b"bench-only")
        pic = data.coffee()
        big = Image.fromarray(pic).resize((pic.shape[1] * 3, pic.shape[0] * 3),
                                          Image.Resampling.BICUBIC)
        big.save(root / "original.png")
        mark_file(p, root / "original.png", root / "published.jpg")
        case = new_case(root / "case", "Benchmark case", p)
        for i in range(args.exhibits):
            edits = {"scale": float(rng.uniform(0.6, 1.0)),
                     "crop": [float(rng.uniform(0, 0.15)), float(rng.uniform(0, 0.15)),
                              float(rng.uniform(0.85, 1)), float(rng.uniform(0.85, 1))],
                     "rotate_deg": float(rng.choice([0.0, 0.0, 3.0, -5.0])),
                     "jpeg_quality": int(rng.integers(60, 92))}
            f = root / f"copy-{i:02d}.jpg"
            make_copy(root / "published.jpg", f, edits)
            add_exhibit(case, f, source=f"https://tidewater-home-goods.example/p/{i}", profile=p)
        t = time.perf_counter()
        examine_case(case, p, decoys=args.decoys, search=[root])
        t_exam = time.perf_counter() - t
        t = time.perf_counter()
        rep = build_report(case, p)
        t_report = time.perf_counter() - t
        export_bundle(case, root / "bundle.zip", p)
        t = time.perf_counter()
        ok = verify_bundle(root / "bundle.zip").ok
        t_verify = time.perf_counter() - t
        p.close()
        pages = Path(rep["pdf"]).stat().st_size
    print(f"exhibits: {args.exhibits}, decoys per exhibit: {args.decoys}, photo 1800x1200")
    print(f"case examine: {t_exam:.1f} s ({t_exam / args.exhibits:.2f} s per exhibit)")
    print(f"report: {t_report:.1f} s; target {REPORT_TARGET_S:.0f} s; "
          f"ratio to target {t_report / REPORT_TARGET_S:.2f} (must be <= 1)")
    print(f"verify (re-runs every examination): {t_verify:.1f} s, "
          f"{t_verify / t_exam:.2f}x the examination; passed: {ok}")
    print(f"dossier PDF size: {pages / 1e6:.1f} MB")


if __name__ == "__main__":
    main()
