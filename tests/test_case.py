"""Case intake and examination: byte-for-byte exhibits, custody, decoy control, alignment."""
# ruff: noqa: F811 - the shared fixture is imported, then requested by name

from __future__ import annotations

import hashlib
import os
import stat

import numpy as np
import pytest
from PIL import Image
from test_case_fixtures import DECOYS, built_case  # noqa: F401 - the shared fixture

from claimkit.case.examine import decoy_summary
from claimkit.case.store import add_exhibit, checked_exhibit_path, new_case, open_case
from claimkit.cli import main
from claimkit.errors import CheckFailed, InputError
from claimkit.evidence.custodylog import verify_log
from claimkit.evidence.signing import load_public_pem

pytestmark = pytest.mark.slow


def _sha(path) -> str:
    # hashlib's SHA-256 is FIPS 180-4; claimkit's own is checked against the standard's
    # vectors in the evidence tests, so this is an independent computation of the same digest.
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


def test_exhibits_are_byte_for_byte_read_only_and_logged(built_case):
    case = open_case(built_case.case)
    exhibits = case.exhibits()
    assert [e.exhibit_id for e in exhibits] == ["exhibit-1", "exhibit-2", "exhibit-3", "exhibit-4"]
    for ex, src in zip(exhibits, built_case.copies + [built_case.unmarked, built_case.forged], strict=True):
        stored = built_case.case / ex.file
        assert stored.read_bytes() == src.read_bytes()
        assert ex.sha256 == _sha(src) == _sha(stored)
        assert ex.record["size"] == src.stat().st_size
        with Image.open(src) as im:
            assert (ex.record["width"], ex.record["height"]) == im.size
        assert ex.record["media_type"] == "image/jpeg"
        assert not stored.stat().st_mode & (stat.S_IWUSR | stat.S_IWGRP | stat.S_IWOTH)
        assert ex.record["taken_in"]["time_source"] == "system clock"
    first = exhibits[0].record
    sc = built_case.scenario["copies"][0]
    assert first["source"] == sc["source"]
    # the scenario's "{day}" is the day the copies were found (the day the fixture runs)
    assert first["found"]["when"].endswith(sc["found"].replace("{day}", ""))
    assert first["found"]["time_source"] == f"stated by {sc['by']}"
    # Every intake is in the signed custody log with the exhibit's hash.
    pub = load_public_pem((built_case.home / "public.pem").read_bytes())
    log = verify_log(built_case.home / "custody.jsonl", pub)
    assert log.ok, log.problems
    taken = {e["details"]["exhibit_id"]: e["items"]["exhibit"] for e in log.entries
             if e["action"] == "disputed file taken in"}
    assert taken == {e.exhibit_id: e.sha256 for e in exhibits}


def test_intake_refuses_duplicates_non_images_and_missing_files(built_case, tmp_path, profile):
    case = new_case(tmp_path / "c", "Refusals", profile)
    add_exhibit(case, built_case.copies[0], source="shop", profile=profile)
    with pytest.raises(InputError, match="already exhibit exhibit-1"):
        add_exhibit(case, built_case.copies[0], source="shop", profile=profile)
    junk = tmp_path / "notes.jpg"
    junk.write_bytes(b"this is not a photo at all")
    with pytest.raises(InputError, match="not an image") as err:
        add_exhibit(case, junk, source="shop", profile=profile)
    assert str(junk) in err.value.line()
    with pytest.raises(InputError, match="no such file"):
        add_exhibit(case, tmp_path / "gone.jpg", source="shop", profile=profile)
    with pytest.raises(InputError, match="source"):
        add_exhibit(case, built_case.copies[1], source="  ", profile=profile)
    with pytest.raises(InputError, match="not an empty folder"):
        new_case(tmp_path / "c", "again", profile)
    # The failed intakes left nothing behind.
    assert sorted(p.name for p in (tmp_path / "c" / "exhibits").iterdir()) == \
        ["exhibit-1-tidewater-mug-listing.jpg", "exhibit-1.json"]


def test_source_file_is_never_modified(built_case):
    src = built_case.copies[0]
    before = (src.stat().st_mtime_ns, _sha(src))
    case = open_case(built_case.case)
    checked_exhibit_path(case, case.exhibits()[0])
    assert (src.stat().st_mtime_ns, _sha(src)) == before


