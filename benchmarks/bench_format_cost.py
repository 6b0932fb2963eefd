"""What reading mark format 3 costs an examination, against reading formats 1 and 2 alone (issue 10).

    python benchmarks/bench_format_cost.py [--repeats N]

Web-size JPEG copies (1.6 and 2.2 megapixels, a generated landscape and a
scikit-image photo enlarged) are examined the way ``examine`` does
(``workflow.examine_picture`` on the file read by ``read_for_examination``,
every scale), once as an examiner who reads formats 1 and 2 only, as claimkit
did before format 3 (the detection seed; ``detect.prepare(..., macro=1)``
folds at the 128-px tile alone and prepares nothing for format 3's keyed
search), and once with the keys of every format (format 3's sync and 16
family seeds too, its keyed synchronisation search and the 512-px folds its
claim reads). Printed: the median CPU time of each (``time.process_time``,
after one warm-up examination that expands the keys) and their ratio, for
marked copies of each format and for an unmarked copy. Issue 10's target:
the ratio at most 1.5. The ratio is measured in one run, on the same files.
"""

from __future__ import annotations

import argparse
import functools
import io
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from PIL import Image
from skimage import data

from claimkit import workflow
from claimkit.imageio import add_luma_delta, to_luma
from claimkit.mark import detect, scales

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
from tests.engine_helpers import BENCH_BITS as BITS
from tests.engine_helpers import BENCH_EMBED3 as EMBED
from tests.engine_helpers import BENCH_KEYS as KEYS
from tests.engine_helpers import SEED, landscape


def jpeg_file(rgb: np.ndarray, folder: Path, name: str) -> Path:
    p = folder / f"{name}.jpg"
    buf = io.BytesIO()
    Image.fromarray(rgb).save(buf, "JPEG", quality=85)
    p.write_bytes(buf.getvalue())
    return p


def cpu(fn, repeats: int) -> float:
    fn()                                   # warm-up: key expansion, caches
    times = []
    for _ in range(repeats):
        t = time.process_time()
        fn()
        times.append(time.process_time() - t)
    return statistics.median(times)


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()
    coffee = np.asarray(Image.fromarray(data.coffee()).resize((1800, 1200), Image.BICUBIC))
    pictures = {"landscape 1.6 MP": landscape(1040, 1560, seed=61), "coffee 2.2 MP": coffee}
    ratios = []
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        for name, rgb in pictures.items():
            luma = to_luma(rgb)
            files = {"unmarked": jpeg_file(rgb, folder, f"{name}-0")}
            for fmt, keys in (("format 2", SEED), ("format 3", EMBED)):
                files[fmt] = jpeg_file(add_luma_delta(rgb, scales.multiscale_delta(luma, keys, BITS)),
                                       folder, f"{name}-{fmt[-1]}")
            for kind, path in files.items():
                pic = workflow.read_for_examination(path)
                def run(k, pic=pic):
                    return workflow.examine_picture(pic, k, payload_check=lambda b: np.array_equal(b, BITS))
                full = detect.prepare
                detect.prepare = functools.partial(full, macro=1)   # nothing for format 3
                try:
                    old = cpu(lambda: run(SEED), args.repeats)
                finally:
                    detect.prepare = full
                new = cpu(lambda: run(KEYS), args.repeats)
                ratios.append(new / old)
                print(f"  {name:18s} {kind:9s}: formats 1-2 only {old * 1000:6.0f} ms CPU, every "
                      f"format {new * 1000:6.0f} ms  ratio {new / old:4.2f}", flush=True)
    print(f"median ratio {statistics.median(ratios):.2f}, largest {max(ratios):.2f} (target <= 1.5)")


if __name__ == "__main__":
    main()
