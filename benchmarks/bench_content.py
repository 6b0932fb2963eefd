"""Measure the content line's statistic on unrelated and on genuine pairs; write its calibration.

    python benchmarks/bench_content.py [--out claimkit/content/calibration.json] [--quick]

What is measured (every number the content line's likelihood ratio rests on):

* **unrelated**: every ordered pair of distinct pictures from the calibration
  set (scikit-image's data set without people, and generated pictures: smooth
  random textures, random shapes), the exhibit as is and after JPEG 60 with a
  7 degree turn. This is the transplanted-mark situation: the picture shown is
  not the registered one. Each exhibit is also taken as a 15 % web copy, so
  that the reading against a reduced reference (``register.reduced``) is in
  the null as well.
* **same owner**: pairs a photographer's other works resemble most: the left
  and right parts of one picture that do not overlap (two frames of one
  scene), and scikit-image's stereo pair (the same scene from a second
  viewpoint), kept apart because it is a known limit, not a null.
* **genuine**: the short stress battery (``claimkit.stress.battery(quick=True)``:
  every kind of geometric edit and JPEG), its signal edits (blur, noise,
  contrast, median), web copies at 25 and 10 % and an enlargement to 200 % on
  the first calibration pictures, registered to the picture itself and to a
  half-resolution reference.

``--dense-only`` measures the dense reading (:mod:`claimkit.content.dense`) instead: its null
over the calibration pictures and smooth and flat ones (soft textures, blobs, a dusk ramp, a
colour gradient, a grey ramp, a vignette), the exhibit as is and as a 25 % crop, and each
picture's two halves; its genuine copies on soft, smooth and other pictures.

The statistic is the RANSAC inlier count of :func:`claimkit.content.register.register`.
The file written keeps the sorted samples themselves (the empirical
distributions), the threshold chosen from them and how, and the machine and
software that measured them; :mod:`claimkit.content.calibration` reads it.
Nothing is asserted here. Held out from the tests: the pictures ``coffee``
and ``chelsea`` and the tests' own generated pictures are not used.
"""

from __future__ import annotations

import argparse
import json
import platform
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import skimage
from PIL import Image
from skimage import data

from claimkit import __version__, stress
from claimkit.content import assess, broad, dense
from claimkit.content import register as reg
from claimkit.imageio import to_luma
from claimkit.mark import detect, scales
from claimkit.mark import payload as payload_mod
from claimkit.mark.fingerprint import fingerprint_distance, perceptual_fingerprint
from claimkit.workflow import expected_payload_check

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))
from engine_helpers import (  # noqa: E402 - the tests' helpers, on the path just above
    SEED,
    blobs,
    dusk,
    generated,
    mark,
    payload,
    soft,
    transplant_mark,
)


def _rgb(a: np.ndarray) -> np.ndarray:
    a = np.asarray(a)
    if a.ndim == 2:
        a = np.stack([a] * 3, axis=-1)
    if a.shape[-1] == 4:
        a = a[..., :3]
    if a.dtype != np.uint8:
        a = (np.clip(a, 0, 1) * 255 + 0.5).astype(np.uint8) if a.max() <= 1 else a.astype(np.uint8)
    return a


#: Pictures the genuine battery runs on (the first photos and generated pictures of the set).
GENUINE_PHOTOS = 6
GENUINE_GENERATED = 2
#: The battery's short form (every kind of geometric edit, JPEG) plus its signal edits.
SIGNAL = ("blur 2", "noise 8", "contrast 0.6", "median 3")
#: Web-sized copies and an enlargement, which the reduced-reference reading exists for.
SIZES = ("downscale 25 % jpeg 85", "downscale 10 % jpeg 85")


def genuine_attacks(quick: bool) -> list:
    attacks = stress.battery(quick=True)
    if not quick:
        attacks += [a for a in stress.battery() if a.name in SIGNAL + SIZES]
        attacks.append(stress.Attack("resize 2", "resize", {"factor": 2.0},
                                     lambda p: stress.resize(p, 2.0), scale=2.0))
    return [a for a in attacks if a.name != "none"]


def calibration_pictures(quick: bool) -> dict[str, np.ndarray]:
    names = ["rocket", "hubble_deep_field", "immunohistochemistry", "retina", "brick", "grass",
             "coins", "clock", "horse", "gravel", "moon", "cell", "page", "text",
             "shepp_logan_phantom", "colorwheel"]
    if quick:
        names = names[:6]
    out = {n: _rgb(getattr(data, n)()) for n in names}
    for s in range(3 if quick else 5):
        out[f"generated-{s}"] = generated(100 + s)
    return out


def _jpeg_turn(rgb: np.ndarray) -> np.ndarray:
    return stress.jpeg(stress.rotate_crop(rgb, 7.0), 60)


def fingerprint_section(pics: dict[str, np.ndarray]) -> dict:
    """Fingerprint distances: unrelated pairs and genuine copies (the same pictures and battery)."""
    prints = {k: perceptual_fingerprint(to_luma(v)) for k, v in pics.items()}
    null = [fingerprint_distance(prints[a], prints[b]) for a in prints for b in prints if a < b]
    for k, v in pics.items():      # the exhibit after JPEG 60 + turn 7 against every other work
        f = perceptual_fingerprint(to_luma(_jpeg_turn(v)))
        null += [fingerprint_distance(f, prints[b]) for b in prints if b != k]
    genuine = []
    for k, rgb in pics.items():
        for att in stress.battery():
            if att.name != "none":
                genuine.append(fingerprint_distance(perceptual_fingerprint(to_luma(att.apply(rgb))),
                                                    prints[k]))
    return {"statistic": "claimkit.mark.fingerprint.fingerprint_distance (bits of 128)",
            "null": {"count": len(null), "samples": sorted(int(v) for v in null),
                     "what": "pairs of distinct calibration pictures, as is and the exhibit "
                             "after JPEG 60 + turn 7"},
            "genuine": {"count": len(genuine), "samples": sorted(int(v) for v in genuine),
                        "what": "every attack of claimkit.stress.battery() on each picture"}}


def _small(rgb: np.ndarray) -> np.ndarray:
    """A web-sized copy (15 % of the width, JPEG 85): the reduced-reference reading's null."""
    return stress.downscale_jpeg(rgb, 0.15)


