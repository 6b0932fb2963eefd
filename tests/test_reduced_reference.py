"""The reduced-resolution reference: what a bundle compares exhibits with instead of the master.

A case whose only registered file at hand is the unmarked master (no published marked
file). By default no reference is made from it (beside the published file it would give
away the mark): the content line falls back to the record's fingerprint, and the bundle
re-runs. With ``--reference-from-master`` the bundle must still hold no master (searched
by SHA-256, by bytes and by decoded pixels), ``verify`` must re-run the content line and
the alignment from the reduced reference, and a reference that was tampered with, or
swapped for another picture and re-signed, must fail named.
"""
# ruff: noqa: F811 - the shared fixture is imported, then requested by name

from __future__ import annotations

import hashlib
import io
import json
import shutil
import zipfile

import numpy as np
import pytest
from PIL import Image
from test_case_fixtures import PASS, built_case  # noqa: F401 - the shared fixture

from claimkit.case import layout
from claimkit.case.reference import LONG_SIDE, MASTER_SHARE, reduce_pixels, reduced_size
from claimkit.cli import main
from claimkit.evidence.canonical import canonical_json
from claimkit.verify import verify_bundle

pytestmark = pytest.mark.slow


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


@pytest.fixture(scope="module")
def master_only(built_case, tmp_path_factory):
    """One exhibit, examined with only the master at hand, reported and exported by default."""
    base = tmp_path_factory.mktemp("master-only")
    home, case, masters = base / "home", base / "case", base / "masters"
    shutil.copytree(built_case.home, home)      # the built case's custody log stays as it was
    masters.mkdir()
    shutil.copyfile(built_case.studio / "morning-cup.png", masters / "morning-cup.png")
    h = ["--home", str(home)]
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("CLAIMKIT_PASSPHRASE", PASS)
        assert main(["case", "new", str(case), "--title", "Master-only check", *h]) == 0
        assert main(["case", "add", str(case), str(built_case.copies[0]), "--source",
                     "https://tidewater-home-goods.example/products/mug", *h]) == 0
        examine = ["case", "examine", str(case), "--originals", str(masters), "--decoys", "2",
                   "--no-robustness", *h]
        assert main(examine) == 0
        assert main(["report", str(case), *h]) == 0
        plain = base / "plain.zip"
        assert main(["case", "export", str(case), "--out", str(plain), *h]) == 0
        plain_finding = json.loads((case / layout.finding_file("exhibit-1")).read_bytes())
        # The owner chooses to make a reference from the master after all.
        assert main([*examine, "--reference-from-master"]) == 0
        assert main(["report", str(case), *h]) == 0
        bundle = base / "bundle.zip"
        assert main(["case", "export", str(case), "--out", str(bundle), *h]) == 0
    return {"base": base, "home": home, "case": case, "bundle": bundle, "plain": plain,
            "plain_finding": plain_finding, "master": masters / "morning-cup.png"}


def test_by_default_no_reference_is_made_from_the_master(master_only, built_case):
    from claimkit.case.examine import MASTER_ONLY

    f = master_only["plain_finding"]
    assert f["reference"] is None and f["alignment"] == {"aligned": False, "reason": MASTER_ONLY}
    assert f["content"]["limited_to_fingerprint"] is True and f["content"]["corresponds"]
    with zipfile.ZipFile(master_only["plain"]) as zf:
        assert not [n for n in zf.namelist() if n.startswith("references/")]
    rep = verify_bundle(master_only["plain"], disclosure=built_case.disclosure)
    assert not rep.failures, rep.failures


def test_reduced_size_rules():
    # From the published file: long side 1024, never enlarged; from the master: at most half.
    assert reduced_size(1200, 800, "marked") == ((1024, 683), 1024 / 1200)
    assert reduced_size(900, 600, "marked") == ((900, 600), 1.0)
    assert reduced_size(1200, 800, "original") == ((600, 400), 0.5)
    assert reduced_size(6000, 4000, "original") == ((1024, 683), 1024 / 6000)
    assert LONG_SIDE == 1024 and MASTER_SHARE == 0.5
    # 16-bit pictures are rounded to 8 bits first (65535 -> 255, 32896 -> 128).
    px = np.full((40, 60, 3), 32896, np.uint16)
    red = reduce_pixels(px, "original")
    assert red.pixels.dtype == np.uint8 and red.pixels.shape == (20, 30, 3)
    assert int(red.pixels.min()) == int(red.pixels.max()) == 128


