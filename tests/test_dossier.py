"""The dossier as a reader gets it: poppler and pypdf read the PDF; figures match their data."""
# ruff: noqa: F811 - the shared fixture is imported, then requested by name

from __future__ import annotations

import io
import json
import re
import shutil
import subprocess

import numpy as np
import pytest
from PIL import Image
from test_case_fixtures import built_case  # noqa: F401 - the shared fixture

from claimkit.dossier import figures
from claimkit.dossier.render import parse_markup, render_markup, template_dir

pytestmark = pytest.mark.slow

SECTIONS = ["Summary for the reader", "Please note", "Evaluative opinion", "Timeline",
            "The claimant and the work",
            "The exhibits", "Method", "Published references", "Results for each exhibit",
            "Limitations", "Chain of custody", "Reproducing every number"]


def _poppler(tool: str):
    if shutil.which(tool) is None:
        pytest.skip(f"{tool} not installed (Debian: apt-get install poppler-utils)")


def _data(bc) -> dict:
    return json.loads((bc.case / "report" / "dossier.json").read_bytes())


def _flat(text: str) -> str:
    return re.sub(r"\s+", " ", text)


def test_pdftotext_finds_every_section_and_the_numbers(built_case):
    _poppler("pdftotext")
    pdf = built_case.case / "report" / "dossier.pdf"
    text = _flat(subprocess.run(["pdftotext", "-layout", str(pdf), "-"], capture_output=True,
                                text=True, check=True).stdout)
    # Reading order (no -layout) keeps each table cell's words together.
    raw = _flat(subprocess.run(["pdftotext", str(pdf), "-"], capture_output=True,
                               text=True, check=True).stdout)
    for s in SECTIONS:
        assert s in text, s
    d = _data(built_case)
    assert f"work {built_case.work_id}" in text
    for r in d["results"]:
        # "Exhibit 1", not the id (an "E01" id read as a disk-image file extension)
        assert f"Exhibit {r['exhibit_id'].split('-')[1]}" in text
        assert f"log10 = {r['log10_false_alarm']}" in text
        if r["detected"]:
            assert f"PSNR of {r['message_psnr_db']} dB" in text
            if r["alignment"].get("aligned"):     # not for the transplanted-mark forgery
                assert f"SSIM after alignment {r['alignment']['ssim']}" in text
            assert f"highest {r['decoys']['max']}" in text
    for e in d["exhibits"]:
        # The table wraps long hashes; the exhibit paragraph keeps each one whole.
        assert e["sha256"] in text.replace(" ", "")
    assert "technical evidence, not legal advice" in text
    assert "differ between jurisdictions" in text and "counsel" in text
    assert "does not show who took the photograph" in text
    assert "claimkit verify BUNDLE.zip" in text
    # The method describes the format that marks now: format 3's claim does not repeat per tile
    # (the sentence "the tile repeats over the whole picture" was true of formats 1 and 2 only).
    eng = d["method"]["engine"]
    assert (f"changes from tile to tile over a keyed {eng['current']['macro_cell_tiles']} x "
            f"{eng['current']['macro_cell_tiles']} macro-cell") in text
    assert f"one of {eng['current']['families']} keyed families" in text
    assert "The tile repeats over the whole picture" not in text
    # One definition per count: the method gives both searches' counts, and each format-3 result's
    # count is the method's per-scale count times the scales it states (an expert redoes it).
    assert f"{eng['hypotheses']} placements in all for formats 1 and 2" in text
    assert f"{eng['format3_hypotheses']} hypotheses at each scale examined" in text
    assert eng["format3_hypotheses"] == (eng["format3_placements"] * eng["current"]["families"]
                                         * eng["current"]["macro_cell_tiles"] ** 2)
    for r in d["results"]:
        if r["detected"] and r["scales_searched"] > 1:
            assert f"{r['hypotheses']} placements ({r['scales_searched']} scales examined" in text
    # The robustness table: one row per edit of the battery, as stored.
    rob = d["results"][0]["robustness"]
    if rob["status"] == "run":
        assert "Robustness of the registered mark" in text
        for row in rob["rows"]:
            assert row["attack"].replace(" ", "") in raw.replace(" ", ""), row["attack"]
    else:
        assert f"Not run: {rob['reason']}" in text
    # The plain-language line, for the non-technical reader.
    first = d["results"][0]
    if first["log10_false_alarm"] < -12:
        # written so that the minus sign survives copying the text out of the PDF
        assert "below 10^-12 (less than one in a million million)" in text
    else:
        n = int(-first["log10_false_alarm"] // 1)
        assert f"a 1 followed by {n} zeros" in text


def test_pypdf_reads_the_same_text_and_metadata(built_case):
    pypdf = pytest.importorskip("pypdf")
    reader = pypdf.PdfReader(str(built_case.case / "report" / "dossier.pdf"))
    text = _flat(" ".join(p.extract_text() for p in reader.pages))
    for s in SECTIONS:
        assert s in text, s
    d = _data(built_case)
    assert reader.metadata.title == f"Evidence dossier: {d['case']['title']}"
    assert reader.metadata.subject == d["case"]["case_id"]
    # A4 pages (595 x 842 points), readable on paper.
    box = reader.pages[0].mediabox
    assert round(float(box.width)) == 595 and round(float(box.height)) == 842


def test_every_font_is_embedded(built_case):
    _poppler("pdffonts")
    out = subprocess.run(["pdffonts", str(built_case.case / "report" / "dossier.pdf")],
                         capture_output=True, text=True, check=True).stdout.splitlines()[2:]
    assert out, "no fonts listed"
    for line in out:
        cols = line.split()
        # name type encoding emb sub uni object ID: "emb" is the 4th column from the right end
        assert cols[-5] == "yes", line


def test_pdf_signature_is_valid_for_poppler(built_case):
    _poppler("pdfsig")
    pdf = built_case.case / "report" / "dossier.pdf"
    out = subprocess.run(["pdfsig", "-nocert", str(pdf)], capture_output=True, text=True,
                         check=False).stdout
    assert "Signature is Valid" in out, out
    assert "Ilse Marrow" in out and "Total document signed" in out
    assert "ETSI.CAdES.detached" in out      # PAdES (ETSI EN 319 142)
    # One changed byte inside the signed range and poppler no longer accepts it.
    data = bytearray(pdf.read_bytes())
    i = data.find(b"Evidence dossier")
    data[i] ^= 0x20
    bad = built_case.root / "tampered.pdf"
    bad.write_bytes(bytes(data))
    out = subprocess.run(["pdfsig", "-nocert", str(bad)], capture_output=True, text=True,
                         check=False).stdout
    assert "Signature is Valid" not in out


def test_pages_render_and_are_not_blank(built_case, tmp_path):
    _poppler("pdftoppm")
    subprocess.run(["pdftoppm", "-png", "-r", "40", str(built_case.case / "report" / "dossier.pdf"),
                    str(tmp_path / "page")], check=True)
    pages = sorted(tmp_path.glob("page*.png"))
    assert len(pages) >= 6
    for p in pages:
        a = np.asarray(Image.open(p).convert("L"))
        assert (a < 128).mean() > 0.001, p.name    # every page has ink


def test_html_has_the_same_content_and_is_self_contained(built_case):
    html = (built_case.case / "report" / "dossier.html").read_text(encoding="utf-8")
    for s in SECTIONS:
        assert s in html, s
    d = _data(built_case)
    for r in d["results"]:
        assert f"log10 = {r['log10_false_alarm']}" in html
    srcs = re.findall(r'src="([^"]*)"', html)
    assert srcs and all(s.startswith("data:image/png;base64,") for s in srcs)
    assert "http://" not in html.split("<body>")[0] and "<link" not in html


def test_every_text_block_comes_from_a_template():
    folder = template_dir()
    names = {p.name for p in (folder / "sections").glob("*.md.j2")}
    assert names >= {"summary.md.j2", "claimant.md.j2", "exhibits.md.j2", "method.md.j2",
                     "results.md.j2", "limitations.md.j2", "custody.md.j2",
                     "reproduce.md.j2", "caution.md.j2"}
    main = (folder / "dossier.md.j2").read_text()
    for n in names:
        assert f"sections/{n}" in main


def test_figures_show_the_stored_data(built_case):
    d = _data(built_case)
    f = json.loads((built_case.case / "findings" / "exhibit-1.json").read_bytes())
    with np.load(built_case.case / f["arrays"]["file"]) as a:
        surface = a["surface"]
    with np.load(built_case.case / f["message_arrays"]["file"]) as a:
        recovered, reference = a["recovered"], a["reference"]
    figs = d["figures"]["exhibit-1"]
    # The report was built without key material: the message figure (the key's spot
    # pattern) is not drawn; drawn here from the case's own arrays, as --disclose draws it.
    assert "message" not in figs
    # Correlation surface: drawn 3x, origin at (20, 40); the hottest drawn pixel is the peak.
    img = np.asarray(Image.open(built_case.case / figs["surface"]).convert("RGB")).astype(int)
    n = surface.shape[0]
    panel = img[40:40 + 3 * n, 20:20 + 3 * n][1::3, 1::3]
    hot = figures.colour_map(np.array([surface.max()]), -1, 0)[0]   # the ramp's last stop
    r, c = np.unravel_index(np.argmax(surface), surface.shape)
    dist = np.abs(panel - hot).sum(axis=2)
    assert dist[r, c] == dist.min()
    # Recovered message: the left panel's grey levels follow the stored array.
    img = np.asarray(figures.message_figure(recovered, reference).convert("L")).astype(float)
    m = recovered.shape[0]
    left = img[30:30 + 2 * m, 20:20 + 2 * m][::2, ::2]
    right = img[30:30 + 2 * m, 40 + 2 * m:40 + 4 * m][::2, ::2]
    lo, hi = float(reference.min()), float(reference.max())
    want = np.clip((recovered - lo) / (hi - lo), 0, 1) * 255
    assert np.corrcoef(left.ravel(), want.ravel())[0, 1] > 0.99
    assert np.corrcoef(right.ravel(), reference.ravel())[0, 1] > 0.99
    # Decoy histogram: the observed line (accent colour) sits right of every decoy bar.
    img = np.asarray(Image.open(built_case.case / figs["decoys"]).convert("RGB")).astype(int)
    accent = np.all(np.abs(img - np.array(figures.ACCENT)) < 10, axis=2)[30:250]
    bars = np.all(np.abs(img - np.array(figures.BAR)) < 10, axis=2)[30:250]
    assert accent.any() and bars.any()
    assert np.nonzero(accent.any(axis=0))[0].min() > np.nonzero(bars.any(axis=0))[0].max()


def test_decoy_figure_places_the_observed_score():
    """An independent check of the axis: a score at the axis end is drawn at its right end."""
    img = figures.decoy_figure([1.0, 2.0, 2.5], 10.0)
    a = np.asarray(img.convert("RGB")).astype(int)
    accent = np.all(np.abs(a - np.array(figures.ACCENT)) < 10, axis=2)[40:240]
    cols = np.nonzero(accent.any(axis=0))[0]
    # xmax = 10 * 1.08 + 0.5 = 11.3; x = 60 + 10 / 11.3 * (620 - 60)
    assert abs(cols.mean() - (60 + 10 / 11.3 * 560)) < 3


def test_markup_parser():
    blocks = parse_markup("# Head\n\npara one\ncontinued\n\n- item\n[[figure:surface:E01]]\n")
    assert blocks == [("h1", "Head"), ("p", "para one continued"), ("li", "item"),
                      ("marker", "figure", "surface", "E01")]


def test_summary_for_an_unmarked_exhibit_claims_nothing(built_case):
    d = _data(built_case)
    text = _flat(render_markup(d))
    assert "**Exhibit 3. Finding.** No mark of this owner was found." in text
    assert "**Exhibit 3. Opinion.** Not evaluated: no registered work is named" in text
    assert "the owner's mark was found in 3; 2 are reported as derived from a registered work" in text


def test_report_json_and_out(built_case, tmp_path, monkeypatch, capsys):
    from claimkit.cli import main

    work = tmp_path / "case"
    shutil.copytree(built_case.case, work)
    monkeypatch.setenv("CLAIMKIT_PASSPHRASE", "harwick-bay-casework-tests")
    out = tmp_path / "dossier-copy.pdf"
    assert main(["--home", str(built_case.home), "report", str(work), "--out", str(out),
                 "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert rep["summary"]["detected"] == ["exhibit-1", "exhibit-2", "exhibit-4"]
    assert rep["summary"]["derived"] == ["exhibit-1", "exhibit-2"]
    assert out.read_bytes()[:5] == b"%PDF-"
    assert io.BytesIO(out.read_bytes()).getbuffer().nbytes == (work / "report/dossier.pdf").stat().st_size


def test_pdf_signature_check_and_certificate_chain(built_case, tmp_path):
    """The one-time signing certificate chains to the owner's Ed25519 key (OpenSSL agrees)."""
    from pyhanko.pdf_utils.reader import PdfFileReader

    from claimkit.dossier.pdfsign import check_pdf_signature
    from claimkit.evidence.profile import Profile
    from claimkit.evidence.signing import load_public_pem

    pdf = (built_case.case / "report" / "dossier.pdf").read_bytes()
    owner = load_public_pem((built_case.home / "public.pem").read_bytes())
    assert check_pdf_signature(pdf, owner).ok
    bad = bytearray(pdf)
    bad[pdf.find(b"Evidence dossier")] ^= 0x20
    probs = " ".join(check_pdf_signature(bytes(bad), owner).problems)
    assert "changed after it was signed" in probs or "does not verify" in probs
    other = Profile.create(tmp_path / "other", "Someone Else", b"other-pass")
    probs = " ".join(check_pdf_signature(pdf, other.public_key).problems)
    other.close()
    assert "not issued by the owner's key" in probs
    if shutil.which("openssl") is None:
        return
    import io as _io
    sig = PdfFileReader(_io.BytesIO(pdf)).embedded_signatures[0]
    leaf = sig.signer_cert
    root = next(c for c in sig.other_embedded_certs if c.public_key.algorithm == "ed25519")
    from asn1crypto import pem
    (tmp_path / "leaf.pem").write_bytes(pem.armor("CERTIFICATE", leaf.dump()))
    (tmp_path / "owner.pem").write_bytes(pem.armor("CERTIFICATE", root.dump()))
    proc = subprocess.run(["openssl", "verify", "-CAfile", str(tmp_path / "owner.pem"),
                           str(tmp_path / "leaf.pem")], capture_output=True, text=True,
                          check=False)
    assert proc.returncode == 0 and ": OK" in proc.stdout, proc.stdout + proc.stderr
    # And the owner certificate carries exactly the owner's public key (the profile's PEM).
    proc = subprocess.run(["openssl", "x509", "-in", str(tmp_path / "owner.pem"), "-noout",
                           "-pubkey"], capture_output=True, text=True, check=True)
    assert proc.stdout.strip() == (built_case.home / "public.pem").read_text().strip()
