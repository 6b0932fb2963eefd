"""The content line against the mark on held-out pictures: transplants and genuine copies.

    python benchmarks/bench_content_heldout.py

Held out from the calibration (bench_content.py): the photos coffee and
chelsea (enlarged, as published photos are) and the tests' smooth sky, each
marked with a fixed test key.

* **Transplants**: the copy attack in numpy (tests/engine_helpers.transplant_mark,
  no claimkit code) from each marked picture onto unrelated hosts. Counted:
  how many the mark examination claims (mark found with the right payload),
  and of those how many the content line flags (``content_mismatch``) and how
  many the evaluation still reports as derived (must be none).
* **Genuine copies**: every attack of ``claimkit.stress.battery()`` (signal
  and geometric; each keeps at least 25 % of the picture). Counted: copies
  where the mark is found, and of those how many the content line registers
  with a geometry that agrees with the mark's; every disagreement is printed.

Nothing is asserted; the numbers are the issue's targets, measured.
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np
from PIL import Image
from skimage import data

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from bench_content import generated
from engine_helpers import mark, payload, sky, transplant_mark

from claimkit import stress
from claimkit.content.assess import agreement, content_line
from claimkit.evaluation import opinion
from claimkit.imageio import to_luma
from claimkit.mark import detect
from claimkit.workflow import expected_payload_check

SEED = bytes(range(32))
BITS = payload()


def pictures() -> dict[str, np.ndarray]:
    def big(a, f):
        return np.asarray(Image.fromarray(a).resize((round(a.shape[1] * f), round(a.shape[0] * f)),
                                                    Image.Resampling.BICUBIC))
    return {"coffee": big(data.coffee(), 2), "chelsea": big(data.chelsea(), 2),
            "sky": sky()}


def main() -> None:
    t0 = time.perf_counter()
    check = expected_payload_check(BITS)
    pics = {k: mark(v, SEED, BITS) for k, v in pictures().items()}
    hosts = {"rocket": data.rocket(), "astronomy": data.hubble_deep_field()[:600, :800],
             "brick": np.stack([data.brick()] * 3, -1), "generated-998": generated(998),
             "coins": np.stack([data.coins()] * 3, -1)}
    claimed = flagged = derived = 0
    for k, pub in pics.items():
        ref = to_luma(pub)
        for h, host in hosts.items():
            forged = transplant_mark(pub, host)
            f = detect.examine_luma(to_luma(forged), SEED, payload_check=check)
            if not (f.detected and f.payload_valid):
                continue
            claimed += 1
            c = content_line(to_luma(forged), reference_luma=ref)
            ev = opinion.evaluate(exhibit="x", work_id="W", owner=None, detected=True,
                                  threshold=detect.DEFAULT_THRESHOLD, content=c,
                                  agreement=agreement(c, f.geometry))
            flagged += c["corresponds"] is False
            derived += bool(ev["derivation_claimed"])
            print(f"transplant {k} -> {h}: inliers {c['statistic']['value']}, "
                  f"corresponds {c['corresponds']}, reported log10 LR {ev['reported_log10_lr']}",
                  flush=True)
    print(f"TRANSPLANTS: {claimed} claimed by the mark; {flagged} flagged content_mismatch; "
          f"{derived} reported as derived  ({time.perf_counter() - t0:.0f} s)", flush=True)

    found = agree = 0
    content_only = 0
    lrs = []
    for k, pub in pics.items():
        ref = to_luma(pub)
        for att in stress.battery():
            if att.name == "none":
                continue
            copy = att.apply(pub)
            f = detect.examine_luma(to_luma(copy), SEED, payload_check=check)
            c = content_line(to_luma(copy), reference_luma=ref)
            if not (f.detected and f.payload_valid):
                content_only += bool(c["corresponds"])
                print(f"genuine {k} / {att.name}: mark not found; content corresponds "
                      f"{c['corresponds']}", flush=True)
                continue
            found += 1
            ag = agreement(c, f.geometry)
            ok = bool(c["corresponds"] and ag.get("agree"))
            agree += ok
            lrs.append(c["log10_lr"])
            if not ok:
                print(f"genuine {k} / {att.name}: DISAGREE: inliers {c['statistic']['value']}, "
                      f"corresponds {c['corresponds']}, agreement {ag}", flush=True)
    print(f"GENUINE: mark found in {found}; content line agrees in {agree} "
          f"({100 * agree / max(found, 1):.1f} %); content corresponds where the mark was not "
          f"found: {content_only}; content log10 LR median {np.median(lrs):.2f}  "
          f"({time.perf_counter() - t0:.0f} s)")


if __name__ == "__main__":
    main()
