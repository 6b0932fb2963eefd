"""The content line: transplanted marks are caught, genuine copies agree with the mark.

Held out from the calibration (benchmarks/bench_content.py): the pictures used
here (coffee, chelsea and the tests' sky are not in the calibration set).
"""
# ruff: noqa: F811 - the shared fixture is imported, then requested by name

from __future__ import annotations

import json
import shutil
import subprocess

import numpy as np
import pytest
from engine_helpers import mark, transplant_mark
from PIL import Image
from skimage import data
from test_case_fixtures import built_case  # noqa: F401 - the shared fixture

from claimkit import stress
from claimkit.case.store import open_case
from claimkit.cli import main
from claimkit.content.assess import (
    ROTATION_TOLERANCE_DEG,
    SCALE_TOLERANCE,
    calibration,
    content_line,
)
from claimkit.imageio import to_luma
from claimkit.mark import detect
from claimkit.mark.fingerprint import perceptual_fingerprint

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def published():
    coffee = data.coffee()
    big = np.asarray(Image.fromarray(coffee).resize((1200, 800), Image.Resampling.BICUBIC))
    return mark(big)


def test_calibration_is_measured_and_separates():
    cal = calibration()
    assert cal["measured"]["by"].startswith("benchmarks/bench_content.py")
    assert cal["null"]["count"] == len(cal["null"]["samples"]) >= 100
    assert max(cal["null"]["samples"]) < cal["threshold"]
    assert "coffee" not in cal["pictures"] and "chelsea" not in cal["pictures"]
    # the coarse reading: its own null over the same pairs, and the either-reading counts
    co = cal["coarse"]
    assert co["null"]["count"] == len(co["null"]["samples"]) >= cal["null"]["count"]
    assert co["either"]["null_count"] == cal["null"]["count"]   # the pairs both readings measured
    assert max(co["null"]["samples"]) < co["threshold"]
    assert co["either"]["null_reaching_at_most"] == 0
    assert co["either"]["genuine_reaching"] >= cal["genuine"]["count"] - len(
        cal["genuine_below_threshold"])
    assert max(co["transplanted"]["samples"]) < co["threshold"]
    # the faint share: measured where it runs (copies on which the mark was found), every
    # genuine value at most half the limit (the project's margin)
    fa = cal["faint"]
    assert fa["genuine"]["mark_found"] < fa["genuine"]["copies"]
    assert 2 * max(fa["genuine"]["samples"]) <= fa["refute_above"]
    assert fa["null"]["above_refute"] > 0


@pytest.mark.parametrize("host", ["chelsea", "rocket"])
def test_transplanted_mark_is_detected_but_the_picture_does_not_correspond(published, host):
    # The attacker's forgery (numpy only): the detector does find the owner's mark ...
    forged = transplant_mark(published, getattr(data, host)())
    found = detect.examine_luma(to_luma(forged), bytes(range(32)))
    assert found.detected
    # ... and the content line, which never reads the mark, says it is another picture.
    c = content_line(to_luma(forged), reference_luma=to_luma(published))
    assert c["corresponds"] is False and c["log10_lr"] < 0
    assert c["statistic"]["value"] <= max(calibration()["null"]["samples"])
    # Limited to the fingerprint (no reference picture): never "corresponds"; "does not" only
    # beyond every distance a genuine copy reached, else it says it cannot decide.
    f = content_line(to_luma(forged), work_fingerprint=perceptual_fingerprint(to_luma(published)))
    widest = max(calibration()["fingerprint"]["genuine"]["samples"])
    assert f["limited_to_fingerprint"] and f["corresponds"] is not True
    if f["statistic"]["value"] <= widest:
        assert f["corresponds"] is None and "cannot decide" in f["reason"]


def test_fingerprint_alone_never_flags_a_turned_genuine_copy(published):
    # A quarter turn moves the whole-picture fingerprint as far as another picture does: with
    # only the record's fingerprint the line must not call the genuine copy a mismatch.
    turned = stress.rotate_crop(published, 90)
    f = content_line(to_luma(turned), work_fingerprint=perceptual_fingerprint(to_luma(published)))
    assert f["statistic"]["value"] > f["statistic"]["threshold"]
    assert f["corresponds"] is None and f["log10_lr"] == 0.0


