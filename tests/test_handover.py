"""What a hand-over bundle gives the other side, and what it keeps back.

Two cases in one profile, one exported: nothing of the other case (title, source, names,
file names, case id, results), no key material, no absolute path and no master file may be
found in the bundle's bytes. The custody excerpt proves its entries belong to the owner's
hash-chained log; a disclosure is a choice, says what it reveals, and is logged.
"""
# ruff: noqa: F811 - the shared fixture is imported, then requested by name

from __future__ import annotations

import io
import json
import shutil
import zipfile
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from test_case_fixtures import PASS, built_case  # noqa: F401 - the shared fixture

from claimkit.cli import main
from claimkit.evidence import signing
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.excerpt import build_excerpt, verify_excerpt

pytestmark = pytest.mark.slow

OTHER_TITLE = "Saltmarsh Ferry poster reprints"
OTHER_SOURCE = "https://saltmarsh-ferry-prints.example/listing/7731"
OTHER_BY = "Orrin Vasquez-Thale"
OTHER_NOTE = "seen at the quayside kiosk, second shelf"
OTHER_FILE = "saltmarsh-poster-7731-reprint.jpg"
OTHER_WORK_NAME = "lantern-festival-unreleased-0042.tif"


def _expanded(name: str, data: bytes) -> bytes:
    """A file's bytes with what it compresses inflated too (PDF streams, npz/zip members,
    gzip), so that a search cannot miss text stored compressed."""
    import base64
    import gzip
    import io
    import re
    import zlib

    parts = [data]
    if name.endswith(".pdf"):
        # reportlab writes streams Flate-compressed, most also ASCII85-armoured (PDF 32000-1
        # 7.4.3 and 7.4.4); Python's own codecs undo both.
        for m in re.finditer(rb"stream\r?\n(.*?)endstream", data, re.DOTALL):
            body = m.group(1).strip()
            try:
                if body.endswith(b"~>"):
                    body = base64.a85decode(body[:-2], adobe=False)
                parts.append(zlib.decompress(body))
            except (ValueError, zlib.error):
                pass
    elif name.endswith((".npz", ".zip")):
        with zipfile.ZipFile(io.BytesIO(data)) as zf:
            parts += [zf.read(n) + n.encode() for n in zf.namelist()]
    elif name.endswith(".gz"):
        parts.append(gzip.decompress(data))
    return b"\n".join(parts)