def test_altered_exhibit_is_caught_before_use(built_case, tmp_path, profile):
    case = new_case(tmp_path / "c", "Tamper", profile)
    ex = add_exhibit(case, built_case.copies[0], source="shop", profile=profile)
    stored = tmp_path / "c" / ex.file
    os.chmod(stored, 0o600)
    data = bytearray(stored.read_bytes())
    data[len(data) // 2] ^= 0x01
    stored.write_bytes(bytes(data))
    with pytest.raises(CheckFailed, match="altered since intake"):
        checked_exhibit_path(case, ex)
    code = main(["case", "examine", str(tmp_path / "c"), "--decoys", "0"])
    assert code == 1


def test_marked_copies_found_unmarked_not(built_case):
    case = open_case(built_case.case)
    f1, f2, f3 = (case.finding(e) for e in ("exhibit-1", "exhibit-2", "exhibit-3"))
    for f in (f1, f2):
        r = f["result"]
        assert r["detected"] and r["work_id"] == built_case.work_id and r["registered"]
        assert r["log10_false_alarm_probability"] < -9
        assert f["match"] == {"work_id": built_case.work_id, "by": "payload"}
    assert not f3["result"]["detected"] and f3["result"]["work_id"] is None
    assert f3["match"] is None and f3["alignment"] is None


def test_decoy_control_is_the_null_the_score_is_set_against(built_case):
    case = open_case(built_case.case)
    for e in ("exhibit-1", "exhibit-2", "exhibit-3"):
        f = case.finding(e)
        scores = f["decoy_scores"]
        assert len(scores) == DECOYS == f["decoy_summary"]["count"]
        # Different keys, different scores; stored to 4 decimals, two of them can round to the
        # same value (about 1 run in 50 for one tie), so allow a tie but not a constant list.
        assert len(set(scores)) >= DECOYS - 2
        # The stored scores are rounded to 4 decimals, so the summary agrees to about that.
        again = decoy_summary(scores, f["result"]["score_pilot"])
        assert again.keys() == f["decoy_summary"].keys()
        for k, v in again.items():
            assert f["decoy_summary"][k] == pytest.approx(v, abs=2e-4), k
    marked, unmarked = case.finding("exhibit-1"), case.finding("exhibit-3")
    assert marked["result"]["score_pilot"] > max(marked["decoy_scores"])
    assert marked["decoy_summary"]["at_or_above_observed"] == 0
    # Under no mark the owner's key is just one more random key: not far above them.
    obs = unmarked["result"]["score_pilot"]
    assert 0 < obs < max(unmarked["decoy_scores"]) + 2.0


def test_decoy_summary_arithmetic():
    # Monte Carlo p-value (k + 1) / (n + 1): Davison & Hinkley (1997), eq. 4.11.
    s = decoy_summary([1.0, 2.0, 3.0, 4.0], 3.0)
    assert s["at_or_above_observed"] == 2 and s["empirical_p"] == pytest.approx(3 / 5)
    assert s["max"] == 4.0 and s["mean"] == 2.5


def test_alignment_recovers_the_crop_and_measures_similarity(built_case):
    """The crop box must match the edit's known parameters (Pillow's resize and crop)."""
    case = open_case(built_case.case)
    with Image.open(built_case.studio / "morning-cup.png") as im:
        W, H = im.size
    edits = built_case.scenario["copies"][0]["edits"]
    s = edits["scale"]
    x0, y0, x1, y1 = edits["crop"]
    sw, sh = round(W * s), round(H * s)
    want = [round(x0 * sw) / s, round(y0 * sh) / s, round(x1 * sw) / s, round(y1 * sh) / s]
    al = case.finding("exhibit-1")["alignment"]
    assert al["aligned"]
    assert np.allclose(al["crop_box_px"], want, atol=4), (al["crop_box_px"], want)
    assert al["scale"] == pytest.approx(s, abs=0.01)
    assert abs(al["rotation_deg"]) < 0.3
    assert al["ssim"] > 0.9
    turned = case.finding("exhibit-2")["alignment"]
    assert turned["aligned"] and turned["rotation_deg"] == pytest.approx(4.0, abs=0.3)
    assert turned["scale"] == pytest.approx(0.8, abs=0.01) and turned["ssim"] > 0.85
    ref = case.finding("exhibit-1")["reference"]
    # Compared with a reduced-resolution reference (long side 1024 px) of the published file.
    assert ref["kind"] == "reduced" and ref["made_from"]["kind"] == "marked"
    assert ref["made_from"]["sha256"] == _sha(built_case.studio / "morning-cup-web.jpg")
    assert ref["sha256"] == _sha(built_case.case / ref["file"])
    with Image.open(built_case.case / ref["file"]) as im:
        assert max(im.size) == 1024 and im.size == tuple(ref["size"])
        assert ref["scale"] == pytest.approx(1024 / max(W, H))


def test_alignment_ssim_matches_skimage_on_the_stored_arrays(built_case):
    """Recompute the SSIM from the stored aligned copy with skimage.metrics directly."""
    from scipy import ndimage
    from skimage.metrics import structural_similarity
    from skimage.transform import rescale

    from claimkit.imageio import read_picture, to_luma

    case = open_case(built_case.case)
    f = case.finding("exhibit-1")
    with np.load(built_case.case / f["arrays"]["file"]) as a:
        aligned, mask = a["aligned"].astype(float), a["mask"]
    ref = to_luma(read_picture(built_case.case / f["reference"]["file"]).pixels).astype(float)
    # work_scale is per registered-picture pixel; the file is already reduced by "scale".
    s = f["alignment"]["work_scale"] / f["reference"]["scale"]
    ref = rescale(ref, s, anti_aliasing=True, preserve_range=True) if s < 1 - 1e-9 else ref
    _, smap = structural_similarity(ref, aligned, data_range=255.0, full=True)
    inner = ndimage.binary_erosion(mask, iterations=4)
    # The stored copy is rounded to 8 bits, so allow a little.
    assert smap[inner].mean() == pytest.approx(f["alignment"]["ssim"], abs=0.01)


def test_examine_json_lines(built_case):
    """`case examine --json` (as the session's case was examined): a JSON object per exhibit."""
    rows = built_case.examine_rows
    assert [r["exhibit_id"] for r in rows] == ["exhibit-1", "exhibit-2", "exhibit-3", "exhibit-4"]
    assert [r["detected"] for r in rows] == [True, True, False, True]
    assert [r["content_mismatch"] for r in rows] == [False, False, False, True]
    for r in rows:
        assert set(r) >= {"file", "detected", "false_alarm_probability", "work_id",
                          "message_psnr_db", "geometry", "content", "content_mismatch",
                          "evaluation"}
        assert set(r["evaluation"]["log10_lr"]) == {"mark", "content", "combined"}


def test_unmarked_copy_of_the_original_is_matched_by_appearance_only(built_case, tmp_path):
    """A copy of the unmarked original carries no mark: matched by fingerprint, never claimed."""
    from test_case_fixtures import PASS

    from claimkit.case.examine import examine_case
    from claimkit.evidence.profile import Profile

    leak = tmp_path / "leaked-original.jpg"
    with Image.open(built_case.studio / "morning-cup.png") as im:
        im.resize((im.width // 2, im.height // 2), Image.Resampling.LANCZOS).save(leak, quality=85)
    with Profile.open(built_case.home, PASS.encode()) as p:
        case = new_case(tmp_path / "case", "Leak", p)
        add_exhibit(case, leak, source="a printed flyer, scanned", profile=p)
        (f,) = examine_case(case, p, decoys=4, search=[built_case.studio], robustness=False)
    assert not f["result"]["detected"]
    assert f["match"]["by"] == "perceptual fingerprint"
    assert f["match"]["work_id"] == built_case.work_id
    al = f["alignment"]
    # No mark geometry: the assumed scales are tried and the half size is found.
    assert al["aligned"] and al["scale"] == pytest.approx(0.5, abs=0.01) and al["ssim"] > 0.9
    from claimkit.dossier.data import build_data
    from claimkit.dossier.render import render_markup

    text = " ".join(render_markup(build_data(tmp_path / "case")).split())
    assert "which is a resemblance, not proof of origin" in text