def test_packed_hamming_matcher_gives_scikit_images_pairs():
    # Reference: skimage.feature.match_descriptors (scikit-image 0.26), the same rule unpacked.
    from skimage.feature import match_descriptors

    from claimkit.content import register as reg

    a, b = to_luma(data.coffee()), to_luma(data.coffee()[40:300, 60:520])
    fa, fb, fr = reg.features(a), reg.features(b), reg.features(to_luma(data.rocket()))
    for d1, d2 in ((fb.descriptors, fa.descriptors), (fr.descriptors, fa.descriptors)):
        want = match_descriptors(d1, d2, metric="hamming", cross_check=True, max_ratio=reg.MAX_RATIO)
        assert np.array_equal(reg.match(d1, d2), want)


def test_transplant_from_a_featureless_work_is_still_flagged():
    # A sky registers to nothing, not even itself; the host photo does register to itself, and
    # a copy of a sky does not gain corners: the line says "does not correspond", and why.
    from engine_helpers import sky

    forged = transplant_mark(mark(sky()), data.rocket())
    c = content_line(to_luma(forged), reference_luma=to_luma(mark(sky())))
    assert c["corresponds"] is False and "lacks" in c["reason"]
    assert c["self_checks"]["work_inliers"] < c["self_checks"]["needed"] <= \
        c["self_checks"]["exhibit_inliers"]


def test_featureless_exhibit_cannot_decide_and_says_why(published):
    flat = np.clip(np.random.default_rng(3).normal(128, 2, (300, 400)), 0, 255)
    c = content_line(flat, reference_luma=to_luma(published))
    assert c["corresponds"] is None and "exhibit has too little usable structure" in c["reason"]


@pytest.mark.parametrize("name", ["jpeg 30", "rotate 17", "mirror", "crop 25 %", "resize 0.5",
                                  "downscale 10 % jpeg 85"])
def test_genuine_copy_corresponds_and_reads_the_true_geometry(published, name):
    attack = next(a for a in stress.battery() if a.name == name)
    copy = attack.apply(published)
    c = content_line(to_luma(copy), reference_luma=to_luma(published))
    assert c["corresponds"] and c["log10_lr"] > 1
    g = c["registration"]["geometry"]
    truth = attack.truth(published.shape[:2], copy.shape[:2])
    assert abs((g["rotation_deg"] - truth["rotation_deg"] + 180) % 360 - 180) <= ROTATION_TOLERANCE_DEG
    assert abs(g["scale"] / truth["scale"] - 1) <= SCALE_TOLERANCE
    assert g["flipped"] == truth["flipped"]


def test_case_findings_carry_both_lines(built_case):
    case = open_case(built_case.case)
    for e in ("exhibit-1", "exhibit-2"):
        f = case.finding(e)
        assert f["content_mismatch"] is False and f["content"]["corresponds"]
        assert f["content"]["agreement_with_mark"]["agree"]
        ev = f["evaluation"]
        assert ev["derivation_claimed"] and ev["log10_lr"]["combined"] is not None
        assert ev["propositions"]["Hp"].startswith(f"Exhibit {e.split('-')[1]} derives from work")
        assert f["alignment"]["how"] == "content line"
    forged = case.finding("exhibit-4")
    assert forged["result"]["detected"] and forged["result"]["work_id"] == built_case.work_id
    assert forged["content_mismatch"] is True
    ev = forged["evaluation"]
    assert not ev["derivation_claimed"] and ev["log10_lr"]["combined"] is None
    assert ev["reported_log10_lr"] < 0 and "transplanted" in ev["finding"]
    assert forged["alignment"]["aligned"] is False