def test_default_bundle_holds_no_master(master_only):
    master = master_only["master"].read_bytes()
    with Image.open(master_only["master"]) as im:
        master_px = np.asarray(im.convert("RGB"))
    f = json.loads((master_only["case"] / layout.finding_file("exhibit-1")).read_bytes())
    ref = f["reference"]
    assert ref["kind"] == "reduced" and ref["made_from"]["kind"] == "original"
    assert ref["made_from"]["sha256"] == _sha(master)
    assert ref["size"] == [600, 400] and ref["scale"] == 0.5
    with zipfile.ZipFile(master_only["bundle"]) as zf:
        members = {n: zf.read(n) for n in zf.namelist()}
    # Not by name, hash, bytes or size ...
    assert ref["made_from"]["file"] not in members
    assert all(_sha(d) != _sha(master) and master not in d for d in members.values())
    # ... nor by pixels: no picture in the bundle decodes to the master's size or pixels.
    for name, data in members.items():
        if name.endswith((".png", ".jpg", ".jpeg")):
            with Image.open(io.BytesIO(data)) as im:
                assert im.size != (master_px.shape[1], master_px.shape[0]), name
    assert ref["file"] in members
    manifest = json.loads(members["manifest.json"])
    assert manifest["include_original"] is False
    kept = [w for w in manifest["withheld"] if w["path"].startswith("references/")]
    assert [(w["path"], w["sha256"]) for w in kept] == [(ref["made_from"]["file"], _sha(master))]


def test_verify_re_runs_the_content_line_and_alignment_from_the_reference(master_only,
                                                                         built_case):
    # The robustness battery was not run (no published marked file at hand), so none to re-run.
    rep = verify_bundle(master_only["bundle"], disclosure=built_case.disclosure)
    checks = {c["check"]: c for c in rep.checks}
    assert not rep.failures, rep.failures
    assert checks[f"reference {built_case.work_id}"]["status"] == "ok"
    rerun = checks["exhibit-1 re-run"]
    assert rerun["status"] == "ok" and "every stored number reproduced" in rerun["detail"]
    # Nothing was left out for want of the master.
    assert not [c for c in rep.checks if "withheld" in c["detail"] and c["status"] == "skipped"]
    f = json.loads((master_only["case"] / layout.finding_file("exhibit-1")).read_bytes())
    assert f["content"]["corresponds"] is True and f["alignment"]["aligned"] is True
    # The case folder holds the master: there the reference is also made again from it.
    rep = verify_bundle(master_only["case"], rerun=False)
    detail = {c["check"]: c for c in rep.checks}[f"reference {built_case.work_id}"]
    assert detail["status"] == "ok" and "made again" in detail["detail"], detail


def test_include_original_adds_the_master(master_only):
    used = layout.bundle_files(master_only["case"], include_original=True)
    f = json.loads((master_only["case"] / layout.finding_file("exhibit-1")).read_bytes())
    assert f["reference"]["made_from"]["file"] in used
    assert f["reference"]["made_from"]["file"] not in layout.bundle_files(master_only["case"])


def _unpacked(master_only, name):
    work = master_only["base"] / name
    shutil.rmtree(work, ignore_errors=True)
    with zipfile.ZipFile(master_only["bundle"]) as zf:
        zf.extractall(work)
    f = json.loads((work / layout.finding_file("exhibit-1")).read_bytes())
    return work, f


def test_a_tampered_reference_fails_named(master_only, built_case):
    work, f = _unpacked(master_only, "tampered")
    p = work / f["reference"]["file"]
    with Image.open(p) as im:
        px = np.asarray(im).copy()
    px[100:140, 100:140] = 255 - px[100:140, 100:140]
    Image.fromarray(px).save(p)
    rep = verify_bundle(work, rerun=False)
    text = " | ".join(f"{c['check']}: {c['detail']}" for c in rep.failures)
    assert f"{f['reference']['file']}: SHA-256 differs from the manifest" in text
    assert (f"reference {built_case.work_id}: {f['reference']['file']}: SHA-256 differs from "
            "the one the finding names") in text


def test_a_swapped_reference_re_signed_by_the_owner_fails_named(master_only, built_case):
    """An owner who swaps in another picture and re-signs everything is still caught: the
    reference no longer shows the work the signed, timestamped record describes."""
    from skimage import data

    from claimkit.evidence.profile import Profile
    from claimkit.evidence.storage import sha256_file

    work, f = _unpacked(master_only, "swapped")
    p = work / f["reference"]["file"]
    other = np.asarray(Image.fromarray(data.rocket()).resize(tuple(f["reference"]["size"])))
    Image.fromarray(other).save(p)
    f["reference"]["sha256"] = sha256_file(p)
    (work / layout.finding_file("exhibit-1")).write_bytes(canonical_json(f) + b"\n")
    doc = json.loads((work / "manifest.json").read_bytes())
    for e in doc["files"]:
        e["sha256"] = sha256_file(work / e["path"])
        e["size"] = (work / e["path"]).stat().st_size
    body = canonical_json(doc)
    (work / "manifest.json").write_bytes(body)
    with Profile.open(master_only["home"], PASS.encode()) as prof:
        (work / "manifest.sig").write_bytes(prof.sign(body))
    rep = verify_bundle(work, rerun=False)
    bad = {c["check"]: c["detail"] for c in rep.failures}
    assert "does not show the registered picture" in bad[f"reference {built_case.work_id}"]
