"""A captured page, end to end: examine claims the marked copies, the dossier says how the
copies were collected, and ``verify`` checks each exhibit against its WARC record and the
WARC's timestamp. Outside references: ``pdftotext`` (poppler) reads the signed PDF; the
tampering is done with plain file writes and Python's gzip, never with claimkit."""

from __future__ import annotations

import gzip
import json
import shutil
import zipfile
from pathlib import Path

import capture_site
import pytest

from claimkit.cli import main

site = capture_site.site                # the shared fixtures (built once per session)
shop_owner = capture_site.shop_owner

_CACHE: dict[str, dict] = {}


def _run(*argv) -> int:
    return main([str(a) for a in argv])


@pytest.fixture
def reported(site, shop_owner, tmp_path_factory, local_tsa, capsys):
    """One captured, examined and reported case (built once; later tests copy it)."""
    if "case" not in _CACHE:
        root = tmp_path_factory.mktemp("captured-case")
        case = root / "case"
        assert _run("case", "new", case, "--title", "Tidewater kitchen listing") == 0
        with local_tsa.serve() as tsa_url:
            assert _run("case", "capture", case, site.url("/shop/listing.html", tls=True),
                        "--ca-file", site.ca_pem, "--tsa-url", tsa_url,
                        "--tsa-cert", local_tsa.ca_cert, "--no-snapshot", "--json") == 0
        cap = json.loads(capsys.readouterr().out.strip().splitlines()[-1])
        assert _run("case", "examine", case, "--decoys", "4", "--no-robustness",
                    "--json") == 0
        exam = [json.loads(x) for x in capsys.readouterr().out.splitlines() if x.strip()]
        assert _run("report", case) == 0
        capsys.readouterr()
        bundle = root / "bundle.zip"
        assert _run("case", "export", case, "--out", bundle) == 0
        capsys.readouterr()
        _CACHE["case"] = {"case": case, "capture": cap, "examined": exam, "bundle": bundle}
    return _CACHE["case"]


def test_examine_claims_the_marked_copies_by_url(site, reported):
    case = reported["case"]
    claimed = set()
    for row in reported["examined"]:
        rec = json.loads((case / "exhibits" / f"{row['exhibit_id']}.json").read_bytes())
        path = "/" + rec["acquisition"]["final_url"].split("/", 3)[3]
        if row["detected"]:
            claimed.add(path)
            assert row["work_id"] in site.work_ids.values()
    assert claimed == site.marked            # the cat and the backgrounds are not claimed


def test_dossier_lists_the_collection_facts(site, reported):
    import subprocess

    if shutil.which("pdftotext") is None:
        pytest.skip("poppler-utils not installed")
    case = reported["case"]
    text = subprocess.run(["pdftotext", "-layout", case / "report" / "dossier.pdf", "-"],
                          capture_output=True, text=True, check=True).stdout
    flat = " ".join(text.split())
    cap = reported["capture"]
    assert "How the copies were collected" in flat
    assert cap["warc_sha256"] in flat.replace(" ", "") or cap["warc_sha256"][:32] in flat
    assert cap["token"]["gen_time"] in flat and "RFC 3161" in flat
    assert "CN=localhost" in flat and "Tidewater Test Root" in flat and "127.0.0.1" in flat
    assert "ETag" in flat and "Last-Modified" in flat
    data = json.loads((case / "report" / "dossier.json").read_bytes())
    rows = data["collection"]["exhibits"]
    assert len(rows) == 6 and all(r["http_status"] == 200 for r in rows)
    assert {r["url"] for r in rows} >= {site.url(p, tls=True) for p in site.marked}
    # The token came after the last WARC record (same machine clock here: a second at most
    # of TSA accuracy and rounding either way).
    cap = data["collection"]["captures"][0]
    assert -1.0 <= cap["clock_vs_token_s"] <= 60
    # "N s after the last of them", or "within a second of the last of them" (the template's
    # two wordings for a token at or after the records; which one depends on the load).
    assert "the last of them" in flat and "BEFORE" not in flat


def test_verify_checks_each_exhibit_against_its_warc_record_and_the_token(reported, capsys):
    # No key disclosure is given, so the examinations are not re-run (--no-rerun says so).
    assert _run("verify", reported["bundle"], "--no-rerun", "--json") == 0
    checks = [json.loads(x) for x in capsys.readouterr().out.splitlines()[:-1]]
    names = {c["check"]: c for c in checks}
    payload = [c for n, c in names.items() if n.endswith("WARC payload")]
    assert len(payload) == 6 and all(c["ok"] for c in payload)
    stamp = [c for n, c in names.items() if n.endswith("timestamp") and n.startswith("capture")]
    assert len(stamp) == 1 and stamp[0]["status"] == "unpinned" and stamp[0]["ok"] is None
    assert "not pinned" in stamp[0]["detail"]
    custody = [c for n, c in names.items() if n.startswith("capture") and n.endswith("custody")]
    assert len(custody) == 1 and custody[0]["ok"]


def _tampered_bundle(reported, tmp_path, change) -> Path:
    folder = tmp_path / "unpacked"
    with zipfile.ZipFile(reported["bundle"]) as zf:
        zf.extractall(folder)
    change(folder)
    return folder


def _failed(capsys, folder) -> dict:
    code = _run("verify", folder, "--json")
    rows = [json.loads(x) for x in capsys.readouterr().out.splitlines()[:-1]]
    assert code == 1
    return {r["check"]: r for r in rows if r["status"] in ("failed", "not-done")}


def test_a_swapped_warc_payload_is_caught(reported, tmp_path, capsys):
    """The WARC rewritten with one image payload replaced (digest headers fixed up too, as a
    careful forger would): the recorded WARC hash and the token catch it."""
    def change(folder: Path):
        warc = next((folder / "captures").glob("*.warc.gz"))
        raw = gzip.decompress(warc.read_bytes())
        i = raw.find(b"JFIF")
        raw = raw[:i + 40] + bytes([raw[i + 40] ^ 0xFF]) + raw[i + 41:]
        warc.chmod(0o644)
        warc.write_bytes(gzip.compress(raw))

    failed = _failed(capsys, _tampered_bundle(reported, tmp_path, change))
    assert any(n.startswith("WARC captures/") for n in failed)
    assert any(n.endswith("WARC payload") for n in failed)


def test_an_exhibit_that_is_not_its_warc_payload_is_caught(reported, tmp_path, capsys):
    """The intake record pointed at another record of the same WARC."""
    def change(folder: Path):
        recs = sorted((folder / "exhibits").glob("*.json"))
        a, b = (json.loads(p.read_bytes()) for p in recs[:2])
        a["acquisition"]["warc_record_id"] = b["acquisition"]["warc_record_id"]
        recs[0].chmod(0o644)
        recs[0].write_text(json.dumps(a))

    failed = _failed(capsys, _tampered_bundle(reported, tmp_path, change))
    assert any(n.endswith("WARC payload") and "differ" in c["detail"] for n, c in failed.items())


def test_a_capture_record_changed_after_the_capture_is_caught(reported, tmp_path, capsys):
    """The capture record rewritten (a page URL changed): the custody log recorded its hash."""
    def change(folder: Path):
        rec_path = next((folder / "captures").glob("cap-*.json"))
        rec = json.loads(rec_path.read_bytes())
        rec["pages"][0]["url"] = "https://elsewhere.example/listing.html"
        rec_path.chmod(0o644)
        rec_path.write_text(json.dumps(rec))

    failed = _failed(capsys, _tampered_bundle(reported, tmp_path, change))
    assert any(n.startswith("capture") and n.endswith("custody") for n in failed)