def test_report_json_warnings_and_dossier_text(built_case, tmp_path, monkeypatch, capsys):
    if shutil.which("pdftotext") is None or shutil.which("pdfimages") is None:
        pytest.skip("poppler-utils not installed")
    work = tmp_path / "case"
    shutil.copytree(built_case.case, work)
    monkeypatch.setenv("CLAIMKIT_PASSPHRASE", "harwick-bay-casework-tests")
    assert main(["--home", str(built_case.home), "report", str(work), "--json"]) == 0
    rep = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
    codes = {(w["code"], w["exhibit"]) for w in rep["warnings"]}
    assert codes == {("content-mismatch", "exhibit-4"), ("registered-after-found", "exhibit-4")}
    assert all(set(w) == {"code", "exhibit", "text"} for w in rep["warnings"])
    assert rep["summary"]["derived"] == ["exhibit-1", "exhibit-2"]
    pdf = work / "report" / "dossier.pdf"
    # poppler's pdftotext reads the words as a reader's copy would.
    text = subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True, text=True,
                          check=True).stdout
    flat = " ".join(text.split())
    assert "Hp, Exhibit 1 derives from work" in flat and "Hd, Exhibit 1 derives from a picture" in flat
    assert "provide extremely strong support for the proposition that Exhibit 1 derives" in flat
    assert "consistent with a transplanted mark" in flat and "registered-after-found" in flat
    assert "ENFSI Guideline for Evaluative Reporting in Forensic Science (2015)" in flat
    assert "10^-12" in flat and "1e-12" not in flat and "(10^12)" not in flat
    assert "Figure 1." in flat and "Exhibit 4 as found" in flat
    page1 = subprocess.run(["pdftotext", "-f", "1", "-l", "1", str(pdf), "-"],
                           capture_output=True, text=True, check=True).stdout
    assert "Registered work" in page1 and "Exhibit 1 as found" in page1
    # poppler's pdfimages: page 1 holds the registered work and the first exhibit, in colour.
    rows = subprocess.run(["pdfimages", "-list", str(pdf)], capture_output=True, text=True,
                          check=True).stdout.splitlines()[2:]
    first = [r.split() for r in rows if r.split()[0] == "1"]
    assert len(first) >= 2 and all(r[5] == "rgb" for r in first)


def test_featureless_work_is_inconclusive_never_a_mismatch():
    # A clear sky gives no keypoints that repeat: a failure to register its copy says nothing,
    # so the genuine copy is not flagged, and no derivation is claimed either.
    from engine_helpers import sky

    from claimkit.evaluation.opinion import evaluate

    published = mark(sky())
    c = content_line(to_luma(stress.jpeg(published, 50)), reference_luma=to_luma(published))
    assert c["corresponds"] is None and c["log10_lr"] == 0.0 and "too little texture" in c["reason"]
    ev = evaluate(exhibit="Exhibit 1", work_id="W-1", owner=None, detected=True, threshold=1e-9,
                  content=c, agreement=None)
    assert not ev["derivation_claimed"] and ev["reported_log10_lr"] is None
    assert "cannot exclude a transplanted mark" in ev["combination"]


def test_masked_correlation_is_pearsons_over_the_shared_pixels():
    # Reference: numpy's corrcoef (Pearson's r) over the pixels both pictures cover, at shifts
    # where they overlap wholly and in part.
    from scipy import ndimage

    from claimkit.content.broad import masked_ncc

    rng = np.random.default_rng(5)
    fixed = ndimage.gaussian_filter(rng.normal(size=(30, 40)), 2)
    moving = ndimage.gaussian_filter(rng.normal(size=(12, 17)), 2)
    mask = np.ones_like(moving, bool)
    mask[0, :3] = False
    ncc, n = masked_ncc(fixed, np.ones_like(fixed, bool), moving, mask, min_overlap=20)
    rr, cc = np.nonzero(mask)
    for dy, dx in [(0, 0), (5, 9), (-4, 30), (25, -6)]:
        ok = (rr + dy >= 0) & (rr + dy < 30) & (cc + dx >= 0) & (cc + dx < 40)
        want = np.corrcoef(fixed[rr[ok] + dy, cc[ok] + dx], moving[rr[ok], cc[ok]])[0, 1]
        i, j = dy + moving.shape[0] - 1, dx + moving.shape[1] - 1
        assert n[i, j] == ok.sum() and ncc[i, j] == pytest.approx(want, abs=1e-9)


def _weigh_examined(copy: np.ndarray, reference: np.ndarray) -> dict:
    from claimkit.evaluation.lines import weigh

    f = detect.examine_luma(to_luma(copy), bytes(range(32)))
    assert f.detected
    return weigh(to_luma(copy), label="Exhibit 9", mark={"detected": True, "geometry": f.geometry,
                                                         "work_id": "W-1"},
                 threshold=1e-9, work_id="W-1", work_record=None, owner=None,
                 reference_luma=to_luma(reference))