#: ``--reduced``: the null over every other calibration picture (as exhibits and as works),
#: the genuine battery on these pictures: the two whose copies fell below the threshold in
#: the last full run (grass, generated-1), the first photo and the largest (retina).
REDUCED_GENUINE = ("rocket", "retina", "grass", "generated-1")


def reduced_null_pictures(quick: bool) -> list[str]:
    return list(calibration_pictures(quick))[::2]


def _null_one(args: tuple[str, bool, list[str] | None]) -> dict:
    """Picture ``k`` as the exhibit against every other work (of ``among``), and its halves."""
    k, quick, among = args
    pics = calibration_pictures(quick)
    v = pics[k]
    refs = [reg.features(to_luma(rv)) for r, rv in pics.items()
            if r != k and (among is None or r in among)]
    unrelated = []
    for img in (v, _jpeg_turn(v), _small(v)):
        lu = to_luma(img)
        e, em = reg.features(lu), reg.features(lu, mirrored=True)
        unrelated += [reg.register(rf, e, em)["inliers"] for rf in refs]
    lu = to_luma(v)
    return {"picture": k, "unrelated": unrelated, **_halves(k, lu),
            "self_check": assess.self_check(lu)}


#: Halves whose pixels correlate above this once one is mirrored show one content twice
#: (a mirror-symmetric drawing): a mirrored copy, not another work of the owner.
MIRROR_IMAGE_CORRELATION = 0.9


def _halves(k: str, lu: np.ndarray) -> dict:
    """The non-overlapping left and right parts of a picture: the owner's other frame."""
    w = lu.shape[1]
    left, right = lu[:, : int(0.45 * w)], lu[:, int(0.55 * w):]
    if min(left.shape) < 32:
        return {"same_owner": [], "mirror_image": []}
    n = min(left.shape[1], right.shape[1])
    corr = float(np.corrcoef(left[:, :n].ravel(), right[:, ::-1][:, :n].ravel())[0, 1])
    inl = reg.register(reg.features(left), reg.features(right),
                       reg.features(right, mirrored=True))["inliers"]
    if corr > MIRROR_IMAGE_CORRELATION:
        return {"same_owner": [], "mirror_image": [{"picture": k, "inliers": int(inl),
                                                    "mirrored_correlation": round(corr, 3)}]}
    return {"same_owner": [inl], "mirror_image": []}


def reclassify(path: str, quick: bool) -> None:
    """Apply the mirror-image rule to a file measured before the rule existed.

    Only the same-owner halves are measured again (a minute); each set-aside
    pair's count is taken out of the pooled null once, and the threshold and
    the genuine rows below it follow from the stored numbers.
    """
    doc = json.loads(Path(path).read_text())
    pics = calibration_pictures(quick)
    moved = [m for k, v in pics.items() for m in _halves(k, to_luma(v))["mirror_image"]]
    null = list(doc["null"]["samples"])
    for m in moved:
        null.remove(m["inliers"])
    old = doc["threshold"]
    threshold = _threshold(np.array(null))
    doc["null"].update(count=len(null), samples=sorted(null),
                       same_owner_pairs=doc["null"]["same_owner_pairs"] - len(moved))
    doc["mirror_image_halves"] = _mirror_note(moved)
    doc["threshold"] = threshold
    doc["genuine_below_threshold"] = [r for r in doc["genuine_below_threshold"]
                                      if r["inliers"] < threshold]
    doc["geometry_error_when_matched"]["over"] = (
        f"genuine copies with at least {old} inliers (the measuring run kept no other rows)")
    doc["measured"]["reclassified"] = (
        f"benchmarks/bench_content.py --reclassify: {len(moved)} same-owner pairs moved to "
        f"mirror_image_halves; threshold {old} -> {threshold}")
    Path(path).write_text(json.dumps(doc, indent=1, sort_keys=True) + "\n")
    print(f"moved {moved}; threshold {old} -> {threshold}")


def _mirror_note(moved: list[dict]) -> dict:
    return {"pairs": moved,
            "why": "left and right parts whose pixels correlate above "
                   f"{MIRROR_IMAGE_CORRELATION} once one is mirrored show one content twice "
                   "(a mirror-symmetric drawing): the content line rightly reads a mirrored "
                   "copy, so they are not in the null of other works"}


def _threshold(null: np.ndarray) -> int:
    # Half as much again as the largest count any unrelated or same-owner pair reached, and
    # at least 8, so that the best chance alignment seen falls clearly short.
    return int(max(8, np.ceil(1.5 * int(null.max()) + 0.5)))


