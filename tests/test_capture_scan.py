"""``scan`` reads WARC files: a crawl of the local shop written by Debian's ``wget
--warc-file`` (an outside WARC writer), claimkit's own capture as plain and gzip WARC, and
damaged files. Which images the crawl holds is read independently with warcio."""

from __future__ import annotations

import gzip
import json
import shutil
import subprocess
from pathlib import Path

import capture_site
import pytest
from warcio.archiveiterator import ArchiveIterator

from claimkit.cli import main

site = capture_site.site                # the shared fixtures (built once per session)
shop_owner = capture_site.shop_owner

_CACHE: dict[str, Path] = {}


def _run(capsys, *argv) -> tuple[int, str, str]:
    code = main([str(a) for a in argv])
    cap = capsys.readouterr()
    return code, cap.out, cap.err


@pytest.fixture
def wget_warc(site, tmp_path_factory) -> Path:
    """The listing page and its requisites as Debian's wget writes them (made once)."""
    if shutil.which("wget") is None:
        pytest.skip("wget not installed (apt-get install wget)")
    if "wget" not in _CACHE:
        folder = tmp_path_factory.mktemp("wget-crawl")
        proc = subprocess.run(
            ["wget", "--warc-file", str(folder / "tidewater"), "--page-requisites",
             "--no-verbose", "-e", "robots=off", "--tries", "1", "--timeout", "10",
             "--directory-prefix", str(folder / "mirror"), site.url("/shop/listing.html")],
            capture_output=True, text=True, check=False)
        # wget exits 8 when one requisite answered 404 (the missing picture): expected.
        assert proc.returncode in (0, 8), proc.stderr
        _CACHE["wget"] = folder / "tidewater.warc.gz"
    return _CACHE["wget"]


def _marked_in(warc: Path, site) -> dict[str, str]:
    """URL -> WARC-Date of each response in the WARC whose content is a marked file (warcio)."""
    marked = {(site.files / p.lstrip("/")).read_bytes(): p for p in site.marked}
    out = {}
    with open(warc, "rb") as fh:
        for rec in ArchiveIterator(fh):
            if rec.rec_type == "response":
                body = rec.content_stream().read()
                if body in marked:
                    out[rec.rec_headers.get_header("WARC-Target-URI")] = \
                        rec.rec_headers.get_header("WARC-Date")
    return out


def test_scan_finds_every_marked_image_in_a_wget_warc(site, shop_owner, wget_warc, capsys,
                                                      tmp_path):
    expected = _marked_in(wget_warc, site)
    assert site.url("/img/mug.jpg") in expected            # wget fetched the page's images
    code, out, err = _run(capsys, "scan", wget_warc, "--json", "--workers", "1")
    assert code == 0, err
    rows = [json.loads(x) for x in out.splitlines() if x.strip()]
    claimed = {r["url"]: r for r in rows if r["status"] == "mark-found"}
    assert set(claimed) == set(expected)
    for url, r in claimed.items():
        assert r["capture_date"] == expected[url] and r["file"] == str(wget_warc)
        assert r["work_id"] in site.work_ids.values() and r["warc_record_id"].startswith("<urn:")
    unclaimed = {r["url"] for r in rows if r["status"] == "not-found"}
    assert site.url("/img/cat.jpg") in unclaimed
    # The human lines name the URL and the capture date too.
    code, out, _ = _run(capsys, "scan", wget_warc, "--workers", "1")
    line = next(x for x in out.splitlines() if site.url("/img/mug.jpg") + " " in x)
    assert line.startswith("MARK FOUND") and expected[site.url("/img/mug.jpg")] in line


def test_scan_case_takes_warc_images_in_with_their_record(site, shop_owner, wget_warc, capsys,
                                                          tmp_path):
    from claimkit.capture.warc import record_payload

    case = tmp_path / "case"
    assert _run(capsys, "case", "new", case, "--title", "Tidewater crawl")[0] == 0
    before = len((site.home / "custody.jsonl").read_bytes().splitlines())
    code, _, err = _run(capsys, "scan", wget_warc, "--case", case, "--json", "--workers", "1")
    assert code == 0, err
    expected = _marked_in(wget_warc, site)
    recs = [json.loads(p.read_bytes()) for p in sorted((case / "exhibits").glob("*.json"))]
    assert {r["acquisition"]["url"] for r in recs} == set(expected)
    copies = list((case / "captures").glob("warc-*"))
    assert len(copies) == 1 and copies[0].read_bytes() == wget_warc.read_bytes()
    for r in recs:
        a = r["acquisition"]
        assert r["source"].startswith(a["url"]) and r["found"]["when"] == expected[a["url"]]
        assert "WARC-Date" in r["found"]["time_source"] and "not checked" in r["found"]["time_source"]
        assert a["warc"] == f"captures/{copies[0].name}"
        _, payload = record_payload(case / a["warc"], a["warc_record_id"])
        assert payload == (case / r["file"]).read_bytes()
        assert a["http_status"] == 200 and a["etag"]
    entries = [json.loads(x) for x in (site.home / "custody.jsonl").read_bytes().splitlines()]
    new = [e["action"] for e in entries[before:]]
    assert new == ["web archive taken in"] + ["disputed file taken in"] * len(recs)


def test_scan_reads_claimkits_own_capture_plain_and_in_a_folder(site, shop_owner, capsys,
                                                                tmp_path):
    case = tmp_path / "case"
    assert _run(capsys, "case", "new", case, "--title", "Tidewater listing")[0] == 0
    code, out, _ = _run(capsys, "case", "capture", case, site.url("/shop/listing.html"),
                        "--no-snapshot", "--json")
    warc = Path(json.loads(out)["warc"])
    crawl = tmp_path / "crawl"
    crawl.mkdir()
    plain = crawl / "listing.warc"
    plain.write_bytes(gzip.decompress(warc.read_bytes()))      # one stream of all members
    code, out, err = _run(capsys, "scan", crawl, "--json", "--workers", "1")
    assert code == 0, err
    rows = [json.loads(x) for x in out.splitlines() if x.strip()]
    claimed = {r["url"] for r in rows if r["status"] == "mark-found"}
    assert claimed == {site.url(p) for p in site.marked}
    assert all(r["file"] == str(plain) for r in rows)


@pytest.mark.parametrize("damage", ["truncated", "flipped", "not-warc"])
def test_damaged_warc_is_refused_with_one_line(site, shop_owner, wget_warc, capsys, tmp_path,
                                               damage):
    case = tmp_path / "case"
    assert _run(capsys, "case", "new", case, "--title", "Tidewater crawl")[0] == 0
    raw = gzip.decompress(wget_warc.read_bytes())
    bad = tmp_path / ("crawl.warc.gz" if damage == "truncated" else "crawl.warc")
    if damage == "truncated":
        data = wget_warc.read_bytes()
        bad.write_bytes(data[: len(data) * 2 // 3])
    elif damage == "flipped":
        i = raw.find(b"JFIF") + 200                 # inside an image payload
        bad.write_bytes(raw[:i] + bytes([raw[i] ^ 0x55]) + raw[i + 1:])
    else:
        bad.write_bytes(b"GIF89a this is not a web archive at all\r\n" * 10)
    code, out, err = _run(capsys, "scan", bad, "--case", case, "--workers", "1")
    assert code == 2 and out == ""
    errors = [x for x in err.splitlines() if x.startswith("claimkit: error:")]
    assert len(errors) == 1 and errors[0].startswith(f"claimkit: error: {bad}: "), err
    assert "Traceback" not in err
    assert not any((case / "exhibits").iterdir()) and not (case / "captures").exists()