def _texts_of(folder: Path) -> dict[str, bytes]:
    return {p.relative_to(folder).as_posix(): _expanded(p.name, p.read_bytes())
            for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def two_cases(built_case, tmp_path_factory):
    """A copy of the built profile and case, a second case beside it, the first exported."""
    from engine_helpers import sky

    base = tmp_path_factory.mktemp("two-cases")
    home, c1, c2 = base / "home", base / "case-one", base / "case-two"
    shutil.copytree(built_case.home, home)
    shutil.copytree(built_case.case, c1)
    found = base / "found"
    found.mkdir()
    Image.fromarray(sky(160, 200)).save(found / OTHER_FILE, quality=88)
    h = ["--home", str(home)]
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("CLAIMKIT_PASSPHRASE", PASS)
        from claimkit.evidence.profile import Profile
        with Profile.open(home, PASS.encode()) as p:
            # Another registered work, which the exported case does not involve.
            import hashlib
            serial = p.allocate_serials(1)[0]
            other_work = p.register_work(
                serial, sha256_original=hashlib.sha256(b"lantern").hexdigest(),
                sha256_marked=hashlib.sha256(b"lantern-marked").hexdigest(),
                original_name=OTHER_WORK_NAME, marked_name="lantern-web.jpg",
                fingerprint=f"{serial:016x}", mark_params={}, capture={}, quality={})
            p.disclose(other_work.work_id, base / "other-work-disclosure")
            seed = p.detection_seed
        assert main(["case", "new", str(c2), "--title", OTHER_TITLE, *h]) == 0
        assert main(["case", "add", str(c2), str(found / OTHER_FILE), "--source", OTHER_SOURCE,
                     "--by", OTHER_BY, "--note", OTHER_NOTE, *h]) == 0
        assert main(["case", "examine", str(c2), "--decoys", "4", "--no-robustness", *h]) == 0
        other_id = json.loads((c2 / "case.json").read_bytes())["case_id"]
        assert main(["report", str(c1), *h]) == 0
        bundle = base / "one.zip"
        assert main(["case", "export", str(c1), "--out", str(bundle), *h]) == 0
    unpacked = base / "unpacked"
    with zipfile.ZipFile(bundle) as zf:
        zf.extractall(unpacked)
    return {"base": base, "home": home, "c1": c1, "c2": c2, "bundle": bundle,
            "files": _texts_of(unpacked), "unpacked": unpacked, "seed": seed,
            "other_case_id": other_id, "other_work": other_work.work_id}


def test_nothing_of_the_other_case_or_work_is_in_the_bundle(two_cases, built_case):
    files = two_cases["files"]
    needles = {
        "other case title": OTHER_TITLE, "other case source": OTHER_SOURCE,
        "other case taker": OTHER_BY, "other case note": OTHER_NOTE,
        "other exhibit file name": OTHER_FILE, "other case id": two_cases["other_case_id"],
        "other work id": two_cases["other_work"], "other work file name": OTHER_WORK_NAME,
    }
    for what, text in needles.items():
        hits = [rel for rel, data in files.items() if text.encode() in data]
        assert not hits, f"{what} found in {hits}"


def test_no_key_material_no_absolute_path_no_master(two_cases, built_case):
    files = two_cases["files"]
    seed = two_cases["seed"]
    for rel, data in files.items():
        assert seed not in data and seed.hex().encode() not in data, rel
        for prefix in (str(two_cases["base"]), str(built_case.root), "/tmp/", "/home/",
                       "/root/"):
            assert prefix.encode() not in data, (rel, prefix)
    # No seed, payload tag or commitment opening in any work folder's disclosure.json.
    docs = [json.loads(d) for rel, d in files.items() if rel.endswith("/disclosure.json")]
    assert docs and all(d["keys"] is None and "opening" not in d["commitment"]
                        and "payload_tag" not in d["payload"] for d in docs)
    manifest = json.loads(files["manifest.json"])
    assert manifest["key_material"] == "withheld"
    # Nor the key's spot pattern: the prescribed and recovered messages (with the published
    # file, they give the carrier's phases) stay out, arrays and figure, named by hash.
    with zipfile.ZipFile(two_cases["bundle"]) as zf:
        for rel in zf.namelist():
            if rel.endswith(".npz"):
                with np.load(io.BytesIO(zf.read(rel))) as arr:
                    assert not {"reference", "recovered"} & set(arr.files), rel
            assert not rel.endswith(("-message.png", "-message.npz")), rel
    withheld = {w["path"] for w in manifest["withheld"]}
    assert {f"findings/exhibit-{i}-message.npz" for i in (1, 2, 3, 4)} <= withheld
    # The unmarked master (the studio original) is not among the bundle's files.
    master = (built_case.studio / "morning-cup.png").read_bytes()
    assert all(master not in data for data in files.values())
    pdf = two_cases["unpacked"] / "report" / "dossier.pdf"
    assert len(files["report/dossier.pdf"]) > 2 * pdf.stat().st_size, \
        "the PDF's streams were inflated for the search"


def test_custody_excerpt_holds_this_case_and_hashes_the_rest(two_cases, built_case):
    files = two_cases["files"]
    doc = json.loads(files["handover/custody-excerpt.json"])
    full = [json.loads(e["line"]) for e in doc["entries"] if "line" in e]
    hashed = [e for e in doc["entries"] if "sha256" in e]
    case_id = json.loads(files["case.json"])["case_id"]
    assert hashed, "the other case's entries are there by hash"
    for e in full:
        d = e["details"]
        assert d.get("case_id") in (None, case_id), e
        assert d.get("work_id") in (None, built_case.work_id), e
    # The excerpt commits to the whole log: its hashes are the real log's line hashes.
    from claimkit.evidence.custodylog import entry_hash
    log = (two_cases["home"] / "custody.jsonl").read_bytes().splitlines()
    assert [e.get("sha256") or entry_hash(e["line"].encode()) for e in doc["entries"]] == \
        [entry_hash(x) for x in log[:len(doc["entries"])]]
    pub = signing.load_public_pem(files["handover/public-key.pem"])
    rep = verify_excerpt(two_cases["unpacked"] / "handover/custody-excerpt.json", pub)
    assert rep.ok, rep.problems


def test_default_bundle_verifies_without_rerun(two_cases):
    from claimkit.verify import verify_bundle

    rep = verify_bundle(two_cases["bundle"], rerun=False)
    assert rep.ok, [c for c in rep.failures]
    assert {c["check"] for c in rep.unpinned} == {"signer key", "timestamp authority"}


def test_disclose_says_what_it_reveals_and_logs_it(two_cases, built_case, tmp_path, capsys):
    c1 = tmp_path / "c1"
    shutil.copytree(two_cases["c1"], c1)
    home = tmp_path / "home"
    shutil.copytree(two_cases["home"], home)
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("CLAIMKIT_PASSPHRASE", PASS)
        assert main(["report", str(c1), "--disclose", "--home", str(home)]) == 0
        err = capsys.readouterr().err
        assert "--disclose puts key material in the bundle" in err
        assert "this disclosure finds every format-1/2 work of the owner" in err
        out = tmp_path / "with-keys.zip"
        assert main(["case", "export", str(c1), "--out", str(out), "--disclose",
                     "--home", str(home)]) == 0
    last = [json.loads(x) for x in (home / "custody.jsonl").read_bytes().splitlines()]
    disclosed = [e for e in last if e["action"] == "key material disclosed"
                 and e["details"]["work_id"] == built_case.work_id]
    assert disclosed and "every format-1/2 work" in disclosed[-1]["details"]["scope"]
    assert disclosed[-1]["details"]["folder"] == built_case.work_id    # a name, not a path
    with zipfile.ZipFile(out) as zf:
        doc = json.loads(zf.read(f"handover/disclosures/{built_case.work_id}/disclosure.json"))
        assert doc["keys"]["seeds"]["detection"] == two_cases["seed"].hex()
        assert json.loads(zf.read("manifest.json"))["key_material"] == "disclosed"
        # With the keys go the messages they prescribe, and their figure.
        names = set(zf.namelist())
        assert {"findings/exhibit-1-message.npz", "report/figures/exhibit-1-message.png"} <= names


def test_export_disclose_refuses_a_report_built_without_keys(two_cases, tmp_path, capsys):
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("CLAIMKIT_PASSPHRASE", PASS)
        assert main(["case", "export", str(two_cases["c1"]), "--out", str(tmp_path / "x.zip"),
                     "--disclose", "--home", str(two_cases["home"])]) == 2
    assert "built without key material" in capsys.readouterr().err
    assert not (tmp_path / "x.zip").exists()


def test_second_owners_key_finds_nothing_in_the_first_owners_work(built_case, tmp_path):
    """A disclosure of another owner (their detection seed) tried on this owner's marked file."""
    from claimkit.evidence.profile import Profile
    from claimkit.imageio import read_picture
    from claimkit.workflow import examine_picture

    other = Profile.create(tmp_path / "second-owner", "Second Owner", b"second-passphrase")
    pic = read_picture(built_case.studio / "morning-cup-web.jpg")
    f = examine_picture(pic, other.detection_seed, owner_tag=other.owner_tag,
                        payload_check=lambda bits: False, decoys=0)
    other.close()
    assert not f.detected


# ---------------------------------------------------------------- the excerpt on its own

@pytest.fixture
def logged(profile):
    for i in range(3):
        profile.log_action("case opened", items={}, details={"case_id": "C-ONE", "title": "one"})
        profile.log_action("case opened", items={}, details={"case_id": "C-TWO",
                                                              "title": f"two {i}"})
    return profile


def _excerpt(profile) -> tuple[dict, object]:
    doc = json.loads(build_excerpt(profile.log_path.read_bytes(), case_id="C-ONE", work_ids=[]))
    return doc, signing.load_public_pem(profile.public_key_pem())


def _check(doc, pub, tmp_path):
    p = tmp_path / "excerpt.json"
    p.write_bytes(canonical_json(doc))
    return verify_excerpt(p, pub)


def test_excerpt_verifies_and_hides_the_other_case(logged, tmp_path):
    doc, pub = _excerpt(logged)
    rep = _check(doc, pub, tmp_path)
    assert rep.ok and len(rep.entries) == 4       # profile created + three of case one
    assert b"C-TWO" not in canonical_json(doc)


@pytest.mark.parametrize("damage", ["hash", "line", "drop", "head", "swap"])
def test_excerpt_damage_is_named(logged, tmp_path, damage):
    doc, pub = _excerpt(logged)
    items = doc["entries"]
    hashed = next(i for i, e in enumerate(items) if "sha256" in e)
    full = max(i for i, e in enumerate(items) if "line" in e)
    if damage == "hash":
        items[hashed]["sha256"] = "0" * 64
    elif damage == "line":
        items[full]["line"] = items[full]["line"].replace('"one"', '"uno"')
    elif damage == "drop":
        del items[hashed]
    elif damage == "head":
        doc["head"]["seq"] += 1
    else:
        items[hashed], items[hashed + 1] = items[hashed + 1], items[hashed]
    rep = _check(doc, pub, tmp_path)
    assert not rep.ok and rep.problems, damage


# ---------------------------------------------------------------- software named

def test_bundle_names_its_software(two_cases):
    from importlib import metadata

    from PIL import features

    sw = json.loads(two_cases["files"]["handover/software.json"])
    # Checked against the package metadata and Pillow's own feature report, not claimkit's.
    for dist in ("numpy", "scipy", "pillow", "scikit-image", "reportlab"):
        assert sw[dist] == metadata.version(dist), dist
    assert sw["libjpeg"] == features.version("jpg") and sw["libjpeg"]
    import platform
    assert sw["python"] == platform.python_version() and sw["os"].startswith(platform.system())
    assert "claimkit" in sw


def test_other_versions_compare_figures_and_pdf_by_data(two_cases, monkeypatch):
    from claimkit import software
    from claimkit.verify import verify_bundle

    real = software.versions()
    monkeypatch.setattr(software, "versions", lambda: {**real, "reportlab": "0.0-elsewhere"})
    rep = verify_bundle(two_cases["bundle"], robustness=False)
    by = {c["check"]: c for c in rep.checks}
    assert "reportlab: made with" in by["software"]["detail"] and \
        "0.0-elsewhere" in by["software"]["detail"]
    assert by["figures"]["status"] == "ok" and "tolerances" in by["figures"]["detail"]
    assert by["PDF content"]["status"] == "ok", by["PDF content"]
    # No disclosure was given: the examinations themselves are named as not re-run.
    assert by["re-run"]["status"] == "not-done"


def test_figure_tolerance():
    from claimkit.verify.dossier import figures_agree

    a = np.full((8, 8, 3), 100, np.uint8)
    b = a.copy()
    b[0, 0, 0] = 102
    assert not figures_agree(a, b, exact=True) and figures_agree(a, b, exact=False)
    b[0, 0, 0] = 103
    assert not figures_agree(a, b, exact=False)            # beyond 2 levels
    assert not figures_agree(a, a + 1, exact=False)        # every pixel off: mean beyond 0.5


def _pdf(text: str) -> bytes:
    import io

    from reportlab.pdfgen import canvas
    buf = io.BytesIO()
    c = canvas.Canvas(buf, invariant=1)
    c.drawString(72, 720, text)
    c.save()
    return buf.getvalue()


def test_pdf_text_tolerance():
    """Compared through poppler's pdftotext: one unit of the last digit passes, more fails."""
    from claimkit.verify.dossier import pdf_texts_agree

    if shutil.which("pdftotext") is None:
        pytest.skip("poppler-utils not installed")
    base = _pdf("Exhibit 1: SSIM 0.9871 after alignment, log10 P -23.41")
    assert pdf_texts_agree(base, _pdf("Exhibit 1: SSIM 0.9872 after alignment, log10 P -23.41"))[0]
    ok, why = pdf_texts_agree(base, _pdf("Exhibit 1: SSIM 0.9875 after alignment, log10 P -23.41"))
    assert not ok and "0.9875" in why
    assert not pdf_texts_agree(base, _pdf("Exhibit 2: SSIM 0.9871 after alignment, log10 P -23.41"))[0]


def test_report_refuses_arrays_that_hold_the_key_pattern(two_cases, tmp_path, capsys):
    """A case examined before the message arrays were kept apart: no default bundle of it."""
    from claimkit.evidence.storage import sha256_file

    c1 = tmp_path / "c1"
    shutil.copytree(two_cases["c1"], c1)
    fpath = c1 / "findings" / "exhibit-1.json"
    f = json.loads(fpath.read_bytes())
    npz = c1 / f["arrays"]["file"]
    with np.load(npz) as a, np.load(c1 / f.pop("message_arrays")["file"]) as m:
        old = {**{k: a[k] for k in a.files}, **{k: m[k] for k in m.files}}
    npz.chmod(0o644)
    np.savez_compressed(npz, **old)
    f["arrays"]["sha256"] = sha256_file(npz)
    fpath.chmod(0o644)
    fpath.write_bytes(canonical_json(f) + b"\n")
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("CLAIMKIT_PASSPHRASE", PASS)
        assert main(["report", str(c1), "--home", str(two_cases["home"])]) == 2
    err = capsys.readouterr().err
    assert "hold the key's message pattern" in err and err.startswith("claimkit: error: ")