def test_transplant_onto_a_cornerless_host_is_flagged_by_its_layout(published):
    # The attacker (numpy only) adds the mark to a soft, cornerless picture: the keypoints
    # cannot decide, but placed as the mark reads it the host shares none of the work's layout.
    from engine_helpers import soft

    w = _weigh_examined(transplant_mark(published, soft(0, *published.shape[:2])), published)
    c, ev = w["content"], w["evaluation"]
    assert c["corresponds"] is None and c["layout_with_mark"]["uses_mark_geometry"]
    assert c["layout_with_mark"]["refutes"] and w["content_mismatch"]
    assert not ev["derivation_claimed"] and ev["reported_log10_lr"] < 0
    assert ev["log10_lr"]["combined"] is None and "transplanted" in ev["finding"]


def test_genuine_sky_copy_keeps_its_layout_and_is_not_flagged():
    # A clear sky reduced to 70 %: no keypoints to decide by, the same broad layout at the
    # mark's geometry; not flagged, nothing derived, and no opinion given (the mark line's
    # assumption, that no mark was transplanted, could not be checked).
    from engine_helpers import sky

    pub = mark(sky())
    w = _weigh_examined(stress.resize(pub, 0.7), pub)
    assert w["content"]["corresponds"] is None
    lay = w["content"]["layout_with_mark"]
    assert lay["value"] > 0.95 and not lay["refutes"] and not w["content_mismatch"]
    assert not w["evaluation"]["derivation_claimed"] and w["evaluation"]["reported_log10_lr"] is None
    assert w["evaluation"]["verbal"].startswith("No opinion on the propositions is given")


def test_whole_residual_transplant_is_flagged_without_points_from_the_mark():
    # The strongest copy attack (numpy only): the marked file's whole fine-detail residual added
    # to a picture of soft colour and flat shapes. The work is a soft texture, so its residual
    # is mostly its mark: before the fine reading was smoothed, the lifted residual passed the
    # threshold (the points were the mark's); now it makes none, and the work's broad layout,
    # at the geometry the mark reads, is not the exhibit's: flagged, nothing derived.
    from engine_helpers import generated, soft

    work = mark(soft(5))
    w = _weigh_examined(transplant_mark(work, generated(998), tile=None), work)
    c = w["content"]
    assert c["statistic"]["value"] < c["statistic"]["threshold"] and not c["corresponds"]
    assert c["layout_with_mark"]["refutes"] and w["content_mismatch"]
    assert not w["evaluation"]["derivation_claimed"]


def test_transplant_onto_a_host_of_another_shape_is_placed_by_half_overlaps():
    # A 420 x 560 work and a 512 x 512 host: at the mark's scale neither lies 90 % inside the
    # other, so placements covering half the smaller picture are searched; the
    # host (scikit-image's binary blobs, smoothed) shares none of the work's layout there.
    from engine_helpers import generated
    from skimage import filters

    from claimkit.content.assess import layout_check

    blobs = data.binary_blobs(length=512, blob_size_fraction=0.2, volume_fraction=0.5, rng=4)
    grey = (60 + 120 * filters.gaussian(blobs.astype(float), sigma=12)).astype(np.uint8)
    work = mark(generated(990))
    forged = transplant_mark(work, np.stack([grey] * 3, -1))
    lay = layout_check(to_luma(work), to_luma(forged), np.eye(2), uses_mark_geometry=True)
    assert lay["min_overlap"] == 0.5 and "placements covering 50 %" in lay["reason"]
    assert lay["refutes"]


def test_local_contrast_is_the_window_standard_deviation():
    # Reference: numpy's standard deviation (ddof 0) over each 4 x 4 window, which
    # scipy.ndimage.uniform_filter of size 4 places at rows and columns i - 2 .. i + 1.
    from claimkit.content.broad import CONTRAST_WINDOW, _local_contrast

    a = np.random.default_rng(3).random((20, 24))
    got = _local_contrast(a, np.ones_like(a, bool))
    h = CONTRAST_WINDOW // 2
    for i, j in [(2, 2), (7, 11), (17, 21)]:
        assert got[i, j] == pytest.approx(np.std(a[i - h: i + h, j - h: j + h]), abs=1e-9)


