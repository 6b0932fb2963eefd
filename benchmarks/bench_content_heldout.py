"""The content line against the mark on held-out pictures: transplants and genuine copies.

    python benchmarks/bench_content_heldout.py [--json OUT]

Held out from the calibration (bench_content.py): the photos coffee and
chelsea (enlarged, as published photos are), scikit-image's logo (flat
colours), two generated pictures of other seeds, a soft generated texture
(few corners) and the tests' smooth sky (no texture at all), each marked with
a fixed test key.

* **Transplants**: the copy attack in numpy (tests/engine_helpers.transplant_mark,
  no claimkit code) from each marked picture onto unrelated hosts. Counted:
  how many the mark examination claims (mark found with the right payload),
  and of those how many the content line flags (``content_mismatch``) and how
  many the evaluation still reports as derived (must be none).
* **Genuine copies**: every attack of ``claimkit.stress.battery()`` (signal
  and geometric; each keeps at least 25 % of the picture) and an enlargement
  to 200 %. The mark is read as the stress battery reads it (every scale).
  For each copy where the mark is found, the content line either agrees
  (corresponds, and its geometry agrees with the mark's within the stated
  tolerances), cannot decide (and says which picture lacks the structure), or
  disagrees (says "does not correspond", or reads another geometry: shown as
  ``content-mismatch`` or ``lines-disagree``). Every disagreement is printed.

Nothing is asserted; the numbers are the issue's targets, measured.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
from collections import defaultdict
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
from PIL import Image
from skimage import data, filters

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parents[1] / "tests"))
from bench_content import _rgb, generated
from engine_helpers import mark, payload, sky, transplant_mark

from claimkit import stress
from claimkit.content.assess import agreement, content_line
from claimkit.evaluation import opinion
from claimkit.imageio import to_luma
from claimkit.mark import detect, scales
from claimkit.mark import payload as payload_mod
from claimkit.workflow import expected_payload_check

SEED = bytes(range(32))
BITS = payload()


def soft(seed: int) -> np.ndarray:
    """A soft colour texture without edges (smoothed noise, sigma 30 px): few corners for ORB."""
    rng = np.random.default_rng(seed)
    base = np.stack([filters.gaussian(rng.normal(size=(480, 640)), sigma=30) for _ in range(3)], -1)
    base = (base - base.min()) / (np.ptp(base) + 1e-9)
    return (base * 120 + 60).astype(np.uint8)


def pictures() -> dict[str, np.ndarray]:
    def big(a, f):
        return np.asarray(Image.fromarray(a).resize((round(a.shape[1] * f), round(a.shape[0] * f)),
                                                    Image.Resampling.BICUBIC))
    return {"coffee": big(data.coffee(), 2), "chelsea": big(data.chelsea(), 2),
            "logo": _rgb(data.logo()), "generated-990": generated(990),
            "generated-991": generated(991), "soft-5": soft(5), "sky": sky()}


def hosts() -> dict[str, np.ndarray]:
    return {"rocket": data.rocket(), "astronomy": data.hubble_deep_field()[:600, :800],
            "brick": np.stack([data.brick()] * 3, -1), "generated-998": generated(998),
            "coins": np.stack([data.coins()] * 3, -1)}


def attacks() -> list[stress.Attack]:
    out = [a for a in stress.battery() if a.name != "none"]
    out.append(stress.Attack("resize 2", "resize", {"factor": 2.0},
                             lambda p: stress.resize(p, 2.0), scale=2.0))
    return out


def _examine(copy: np.ndarray, original_shape: tuple[int, int]):
    f = scales.examine(to_luma(copy), SEED, payload_check=expected_payload_check(BITS),
                       payload_space=payload_mod.PAYLOAD_SPACE)
    found = bool(f.detected and f.payload_valid)
    return found, scales.relative_to_original(f.geometry, original_shape) if found else None


def _evaluate(c: dict, geometry: dict | None) -> dict:
    return opinion.evaluate(exhibit="x", work_id="W", owner=None, detected=True,
                            threshold=detect.DEFAULT_THRESHOLD, content=c,
                            agreement=agreement(c, geometry))


def run_picture(name: str) -> dict:
    """Transplants from and genuine copies of one marked picture."""
    pub = mark(pictures()[name], SEED, BITS)
    ref = to_luma(pub)
    trans = []
    for h, host in hosts().items():
        forged = transplant_mark(pub, host)
        found, geom = _examine(forged, pub.shape[:2])
        if not found:
            trans.append({"picture": name, "host": h, "claimed": False})
            continue
        c = content_line(to_luma(forged), reference_luma=ref)
        ev = _evaluate(c, geom)
        trans.append({"picture": name, "host": h, "claimed": True,
                      "inliers": c["statistic"]["value"], "corresponds": c["corresponds"],
                      "flagged": c["corresponds"] is False,
                      "derived": bool(ev["derivation_claimed"])})
    rows = []
    for att in attacks():
        t0 = time.perf_counter()
        copy = att.apply(pub)
        found, geom = _examine(copy, pub.shape[:2]) if min(copy.shape[:2]) >= detect.MIN_SIDE \
            else (False, None)
        c = content_line(to_luma(copy), reference_luma=ref)
        ag = agreement(c, geom)
        if c["corresponds"] is None:
            outcome = "cannot decide"
        elif c["corresponds"] and (not found or ag.get("agree")):
            outcome = "agrees"
        else:
            outcome = "disagrees"
        ev = _evaluate(c, geom) if found else None
        rows.append({"picture": name, "attack": att.name, "mark_found": found,
                     "outcome": outcome, "inliers": c["statistic"]["value"],
                     "corresponds": c["corresponds"], "agreement": ag,
                     "cannot_decide": c.get("cannot_decide"),
                     "shown": None if ev is None else (not ev["derivation_claimed"]
                                                       if outcome != "agrees" else True),
                     "seconds": round(time.perf_counter() - t0, 2)})
    return {"transplants": trans, "genuine": rows}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--json", help="write every row here")
    args = ap.parse_args()
    t0 = time.perf_counter()
    with ProcessPoolExecutor(2) as pool:
        parts = list(pool.map(run_picture, list(pictures())))
    trans = [t for p in parts for t in p["transplants"]]
    rows = [r for p in parts for r in p["genuine"]]
    claimed = [t for t in trans if t["claimed"]]
    print(f"TRANSPLANTS: {len(trans)} made, {len(claimed)} claimed by the mark; "
          f"{sum(t['flagged'] for t in claimed)} flagged content_mismatch; "
          f"{sum(t['derived'] for t in claimed)} reported as derived")
    for t in claimed:
        if not t["flagged"] or t["derived"]:
            print(f"  NOT FLAGGED: {t}")
    found = [r for r in rows if r["mark_found"]]
    by_att: dict[str, dict[str, int]] = defaultdict(lambda: defaultdict(int))
    for r in found:
        by_att[r["attack"]][r["outcome"]] += 1
    print(f"\n{'attack':32s} found agrees cannot-decide disagrees")
    for att in attacks():
        d = by_att.get(att.name, {})
        n = sum(d.values())
        print(f"{att.name:32s} {n:5d} {d.get('agrees', 0):6d} {d.get('cannot decide', 0):13d} "
              f"{d.get('disagrees', 0):9d}")
    for p in pictures():
        ps = [r for r in found if r["picture"] == p]
        print(f"{p:16s} found {len(ps):3d}: agrees {sum(r['outcome'] == 'agrees' for r in ps)}, "
              f"cannot decide {sum(r['outcome'] == 'cannot decide' for r in ps)}, disagrees "
              f"{sum(r['outcome'] == 'disagrees' for r in ps)}")
    for r in found:
        if r["outcome"] != "agrees":
            print(f"  {r['outcome'].upper()}: {r['picture']} / {r['attack']}: inliers {r['inliers']}, "
                  f"corresponds {r['corresponds']}, {r['cannot_decide'] or r['agreement']}")
    agrees = sum(r["outcome"] == "agrees" for r in found)
    undecided = sum(r["outcome"] == "cannot decide" for r in found)
    decided = len(found) - undecided
    print(f"\nGENUINE: mark found in {len(found)} of {len(rows)} copies; the content line agrees in "
          f"{agrees} ({100 * agrees / max(len(found), 1):.1f} % of all, "
          f"{100 * agrees / max(decided, 1):.1f} % of those it could decide); cannot decide "
          f"{undecided}; disagrees {decided - agrees}; every non-agreement shown (no derivation "
          f"claimed): {all(r['shown'] for r in found if r['outcome'] != 'agrees')}; content "
          f"corresponds where the mark was not found: "
          f"{sum(bool(r['corresponds']) for r in rows if not r['mark_found'])} of "
          f"{sum(not r['mark_found'] for r in rows)}  ({time.perf_counter() - t0:.0f} s)")
    if args.json:
        Path(args.json).write_text(json.dumps({"transplants": trans, "genuine": rows}, indent=1))


if __name__ == "__main__":
    main()