def _half_reference(rgb: np.ndarray) -> np.ndarray:
    """The genuine battery's half-size reference of a picture (Pillow's Lanczos), as luma."""
    return to_luma(np.asarray(Image.fromarray(rgb).resize(
        (max(16, rgb.shape[1] // 2), max(16, rgb.shape[0] // 2)), Image.Resampling.LANCZOS)))


def _genuine_one(args: tuple[str, bool]) -> list[dict]:
    """Every genuine attack on picture ``k``, against the picture and a half-size reference."""
    k, quick = args
    rgb = calibration_pictures(quick)[k]
    half = _half_reference(rgb)
    refs = {"full": reg.features(to_luma(rgb)), "half": reg.features(half, registered_scale=0.5)}
    rows = []
    for att in genuine_attacks(quick):
        out = att.apply(rgb)
        lu = to_luma(out)
        if min(lu.shape) < 16:
            continue
        e, em = reg.features(lu), reg.features(lu, mirrored=True)
        truth = att.truth(rgb.shape[:2], out.shape[:2])
        for rname, rf in refs.items():
            res = reg.register(rf, e, em)
            g = res.get("geometry") or {}
            rows.append({"picture": k, "attack": att.name, "reference": rname,
                         "inliers": res["inliers"],
                         "rotation_error_deg": None if not g else round(
                             abs((g["rotation_deg"] - truth["rotation_deg"] + 180) % 360 - 180), 3),
                         "scale_ratio": None if not g or att.aspect != 1.0 else round(
                             g["scale"] * (0.5 if rname == "half" else 1.0) / truth["scale"], 4),
                         "flipped_right": None if not g else g["flipped"] == truth["flipped"]})
    return rows


def measure(quick: bool, reduced: bool = False) -> tuple[dict, dict]:
    """Null and genuine measurements, one task per picture over two processes (two cores)."""
    t0 = time.perf_counter()
    pics = calibration_pictures(quick)
    photos, made = (4, 1) if quick else (GENUINE_PHOTOS, GENUINE_GENERATED)
    names = [k for k in pics if not k.startswith("generated")][:photos] + \
        [k for k in pics if k.startswith("generated")][:made]
    among = reduced_null_pictures(quick) if reduced else None
    if reduced:
        names = list(REDUCED_GENUINE)
    with ProcessPoolExecutor(2) as pool:
        gen_futs = [pool.submit(_genuine_one, (k, quick)) for k in names]
        null_parts = []
        for part in pool.map(_null_one, [(k, quick, among) for k in (among or pics)]):
            null_parts.append(part)
            print(f"null {part['picture']}: max {max(part['unrelated'])} "
                  f"({time.perf_counter() - t0:.0f} s)", flush=True)
        rows = [r for f in gen_futs for r in f.result()]
    print(f"genuine: {len(rows)} rows ({time.perf_counter() - t0:.0f} s)", flush=True)
    left_s, right_s, _ = data.stereo_motorcycle()
    sl, sr = to_luma(_rgb(left_s)), to_luma(_rgb(right_s))
    stereo = reg.register(reg.features(sl), reg.features(sr), reg.features(sr, mirrored=True))
    nul = {"unrelated": [v for p in null_parts for v in p["unrelated"]],
           "same_owner": [v for p in null_parts for v in p["same_owner"]],
           "mirror_image": [m for p in null_parts for m in p["mirror_image"]],
           "self_check": {p["picture"]: p["self_check"] for p in null_parts},
           "stereo": int(stereo["inliers"]), "pictures": sorted(among or pics)}
    return nul, {"rows": rows, "pictures": names}


#: Linear maps (reference -> exhibit) at which unrelated pairs are compared by broad structure:
#: a transplant carries the mark at whatever geometry the forger chose; these span a
#: copy at full size, halved, turned and shrunk, mirrored, and a web-sized copy.
BROAD_NULL_MAPS = {"as is": np.eye(2), "half": 0.5 * np.eye(2),
                   "turn 7, scale 0.8": 0.8 * np.array([[np.cos(np.radians(7)), np.sin(np.radians(7))],
                                                        [-np.sin(np.radians(7)), np.cos(np.radians(7))]]),
                   "mirrored": np.diag([-1.0, 1.0]), "15 %": 0.15 * np.eye(2)}
#: The mark's geometry is trusted to these (the stress battery's tolerance): each genuine copy
#: is compared at its true geometry and at each corner of this box, and the lowest kept.
MARK_ROTATION_TOLERANCE_DEG = 0.5
MARK_SCALE_TOLERANCE = 0.02


def truth_linear(truth: dict, rotation_error: float = 0.0, scale_error: float = 1.0) -> np.ndarray:
    """The 2 x 2 map (x, y; y down) of an attack's true geometry, with errors added."""
    th = np.radians(truth["rotation_deg"] + rotation_error)
    rot = np.array([[np.cos(th), np.sin(th)], [-np.sin(th), np.cos(th)]])
    s = truth["scale"] * scale_error
    sx, sy = s * np.sqrt(truth["aspect"]), s / np.sqrt(truth["aspect"])
    return rot @ np.diag([-sx if truth["flipped"] else sx, sy])


def _broad_one(args: tuple[str, bool]) -> dict:
    """Broad structure: picture ``k`` against every other work, and its genuine copies."""
    k, quick = args
    pics = calibration_pictures(quick)
    lu = to_luma(pics[k])
    null = []
    for r, rv in pics.items():
        if r == k:
            continue
        rl = to_luma(rv)
        for how, lin in BROAD_NULL_MAPS.items():
            v = broad.broad_correlation(rl, lu, lin)["value"]
            null.append({"work": r, "exhibit": k, "map": how, "value": v})
    genuine = []
    for att in genuine_attacks(quick):
        out = att.apply(pics[k])
        if min(out.shape[:2]) < 16:
            continue
        el = to_luma(out)
        truth = att.truth(pics[k].shape[:2], out.shape[:2])
        vals = [broad.broad_correlation(lu, el, truth_linear(truth, dr, ds))["value"]
                for dr in (0.0, -MARK_ROTATION_TOLERANCE_DEG, MARK_ROTATION_TOLERANCE_DEG)
                for ds in (1.0, 1 - MARK_SCALE_TOLERANCE, 1 + MARK_SCALE_TOLERANCE)]
        known = [v for v in vals if v is not None]
        genuine.append({"picture": k, "attack": att.name,
                        "value": min(known) if known else None,
                        "at_true_geometry": vals[0]})
    return {"null": null, "genuine": genuine}


def _per_picture(one, quick: bool) -> tuple[list[dict], list[dict]]:
    """``one`` run for every calibration picture on two processes: its null and genuine rows."""
    with ProcessPoolExecutor(2) as pool:
        parts = list(pool.map(one, [(k, quick) for k in calibration_pictures(quick)]))
    return [r for p in parts for r in p["null"]], [r for p in parts for r in p["genuine"]]


def _known(rows: list[dict]) -> list[float]:
    """The rows' values where they were comparable (not None), in increasing order."""
    return sorted(r["value"] for r in rows if r["value"] is not None)


def _distribution(rows: list[dict], extreme: str | None = None, n: int = 8) -> dict:
    """How a statistic spread over ``rows`` (``value`` None where not comparable): the count,
    the values to four decimals, how many were not comparable, and the ``n`` rows with the
    ``extreme`` ("lowest" or "highest") values where one is asked for."""
    known = _known(rows)
    out = {"count": len(known), "samples": [round(v, 4) for v in known],
           "not_comparable": len(rows) - len(known)}
    if extreme is not None:
        sign = -1 if extreme == "highest" else 1
        out[extreme] = sorted((r for r in rows if r["value"] is not None),
                              key=lambda r: sign * r["value"])[:n]
    return out


def broad_section(quick: bool) -> dict:
    """The broad-structure statistic's distributions and the refuting threshold."""
    t0 = time.perf_counter()
    null, gen = _per_picture(_broad_one, quick)
    gv, nv = _known(gen), _known(null)
    below = broad_threshold(gv)
    return {
        "statistic": "highest masked normalised cross-correlation of the broad layouts over "
                     "translations, at a given turn, scale and mirroring "
                     "(claimkit.content.broad.broad_correlation)",
        "settings": {"side_px": broad.BROAD_SIDE, "smooth_px": broad.SMOOTH,
                     "min_overlap": broad.MIN_OVERLAP, "min_pixels": broad.MIN_PIXELS},
        "refute_below": below,
        "refute_rule": "half the lowest value any genuine copy reached, each copy compared at its "
                       "true geometry and at every corner of the mark's tolerance "
                       f"({MARK_ROTATION_TOLERANCE_DEG} degrees, {MARK_SCALE_TOLERANCE:.0%} "
                       "in scale) and the lowest of these kept",
        "genuine": {**_distribution(gen, "lowest"),
                    "what": "every attack of the calibration's genuine battery on every "
                            "calibration picture"},
        "null": {**_distribution(null),
                 "below_refute": sum(1 for v in nv if v < below),
                 "maps": sorted(BROAD_NULL_MAPS),
                 "what": "ordered pairs of distinct calibration pictures, the exhibit placed by "
                         "each of the maps (the translation searched)"},
        "seconds": round(time.perf_counter() - t0),
    }


def broad_threshold(genuine: list[float]) -> float:
    # Half the lowest genuine value: a copy that keeps a quarter of the picture, compressed,
    # blurred or toned, stayed far above it, and the margin covers pictures unlike these.
    return round(0.5 * min(genuine), 3)


def _coarse_one(args: tuple[str, bool]) -> dict:
    """The coarse reading (``register.register_coarse``) on the null pairs and genuine rows of
    picture ``k``: the same pairs as :func:`_null_one` and the same rows as :func:`_genuine_one`."""
    k, quick = args
    pics = calibration_pictures(quick)
    v = pics[k]
    refs = [to_luma(rv) for r, rv in pics.items() if r != k]
    unrelated = [reg.register_coarse(rl, to_luma(img))["inliers"]
                 for img in (v, _jpeg_turn(v), _small(v)) for rl in refs]
    lu = to_luma(v)
    w = lu.shape[1]
    left, right = lu[:, : int(0.45 * w)], lu[:, int(0.55 * w):]
    same_owner = []
    if min(left.shape) >= 32:
        n = min(left.shape[1], right.shape[1])
        corr = float(np.corrcoef(left[:, :n].ravel(), right[:, ::-1][:, :n].ravel())[0, 1])
        if corr <= MIRROR_IMAGE_CORRELATION:
            same_owner.append(reg.register_coarse(left, right)["inliers"])
    # The mark itself must not make the coarse reading match: picture k marked, its whole
    # fine-detail residual (the strongest copy attack, numpy only) added to every other picture.
    marked = mark(v)
    transplanted = [reg.register_coarse(to_luma(marked),
                                        to_luma(transplant_mark(marked, rv, tile=None)))["inliers"]
                    for r, rv in pics.items() if r != k]
    return {"picture": k, "unrelated": unrelated, "same_owner": same_owner,
            "transplanted": transplanted}


def _faint_one(args: tuple[str, bool]) -> dict:
    """The faint share (``broad.faint_share``): picture ``k`` against every other work placed by
    each of :data:`BROAD_NULL_MAPS`, and every copy of ``k`` marked on which the mark is found,
    placed by the mark's own reading of its geometry (the check runs only there)."""
    k, quick = args
    pics = calibration_pictures(quick)
    lu = to_luma(pics[k])
    null = [{"work": r, "exhibit": k, "map": how,
             "value": broad.faint_share(to_luma(rv), lu, lin)["value"]}
            for r, rv in pics.items() if r != k for how, lin in BROAD_NULL_MAPS.items()]
    pub = mark(pics[k], SEED, payload())
    ref = to_luma(pub)
    genuine = []
    for att in faint_attacks():
        copy = att.apply(pub)
        row: dict = {"picture": k, "attack": att.name, "mark_found": False, "value": None}
        if min(copy.shape[:2]) >= detect.MIN_SIDE:
            f = scales.examine(to_luma(copy), SEED, payload_check=expected_payload_check(payload()),
                               payload_space=payload_mod.PAYLOAD_SPACE)
            if f.detected and f.payload_valid:
                g = scales.relative_to_original(f.geometry, pub.shape[:2])
                row.update(mark_found=True, value=broad.faint_share(ref, to_luma(copy),
                                                                    g["matrix"])["value"])
        genuine.append(row)
    return {"null": null, "genuine": genuine}


def faint_attacks() -> list[stress.Attack]:
    """Every attack of the stress battery (signal and geometric) and an enlargement to 200 %."""
    out = [a for a in stress.battery() if a.name != "none"]
    out.append(stress.Attack("resize 2", "resize", {"factor": 2.0},
                             lambda p: stress.resize(p, 2.0), scale=2.0))
    return out


def faint_threshold(genuine: list[float]) -> float:
    # The project's margin: twice the highest share a genuine copy reached, and at least one
    # half (a picture that is not the work shows most of the work's strong contrast faint).
    return round(max(0.5, 2.0 * max(genuine)), 3)


def faint_section(quick: bool) -> dict:
    """The faint share's distributions and its refuting limit, on the population it runs on."""
    t0 = time.perf_counter()
    null, gen = _per_picture(_faint_one, quick)
    found = [r for r in gen if r["mark_found"]]
    gv, nv = _known(found), _known(null)
    above = faint_threshold(gv)
    return {
        "statistic": "lowest share, over the shifts, of the work's strong-contrast windows under "
                     "the exhibit where the exhibit is faint, at a given turn, scale and mirroring "
                     "(claimkit.content.broad.faint_share)",
        "settings": {"side_px": broad.CONTRAST_SIDE, "window_px": broad.CONTRAST_WINDOW,
                     "strong_grey_levels": round(broad.STRONG_CONTRAST * 255, 1),
                     "faint_grey_levels": round(broad.FAINT_CONTRAST * 255, 1),
                     "min_strong_windows": broad.MIN_STRONG,
                     "min_overlap": broad.FALLBACK_OVERLAP},
        "refute_above": above,
        "refute_rule": "twice the highest share any genuine copy on which the mark was found "
                       "reached, placed by the mark's own geometry, and at least 0.5",
        "genuine": {**_distribution(found, "highest", 5),
                    "copies": len(gen), "mark_found": len(found),
                    "what": "the population the check runs on: each calibration picture marked "
                            "(tests/engine_helpers.mark), every attack of "
                            "claimkit.stress.battery() and an enlargement to 200 %; the copies "
                            "on which the mark examination (claimkit.mark.scales.examine) found "
                            "the mark with the right payload, each placed by the geometry the "
                            "mark read (the check runs only where the mark was found, and with "
                            "that geometry); not comparable: some placement puts too few of the "
                            "work's strong windows under the copy, where nothing is said"},
        "null": {**_distribution(null),
                 "above_refute": sum(1 for v in nv if v > above),
                 "maps": sorted(BROAD_NULL_MAPS),
                 "what": "ordered pairs of distinct calibration pictures, the exhibit placed by "
                         "each of the maps (the translation searched)"},
        "measured": {"by": "benchmarks/bench_content.py --faint-only"
                     + (" --quick" if quick else ""),
                     "software": f"claimkit {__version__}", "skimage": skimage.__version__,
                     "seconds": round(time.perf_counter() - t0)},
    }


def smooth_pictures(quick: bool) -> dict[str, np.ndarray]:
    """Smooth and flat pictures for the dense reading's null, seeds the held-out set does not use:
    soft textures, blobs, a dusk ramp, a vertical colour gradient, a grey ramp and a vignette
    (the last three with faint noise, as a sensor leaves)."""
    rng = np.random.default_rng(51)
    y, x = np.mgrid[0:480, 0:640] / 640.0
    grey_ramp = 40 + 250 * (0.7 * x + 0.3 * y)
    vignette = 200 - 300 * ((x - 0.5) ** 2 + (y - 0.375) ** 2)
    made = {"gradient": np.stack([90 + 160 * y, 120 + 100 * y, 200 + 50 * y], -1),
            "grey ramp": np.stack([grey_ramp] * 3, -1), "vignette": np.stack([vignette] * 3, -1)}
    out = {"soft-21": soft(21), "soft-22": soft(22), "blobs-31": blobs(31), "dusk-41": dusk(41)}
    if not quick:
        out.update({"soft-23": soft(23, 400, 600), "blobs-32": blobs(32)})
    for k, v in made.items():
        out[k] = np.clip(v + rng.normal(0, 1.5, v.shape), 0, 255).astype(np.uint8)
    return out


#: Pictures whose genuine copies the dense reading is measured on (soft and smooth ones first:
#: those the keypoint readings cannot decide).
DENSE_GENUINE = ("soft-21", "soft-22", "blobs-31", "generated-0", "rocket", "moon")


def _dense_pictures(quick: bool) -> dict[str, np.ndarray]:
    return {**calibration_pictures(quick), **smooth_pictures(quick)}


def _dense_null_one(args: tuple[str, bool]) -> list[dict]:
    """Picture ``k`` as the exhibit against every other work, as is and as a 25 % crop (the crop
    against the smooth and generated works), and its right part against its left part."""
    k, quick = args
    pics = _dense_pictures(quick)
    smooth = set(smooth_pictures(quick)) | {n for n in pics if n.startswith("generated")}
    lu = to_luma(pics[k])
    crop = to_luma(stress.crop_fraction(pics[k], 0.25))
    rows = []
    for r, rv in pics.items():
        if r == k:
            continue
        rl = to_luma(rv)
        for how, ex in (("as is", lu), ("crop 25 %", crop)):
            if how == "as is" or r in smooth:
                rows.append({"work": r, "exhibit": k, "how": how,
                             "value": dense.dense_register(rl, ex)["value"]})
    w = lu.shape[1]
    left, right = lu[:, : int(0.45 * w)], lu[:, int(0.55 * w):]
    n = min(left.shape[1], right.shape[1])
    corr = float(np.corrcoef(left[:, :n].ravel(), right[:, ::-1][:, :n].ravel())[0, 1])
    if corr <= MIRROR_IMAGE_CORRELATION:
        rows.append({"work": f"{k} (left part)", "exhibit": f"{k} (right part)", "how": "same owner",
                     "value": dense.dense_register(left, right)["value"]})
    return rows


def _dense_genuine_one(args: tuple[str, bool]) -> list[dict]:
    """Every attack of the stress battery (and an enlargement) on picture ``k`` marked."""
    k, quick = args
    pub = mark(_dense_pictures(quick)[k])
    ref = to_luma(pub)
    rows = []
    for att in faint_attacks():
        copy = att.apply(pub)
        if min(copy.shape[:2]) < 16:
            continue
        res = dense.dense_register(ref, to_luma(copy))
        truth = att.truth(pub.shape[:2], copy.shape[:2])
        g = res.get("geometry") or {}
        rows.append({"picture": k, "attack": att.name, "value": res["value"],
                     "rotation_error_deg": None if not g else round(
                         abs((g["rotation_deg"] - truth["rotation_deg"] + 180) % 360 - 180), 2),
                     "scale_ratio": None if not g or truth.get("scale") is None else round(
                         g["scale"] / truth["scale"], 4),
                     "flipped_right": None if not g else g["flipped"] == truth["flipped"]})
    return rows


def dense_threshold(null: list[float]) -> float:
    # Halfway from the highest value any unrelated or same-owner pair reached to 1 (a copy
    # registers near 1): the best chance placement of the search falls well short.
    return round((1.0 + max(null)) / 2.0, 3)


def dense_section(quick: bool) -> dict:
    """The dense reading's null (every hypothesis of its search counted: the statistic is the
    search's own maximum), its genuine samples, and its threshold."""
    t0 = time.perf_counter()
    pics = _dense_pictures(quick)
    genuine_names = [k for k in DENSE_GENUINE if k in pics]
    with ProcessPoolExecutor(2) as pool:
        null_futs = [pool.submit(_dense_null_one, (k, quick)) for k in pics]
        gen_futs = [pool.submit(_dense_genuine_one, (k, quick)) for k in genuine_names]
        null = []
        for f in null_futs:
            part = f.result()
            null += part
            known = [r["value"] for r in part if r["value"] is not None]
            print(f"dense null {part[0]['exhibit']}: {len(known)} of {len(part)} comparable, "
                  f"max {max(known, default=None)} ({time.perf_counter() - t0:.0f} s)", flush=True)
        gen = [r for f in gen_futs for r in f.result()]
    nv = _known(null)
    threshold = dense_threshold(nv)
    reached = [r for r in gen if r["value"] is not None and r["value"] >= threshold]
    rot = [r["rotation_error_deg"] for r in reached if r["rotation_error_deg"] is not None]
    sc = [abs(r["scale_ratio"] - 1) for r in reached if r["scale_ratio"] is not None]
    return {
        "statistic": "highest masked normalised cross-correlation of the broad layouts' gradients "
                     "over every turn, scale, mirroring and shift searched "
                     "(claimkit.content.dense.dense_register)",
        "settings": {"grids_px": [dense.COARSE_GRID, dense.FINE_GRID], "smooth": dense.SMOOTH,
                     "coarse_step_deg": dense.COARSE_STEP_DEG, "scale_step": dense.SCALE_STEP,
                     "area_range": [dense.MIN_AREA, dense.MAX_AREA], "inside": dense.INSIDE,
                     "keep": dense.KEEP, "min_structure": dense.MIN_STRUCTURE},
        "threshold": threshold,
        "threshold_rule": "halfway from the highest value any unrelated or same-owner pair "
                          "reached to 1",
        "null": {**_distribution(null, "highest"),
                 "what": "ordered pairs of distinct pictures (the calibration pictures and "
                         f"smooth ones: {', '.join(smooth_pictures(quick))}), the exhibit as is, "
                         "and as a 25 % crop against the smooth and generated works; and each "
                         "picture's right part against its left part (the same owner's other "
                         "frame); not comparable: a picture with less structure than the "
                         "reading needs, where it says nothing"},
        "genuine": {**_distribution(gen, "lowest"), "reaching": len(reached),
                    "what": "every attack of claimkit.stress.battery() and an enlargement to "
                            f"200 % on {', '.join(genuine_names)}, each marked "
                            "(tests/engine_helpers.mark), against the marked picture"},
        "geometry_error_when_reached": {
            "rotation_deg_max": max(rot, default=None),
            "scale_relative_max": round(max(sc), 4) if sc else None,
            "flip_wrong": sum(1 for r in reached if r["flipped_right"] is False)},
        "measured": {"by": "benchmarks/bench_content.py --dense-only" + (" --quick" if quick else ""),
                     "software": f"claimkit {__version__}", "skimage": skimage.__version__,
                     "seconds": round(time.perf_counter() - t0)},
    }


def _coarse_genuine_one(args: tuple[str, bool]) -> list[dict]:
    k, quick = args
    rgb = calibration_pictures(quick)[k]
    half = _half_reference(rgb)
    refs = {"full": (to_luma(rgb), 1.0), "half": (half, 0.5)}
    rows = []
    for att in genuine_attacks(quick):
        lu = to_luma(att.apply(rgb))
        if min(lu.shape) < 16:
            continue
        for rname, (rl, rs) in refs.items():
            rows.append({"picture": k, "attack": att.name, "reference": rname,
                         "inliers": reg.register_coarse(rl, lu, rs)["inliers"]})
    return rows


def either(doc: dict, coarse_threshold: int, coarse_null: list[int],
           coarse_of: dict[tuple[str, str, str], int]) -> dict:
    """Counts of the event the content line decides by: either reading at or above its threshold.

    Genuine rows below the fine threshold are listed with their names; every other row
    reached it. So the count of rows that either reading decides is exact; ``coarse_of``
    needs the coarse counts of those rows only.
    """
    below = {(r["picture"], r["attack"], r["reference"]) for r in doc["genuine_below_threshold"]}
    rescued = [{"picture": key[0], "attack": key[1], "reference": key[2],
                "coarse_inliers": coarse_of[key]}
               for key in sorted(below) if coarse_of.get(key, 0) >= coarse_threshold]
    fine_null_k = sum(1 for v in doc["null"]["samples"] if v >= int(doc["threshold"]))
    coarse_null_k = sum(1 for v in coarse_null if v >= coarse_threshold)
    gen_n = int(doc["genuine"]["count"])
    # Where the fine reading was measured on fewer pairs (--reduced), those pairs (a subset of
    # the coarse reading's) are the ones both readings measured; the bound counts every coarse one.
    n = min(len(coarse_null), int(doc["null"]["count"]))
    return {"what": "the event the content line decides by: the fine reading at or above its "
                    "threshold, or the coarse reading at or above its own",
            "null_count": n,
            "null_reaching_at_most": min(n, fine_null_k + coarse_null_k),
            "null_bound": "the sum of the pairs either reading took over its threshold (the "
                          "fine reading's samples are stored sorted, not by pair; the coarse "
                          "reading's over all its pairs)",
            "genuine_count": gen_n,
            "genuine_reaching": gen_n - len(below) + len(rescued),
            "genuine_rescued_by_coarse": rescued}


def _coarse_below(rows: list[dict], quick: bool) -> dict[tuple[str, str, str], int]:
    """The coarse reading's counts on the given genuine rows (picture, attack, reference)."""
    attacks = {a.name: a for a in genuine_attacks(quick)}
    pics = calibration_pictures(quick)
    out = {}
    for r in rows:
        rgb = pics[r["picture"]]
        full = r["reference"] == "full"
        ref = to_luma(rgb) if full else _half_reference(rgb)
        lu = to_luma(attacks[r["attack"]].apply(rgb))
        out[(r["picture"], r["attack"], r["reference"])] = reg.register_coarse(
            ref, lu, 1.0 if full else 0.5)["inliers"]
    return out


def coarse_section(doc: dict, quick: bool) -> dict:
    """The coarse reading's null and genuine samples, its threshold, and the counts of the event
    the content line decides by: either reading at or above its threshold."""
    t0 = time.perf_counter()
    pics = calibration_pictures(quick)
    photos, made = (4, 1) if quick else (GENUINE_PHOTOS, GENUINE_GENERATED)
    names = [k for k in pics if not k.startswith("generated")][:photos] + \
        [k for k in pics if k.startswith("generated")][:made]
    with ProcessPoolExecutor(2) as pool:
        gen_futs = [pool.submit(_coarse_genuine_one, (k, quick)) for k in names]
        parts = list(pool.map(_coarse_one, [(k, quick) for k in pics]))
        rows = [r for f in gen_futs for r in f.result()]
    unrelated = [v for p in parts for v in p["unrelated"]]
    same_owner = [v for p in parts for v in p["same_owner"]]
    transplanted = sorted(v for p in parts for v in p["transplanted"])
    null = np.array(sorted(unrelated + same_owner))
    threshold = max(_threshold(null), _threshold(np.array(transplanted)))
    coarse_of = {(r["picture"], r["attack"], r["reference"]): r["inliers"] for r in rows}
    return {
        "statistic": "RANSAC inliers of claimkit.content.register.register_coarse",
        "settings": {"side_px": reg.COARSE_SIDE, "keypoints": reg.KEYPOINTS,
                     "smooth_px": reg.COARSE_SMOOTH,
                     "smooth_rule": f"the larger of {reg.COARSE_SMOOTH} px at {reg.COARSE_SIDE} "
                                    f"and {reg.FINE_SMOOTH} px of the registered work",
                     "max_stretch_gain": reg.MAX_STRETCH_GAIN,
                     "residual_px": reg.RESIDUAL_PX, "ransac_trials": reg.RANSAC_TRIALS,
                     "ransac_seed": reg.RANSAC_SEED, "max_ratio": reg.MAX_RATIO},
        "threshold": threshold,
        "threshold_rule": "the fine reading's rule (1.5 times the largest null count, rounded "
                          "up, and at least 8) on the coarse reading's own null, and on the "
                          "transplanted marks",
        "transplanted": {"count": len(transplanted), "samples": transplanted,
                         "what": "each calibration picture marked (tests/engine_helpers.mark), "
                                 "its whole fine-detail residual added to every other picture "
                                 "(transplant_mark, tile=None), against the marked picture"},
        "null": {"count": int(null.size), "samples": [int(v) for v in null],
                 "unrelated_pairs": len(unrelated), "same_owner_pairs": len(same_owner),
                 "what": "the same pairs as the fine reading's null"},
        "genuine": {"count": len(rows), "samples": sorted(int(r["inliers"]) for r in rows),
                    "what": "the same rows as the fine reading's genuine battery"},
        "either": either(doc, threshold, [int(v) for v in null], coarse_of),
        "measured": {"by": "benchmarks/bench_content.py --coarse-only"
                     + (" --quick" if quick else ""),
                     "software": f"claimkit {__version__}", "skimage": skimage.__version__,
                     "seconds": round(time.perf_counter() - t0)},
    }


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--out", default=str(ROOT / "claimkit" / "content" / "calibration.json"))
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--fingerprint-only", action="store_true",
                    help="re-measure only the fingerprint distances, into the existing file")
    ap.add_argument("--broad-only", action="store_true",
                    help="measure only the broad-structure statistic, into the existing file")
    ap.add_argument("--faint-only", action="store_true",
                    help="measure only the faint share (broad.faint_share), into the existing file")
    ap.add_argument("--dense-only", action="store_true",
                    help="measure only the dense reading (content.dense), into the existing file")
    ap.add_argument("--coarse-only", action="store_true",
                    help="measure only the coarse reading, into the existing file")
    ap.add_argument("--reduced", action="store_true",
                    help="the null over every other picture and the genuine battery on "
                         "REDUCED_GENUINE only (stated in the file); the fingerprint section kept")
    ap.add_argument("--reclassify", action="store_true",
                    help="apply the mirror-image rule to the existing file (see reclassify)")
    args = ap.parse_args()
    if args.reclassify:
        reclassify(args.out, args.quick)
        return
    t0 = time.perf_counter()
    pics = calibration_pictures(args.quick)
    if args.broad_only:
        doc = json.loads(Path(args.out).read_text())
        doc["broad"] = broad_section(args.quick)
        Path(args.out).write_text(json.dumps(doc, indent=1, sort_keys=True) + "\n")
        b = doc["broad"]
        print(json.dumps({k: b[k] for k in ("refute_below", "seconds")}),
              "genuine", b["genuine"]["count"], "lowest", b["genuine"]["lowest"][:3],
              "null", b["null"]["count"], "below", b["null"]["below_refute"],
              "null max", b["null"]["samples"][-1] if b["null"]["samples"] else None)
        return
    if args.faint_only:
        doc = json.loads(Path(args.out).read_text())
        doc["faint"] = faint_section(args.quick)
        Path(args.out).write_text(json.dumps(doc, indent=1, sort_keys=True) + "\n")
        fa = doc["faint"]
        print(json.dumps({k: fa[k] for k in ("refute_above", "measured")}), "genuine",
              {k: fa["genuine"][k] for k in ("copies", "mark_found", "count", "highest")},
              "null", fa["null"]["count"], "above", fa["null"]["above_refute"])
        return
    if args.dense_only:
        doc = json.loads(Path(args.out).read_text())
        doc["dense"] = dense_section(args.quick)
        Path(args.out).write_text(json.dumps(doc, indent=1, sort_keys=True) + "\n")
        d = doc["dense"]
        print(json.dumps({k: d[k] for k in ("threshold", "geometry_error_when_reached",
                                            "measured")}), "null", d["null"]["count"],
              "highest", d["null"]["highest"][:3], "genuine", d["genuine"]["count"], "reaching",
              d["genuine"]["reaching"], "lowest", d["genuine"]["lowest"][:4])
        return
    if args.coarse_only:
        doc = json.loads(Path(args.out).read_text())
        doc["coarse"] = coarse_section(doc, args.quick)
        Path(args.out).write_text(json.dumps(doc, indent=1, sort_keys=True) + "\n")
        c = doc["coarse"]
        print(json.dumps({k: c[k] for k in ("threshold", "either", "measured")}, indent=1),
              "null max", c["null"]["samples"][-1], "genuine below",
              sum(1 for v in c["genuine"]["samples"] if v < c["threshold"]))
        return
    if args.fingerprint_only:
        doc = json.loads(Path(args.out).read_text())
        doc["fingerprint"] = fingerprint_section(pics)
        Path(args.out).write_text(json.dumps(doc, indent=1, sort_keys=True) + "\n")
        return
    nul, gen_part = measure(args.quick, args.reduced)
    unrelated, same_owner, rows = nul["unrelated"], nul["same_owner"], gen_part["rows"]
    genuine = [r["inliers"] for r in rows]
    stereo = {"inliers": nul["stereo"]}
    null = np.array(sorted(unrelated + same_owner))
    gen = np.array(sorted(genuine))
    threshold = _threshold(null)
    rot_err = [r["rotation_error_deg"] for r in rows if r["rotation_error_deg"] is not None
               and r["inliers"] >= threshold]
    sc_err = [abs(r["scale_ratio"] - 1) for r in rows if r["scale_ratio"] is not None
              and r["inliers"] >= threshold]
    doc = {
        "type": "claimkit/content-calibration/v1",
        "statistic": "RANSAC inliers of claimkit.content.register.register",
        "settings": {"work_side_px": reg.WORK_SIDE, "min_work_side_px": reg.MIN_WORK_SIDE,
                     "stretch_percentiles": list(reg.STRETCH_PERCENTILES),
                     "keypoints": reg.KEYPOINTS, "smooth_px": reg.FINE_SMOOTH,
                     "max_stretch_gain": reg.MAX_STRETCH_GAIN,
                     "residual_px": reg.RESIDUAL_PX, "ransac_trials": reg.RANSAC_TRIALS,
                     "ransac_seed": reg.RANSAC_SEED, "max_ratio": reg.MAX_RATIO},
        "threshold": threshold,
        "threshold_rule": "1.5 times the largest count reached by any unrelated or same-owner "
                          "pair (rounded up, strictly above it), and at least 8",
        "null": {"count": int(null.size), "samples": [int(v) for v in null],
                 "unrelated_pairs": len(unrelated), "same_owner_pairs": len(same_owner),
                 "what": "ordered pairs of distinct calibration pictures (the exhibit as is, "
                         "after JPEG 60 + turn 7, and as a 15 % web copy at JPEG 85), and the "
                         "non-overlapping left and right parts of each picture (the same "
                         "owner's other frame of a scene)"},
        "self_checks": {"what": "claimkit.content.assess.self_check of each calibration picture "
                                "(inliers against itself scaled to 70 % and turned 10 degrees); "
                                f"below {assess.ABLE_FACTOR} times the threshold the content "
                                "line cannot decide",
                        "inliers": nul["self_check"]},
        "genuine": {"count": int(gen.size), "samples": [int(v) for v in gen],
                    "what": "the short stress battery (claimkit.stress.battery(quick=True)), "
                            f"its signal edits ({', '.join(SIGNAL)}), web copies "
                            f"({', '.join(SIZES)}) and an enlargement (resize 2) on "
                            + ", ".join(gen_part["pictures"])
                            + ", against the picture and against a half-resolution reference"},
        "same_scene_second_view": {"pair": "skimage.data.stereo_motorcycle",
                                   "inliers": int(stereo["inliers"])},
        "geometry_error_when_matched": {
            "rotation_deg_p99": round(float(np.percentile(rot_err, 99)), 3) if rot_err else None,
            "rotation_deg_max": round(float(np.max(rot_err)), 3) if rot_err else None,
            "scale_relative_p99": round(float(np.percentile(sc_err, 99)), 4) if sc_err else None,
            "scale_relative_max": round(float(np.max(sc_err)), 4) if sc_err else None,
            "flip_wrong": sum(1 for r in rows if r["flipped_right"] is False
                              and r["inliers"] >= threshold)},
        "genuine_below_threshold": [r for r in rows if r["inliers"] < threshold],
        "mirror_image_halves": _mirror_note(nul["mirror_image"]),
        "pictures": nul["pictures"],
        "fingerprint": None if args.reduced else fingerprint_section(pics),
        "measured": {"software": f"claimkit {__version__}", "skimage": skimage.__version__,
                     "numpy": np.__version__, "python": platform.python_version(),
                     "by": "benchmarks/bench_content.py" + (" --quick" if args.quick else "")
                     + (" --reduced" if args.reduced else ""),
                     **({"reduced": "the null over every other calibration picture only "
                                    f"({', '.join(nul['pictures'])}), as exhibits and as works; "
                                    "the genuine battery on "
                                    f"{', '.join(REDUCED_GENUINE)} only; the fingerprint, broad "
                                    "and coarse sections kept from the full run (they do not "
                                    "read the fine reading)"} if args.reduced else {}),
                     "seconds": round(time.perf_counter() - t0)},
    }
    old = json.loads(Path(args.out).read_text()) if Path(args.out).exists() else {}
    keep = {"broad": "claimkit.content.broad", "coarse": "register.register_coarse",
            "faint": "claimkit.content.broad.faint_share", "fingerprint": "mark.fingerprint",
            "dense": "claimkit.content.dense"}
    for key in keep:
        # Neither reads the fine reading (broad.broad_correlation; the coarse reading has its
        # own keypoints at COARSE_SIDE): kept as measured; only the coarse section's counts of
        # the event either reading decides depend on the fine reading, and are counted again.
        if key in old and not args.quick and not doc.get(key):
            doc[key] = old[key]
    if "coarse" in doc:
        c = doc["coarse"]
        c["either"] = either(doc, int(c["threshold"]), [int(v) for v in c["null"]["samples"]],
                             _coarse_below(doc["genuine_below_threshold"], args.quick))
        c["either"]["counted"] = ("again by benchmarks/bench_content.py after the fine reading "
                                  "was measured; the coarse samples as measured by --coarse-only")
    Path(args.out).write_text(json.dumps(doc, indent=1, sort_keys=True) + "\n")
    print(json.dumps({k: doc[k] for k in ("threshold", "geometry_error_when_matched",
                                          "same_scene_second_view")}, indent=1))
    print(f"genuine: {gen.size}, below threshold {int((gen < threshold).sum())}; "
          f"null: {null.size}, at/above {int((null >= threshold).sum())}")
    print(f"wrote {args.out}", file=sys.stderr)


if __name__ == "__main__":
    main()