def _ramp(h: int, w: int, seed: int = 4) -> np.ndarray:
    """A diagonal colour ramp with faint noise (numpy only): a broad layout and no edges."""
    y, x = np.mgrid[0:h, 0:w] / w
    ramp = 0.6 * x + 0.4 * y
    base = np.stack([70 + 90 * ramp, 60 + 60 * ramp, 120 - 40 * ramp], axis=-1)
    return np.clip(base + np.random.default_rng(seed).normal(0, 1.5, base.shape), 0, 255
                   ).astype(np.uint8)


def test_faint_share_tells_a_flat_picture_from_a_copy():
    # A work of strong edges (a ramp under a 16-px checkerboard of 40 grey levels), placed as it
    # is: a JPEG 50 copy (Pillow) keeps its contrast; the bare ramp, whose broad layout is the
    # work's (the checkerboard averages out at 64 px), shows it faint everywhere; a copy of a
    # plain part of a work says nothing (it could be a copy of that part).
    from claimkit.content.broad import broad_correlation, faint_share

    h, w = 300, 400
    yy, xx = np.mgrid[0:h, 0:w]
    ramp = to_luma(_ramp(h, w))
    work = ramp + 40 * (((yy // 16) + (xx // 16)) % 2) - 20
    rgb = np.stack([np.clip(work, 0, 255).astype(np.uint8)] * 3, -1)
    assert faint_share(work, to_luma(stress.jpeg(rgb, 50)), np.eye(2))["value"] < 0.05
    assert faint_share(work, ramp, np.eye(2))["value"] > 0.95
    assert broad_correlation(work, ramp, np.eye(2))["value"] > 0.9   # no help here
    half = work.copy()
    half[:, 200:] = ramp[:, 200:]
    assert faint_share(half, ramp[:, 220:], np.eye(2))["value"] is None


@pytest.fixture(scope="module")
def published_cat():
    chelsea = data.chelsea()
    return mark(np.asarray(Image.fromarray(chelsea).resize((902, 600), Image.Resampling.BICUBIC)))


def test_transplant_onto_a_ramp_is_flagged_by_its_faint_contrast(published_cat):
    # The attacker (numpy only) adds the mark to a colour ramp: no keypoints to decide by, and
    # the ramp's broad layout correlates with the work's well enough to pass the layout check;
    # placed as the mark reads it, the ramp is faint wherever the work has edges or fur.
    w = _weigh_examined(transplant_mark(published_cat, _ramp(450, 600, 3)), published_cat)
    c, ev = w["content"], w["evaluation"]
    lay = c["layout_with_mark"]
    assert c["corresponds"] is None and lay["value"] >= lay["refute_below"]
    assert lay["faint"]["value"] > lay["faint"]["refute_above"]
    assert lay["faint"]["refutes"] and lay["refutes"] and w["content_mismatch"]
    assert not ev["derivation_claimed"] and ev["reported_log10_lr"] < 0
    assert "the exhibit is faint" in ev["finding"] and "strong edges or texture" in ev["finding"]


@pytest.mark.parametrize("edit", ["blur 2", "contrast 0.6"])
def test_genuine_blurred_or_faded_copy_is_not_refuted_by_its_contrast(published_cat, edit):
    # A genuine copy placed by the mark's own reading keeps the work's strong contrast
    # (Pillow's Gaussian blur; the battery's contrast 0.6): far under the faint share's limit.
    from claimkit.content.assess import layout_check
    from claimkit.mark import scales

    copy = next(a for a in stress.battery() if a.name == edit).apply(published_cat)
    f = detect.examine_luma(to_luma(copy), bytes(range(32)))
    assert f.detected
    g = scales.relative_to_original(f.geometry, published_cat.shape[:2])
    lay = layout_check(to_luma(published_cat), to_luma(copy), np.asarray(g["matrix"]),
                       uses_mark_geometry=True)
    assert not lay["refutes"] and not lay["faint"]["refutes"]
    assert lay["faint"]["value"] < 0.5 * lay["faint"]["refute_above"]


def test_web_copy_corresponds_by_the_coarse_reading():
    # A 10 % web copy (the stress battery's Pillow Lanczos + JPEG 85) of scikit-image's Hubble
    # deep field against a half-size reference: too few corners repeat at 640 px (12, threshold
    # 13); at 128 px its structure registers, with the coarse reading's own threshold, at the
    # true geometry. This is the calibration's own row (calibration.json, coarse.either): the
    # count must be the one stored. (Until the coarse reading's stretch was capped, a soft
    # texture's JPEG 75 copy registered here too, on points the mark made: now 0.)
    rgb = data.hubble_deep_field()
    half = Image.fromarray(rgb).resize((rgb.shape[1] // 2, rgb.shape[0] // 2),
                                       Image.Resampling.LANCZOS)   # as bench_content.py makes it
    copy = next(a for a in stress.battery() if a.name == "downscale 10 % jpeg 85").apply(rgb)
    c = content_line(to_luma(copy), reference_luma=to_luma(np.asarray(half)), reference_scale=0.5)
    st = c["statistic"]
    assert st["reading"] == "coarse" and st["fine"]["value"] < st["fine"]["threshold"]
    assert st["value"] >= st["threshold"] == calibration()["coarse"]["threshold"]
    stored = {(r["picture"], r["attack"], r["reference"]): r["coarse_inliers"]
              for r in calibration()["coarse"]["either"]["genuine_rescued_by_coarse"]}
    assert stored[("hubble_deep_field", "downscale 10 % jpeg 85", "half")] == st["value"]
    assert c["corresponds"] is True and c["log10_lr"] > 0
    g = c["registration"]["geometry"]
    assert abs(g["rotation_deg"]) < ROTATION_TOLERANCE_DEG
    assert abs(g["scale"] / (copy.shape[1] / rgb.shape[1]) - 1) < SCALE_TOLERANCE


def test_coarse_reading_does_not_match_a_featureless_picture_on_its_mark():
    # A clear sky has no structure at 128 px; what survives of its mark there, stretched, would
    # make corners that a copy shares (the content line would then rest on the mark): the
    # smoothing before the stretch leaves the marked sky without keypoints.
    from engine_helpers import sky

    from claimkit.content import register as reg

    pub = mark(sky())
    assert len(reg.features(to_luma(pub), coarse=True).xy) == 0
    got = reg.register_coarse(to_luma(pub), to_luma(stress.jpeg(pub, 75)))
    assert got["inliers"] < calibration()["coarse"]["threshold"]


@pytest.mark.parametrize("reading,picture,edit", [
    ("fine", "sky", "jpeg 90"), ("fine", "sky", "rotate 17"), ("fine", "soft", "jpeg 90"),
    ("coarse", "soft", "jpeg 90"), ("coarse", "soft", "contrast 0.6"),
    ("coarse", "generated", "jpeg 90")])
def test_readings_are_not_carried_by_the_mark(reading, picture, edit):
    # A featureless picture (the tests' clear sky; a soft texture whose luma spans 9 grey
    # levels), and a generated picture with shapes, marked and not, against its copy
    # (Pillow's JPEG codec, Pillow's bicubic turn, claimkit.stress's contrast): the points each
    # reading counts must come from the picture, so the mark may not move the count by more
    # than a tenth of the threshold or of the count without it, nor change the decision.
    # Before the smoothing and the capped stretch, at 640 px: sky JPEG 90 112 points marked
    # and 0 unmarked, sky rotate 17 544 and 352, soft JPEG 90 101 and 6; at 128 px (smoothed
    # 1 px there, stretch not capped): soft JPEG 90 106 and 34, contrast 0.6 360 and 21.
    from engine_helpers import generated, sky, soft

    from claimkit.content import register as reg

    plain = {"sky": sky, "soft": lambda: soft(5), "generated": lambda: generated(100)}[picture]()
    apply = next(a for a in stress.battery() if a.name == edit).apply
    cal = calibration()
    threshold = cal["threshold"] if reading == "fine" else cal["coarse"]["threshold"]

    def points(pic):
        ref, copy = to_luma(pic), to_luma(apply(pic))
        if reading == "coarse":
            return reg.register_coarse(ref, copy)["inliers"]
        return reg.register(reg.features(ref), reg.features(copy),
                            reg.features(copy, mirrored=True))["inliers"]

    with_mark, without = points(mark(plain)), points(plain)
    assert abs(with_mark - without) <= max(0.1 * threshold, 0.1 * without)
    assert (with_mark >= threshold) == (without >= threshold)


def test_dense_reading_stays_below_the_band_of_the_mark():
    # The mark spreads about a grey level over every frequency of its 128-pixel tile; what the
    # dense reading's smoothing passes of it on a plain grey picture (the mark alone) must stay
    # under a third of the structure the reading needs, so that the mark can never be what it
    # reads. A clear sky (a gradient with sensor noise), marked, has less than the limit too:
    # the reading says nothing there (claimkit.content.dense.MIN_STRUCTURE).
    from engine_helpers import sky

    from claimkit.content import dense

    grey = np.full((480, 640, 3), 128, np.uint8)
    assert dense.structure(to_luma(grey)) < 1e-9
    assert dense.structure(to_luma(mark(grey))) < dense.MIN_STRUCTURE / 3
    assert dense.structure(to_luma(mark(sky()))) < dense.MIN_STRUCTURE
    assert dense.dense_register(to_luma(mark(sky())), to_luma(stress.jpeg(mark(sky()), 90)))[
        "value"] is None


def test_dense_reading_is_not_carried_by_the_mark():
    # A soft texture marked, against another soft texture carrying its whole fine-detail residual
    # (the copy attack's strongest form, numpy only: tests/engine_helpers.transplant_mark): the
    # dense reading must not correspond, and carrying the work's mark must not move it by more
    # than 0.02 from the same host without it. (Marking the work itself moves the search's
    # maximum by a tenth here, 0.42 to 0.52, on both hosts alike: which placements hold eight
    # patches shifts with any small change of the work; the mark the host carries adds nothing.)
    # And a genuine copy (Pillow's JPEG 90) reads the same marked and unmarked to within 0.02.
    from engine_helpers import soft

    from claimkit.content import dense

    threshold = calibration()["dense"]["threshold"]
    work, host = soft(5), soft(11)
    marked = mark(work)
    forged = dense.dense_register(to_luma(marked), to_luma(transplant_mark(marked, host, tile=None)))
    plain = dense.dense_register(to_luma(marked), to_luma(host))
    assert forged["value"] < threshold
    assert abs(forged["value"] - plain["value"]) <= 0.02
    copies = [dense.dense_register(to_luma(p), to_luma(stress.jpeg(p, 90)))["value"]
              for p in (marked, work)]
    assert abs(copies[0] - copies[1]) <= 0.02 and min(copies) >= threshold


def test_a_soft_texture_copy_corresponds_by_the_dense_reading():
    # A soft texture (smoothed noise, no corners: tests/engine_helpers.soft) marked, and its copy
    # turned 45 degrees by Pillow (bicubic, cropped to no border, a third of the picture left):
    # neither keypoint reading can use it once the mark is kept out of them, the dense reading
    # of the broad layouts registers it at the true turn and scale; a clear sky's copy stays
    # undecided, and the reason says that the dense reading had nothing to read either.
    from engine_helpers import sky, soft

    from claimkit.content.assess import agreement

    pub = mark(soft(5))
    att = next(a for a in stress.battery() if a.name == "rotate 45")
    copy = att.apply(pub)
    c = content_line(to_luma(copy), reference_luma=to_luma(pub))
    st = c["statistic"]
    assert st["reading"] == "dense" and c["corresponds"] is True
    assert st["keypoints"]["value"] < st["keypoints"]["threshold"]
    assert st["value"] >= st["threshold"] == calibration()["dense"]["threshold"]
    truth = att.truth(pub.shape[:2], copy.shape[:2])
    assert agreement(c, truth)["agree"]
    assert c["log10_lr"] > 0 and not c["layout"]["refutes"]
    blue = mark(sky())
    s = content_line(to_luma(stress.jpeg(blue, 75)), reference_luma=to_luma(blue))
    assert s["corresponds"] is None and s["statistic"]["dense"]["value"] is None
    assert "dense reading" in s["reason"] and s["log10_lr"] == 0.0
