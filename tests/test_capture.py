"""``case capture``: a page and its images kept as WARC/1.1 and taken in as exhibits.

Outside references: warcio's own ``ArchiveIterator`` with digest checking
(the WARC reader of the web-archiving community) reads what we wrote; the
files on the test server's disk are the bytes each payload must equal;
``openssl x509`` gives the server certificate the TLS facts must name;
``openssl ts -verify`` checks the WARC's timestamp token.
"""

from __future__ import annotations

import base64
import hashlib
import json
import socket
import subprocess
from pathlib import Path

import capture_site
import pytest
from warcio.archiveiterator import ArchiveIterator

from claimkit.cli import main

site = capture_site.site                # the shared fixtures (built once per session)
shop_owner = capture_site.shop_owner


def _run(capsys, *argv) -> tuple[int, str, str]:
    code = main([str(a) for a in argv])
    cap = capsys.readouterr()
    return code, cap.out, cap.err


def _new_case(tmp_path, capsys, name="case") -> Path:
    case = tmp_path / name
    assert _run(capsys, "case", "new", case, "--title", "Tidewater kitchen listing")[0] == 0
    return case


def _capture(capsys, case, *args) -> dict:
    code, out, err = _run(capsys, "case", "capture", case, *args, "--json")
    assert code == 0, err
    return json.loads(out.strip().splitlines()[-1])


def _records(warc: Path) -> list[tuple[dict, bytes, object]]:
    out = []
    with open(warc, "rb") as fh:
        for rec in ArchiveIterator(fh, check_digests="raise"):
            body = rec.content_stream().read()
            head = dict(rec.rec_headers.headers)
            head["version"] = rec.rec_headers.protocol
            out.append((head, body, rec.http_headers))
    return out


def _log_lines(home: Path) -> int:
    return len((home / "custody.jsonl").read_bytes().splitlines())


def test_capture_writes_a_warc_that_warcio_reads_back_with_every_digest(
        site, shop_owner, tmp_path, capsys):
    case = _new_case(tmp_path, capsys)
    page = site.url("/shop/listing.html")
    out = _capture(capsys, case, page, "--no-snapshot")
    warc = Path(out["warc"])
    assert warc.parent == case / "captures" and warc.name.endswith(".warc.gz")
    assert hashlib.sha256(warc.read_bytes()).hexdigest() == out["warc_sha256"]
    recs = _records(warc)               # raises on any failed block or payload digest
    assert recs[0][0]["WARC-Type"] == "warcinfo"
    assert {h["version"] for h, _, _ in recs} == {"WARC/1.1"}
    assert b"software: claimkit" in recs[0][1]
    responses = {h["WARC-Target-URI"]: (h, body, http) for h, body, http in recs
                 if h["WARC-Type"] == "response"}
    # Every exchange is there: the page, its stylesheet, six images, the redirect, its
    # target, the 404.
    paths = {"/shop/listing.html", "/img/mug.jpg", "/img/mug-small.jpg", "/img/poster-wide.jpg",
             "/img/banner.png", "/go/cat", "/img/cat.jpg", "/img/missing.jpg", "/img/icon.png",
             "/css/shop.css", "/img/tile.png"}
    assert set(responses) == {site.url(p) for p in paths}
    for path in paths - {"/go/cat", "/img/missing.jpg"}:     # the files served, byte for byte
        h, body, http = responses[site.url(path)]
        assert body == (site.files / path.lstrip("/")).read_bytes()     # the served file
        assert h["WARC-IP-Address"] == "127.0.0.1"
        assert h["WARC-Payload-Digest"] == "sha256:" + base64.b32encode(
            hashlib.sha256(body).digest()).decode()
        assert http.get_statuscode() == "200"
    assert responses[site.url("/go/cat")][2].get_statuscode() == "302"
    assert responses[site.url("/img/missing.jpg")][2].get_statuscode() == "404"
    kinds = [h["WARC-Type"] for h, _, _ in recs]
    assert kinds.count("request") == kinds.count("response") == len(paths)
    # Each request record is tied to its response and holds the request as sent.
    ids = {h["WARC-Record-ID"] for h, _, _ in recs if h["WARC-Type"] == "response"}
    assert all(h["WARC-Concurrent-To"] in ids for h, _, _ in recs if h["WARC-Type"] == "request")
    meta = [body.decode() for h, body, _ in recs if h["WARC-Type"] == "metadata"]
    assert any("image-reference: " + site.url("/img/mug-small.jpg") + " (img srcset)" in m
               for m in meta)

    # Exhibits: the five pictures and the cat behind the redirect, each with its URLs; the
    # 16 x 16 icon is too small to carry a mark and stays in the WARC only.
    assert len(out["exhibits"]) == 6
    assert any("icon.png: not taken in (16 x 16 pixels" in n for n in out["notes"])
    recs_by_url = {}
    for eid in out["exhibits"]:
        rec = json.loads((case / "exhibits" / f"{eid}.json").read_bytes())
        acq = rec["acquisition"]
        recs_by_url[acq["url"]] = rec
        assert acq["page"] == page and site.url("/") in rec["source"] and page in rec["source"]
        assert acq["warc"] == f"captures/{warc.name}" and acq["warc_sha256"] == out["warc_sha256"]
        assert rec["found"]["when"] == acq["captured"]
        assert "system clock" in rec["found"]["time_source"]
        assert rec["sha256"] == acq["payload_sha256"]
        served = responses[acq["final_url"]][1]
        assert hashlib.sha256(served).hexdigest() == rec["sha256"]
        assert (case / rec["file"]).read_bytes() == served
    cat = recs_by_url[site.url("/go/cat")]
    assert cat["acquisition"]["final_url"] == site.url("/img/cat.jpg")
    assert cat["acquisition"]["redirects"] == [site.url("/go/cat")]
    mug = recs_by_url[site.url("/img/mug.jpg")]["acquisition"]
    assert set(mug["referenced_as"]) == {"meta og:image", "img src", "img srcset"}
    assert mug["etag"] and mug["last_modified"] and mug["server_date"]
    assert recs_by_url[site.url("/img/banner.png")]["acquisition"]["referenced_as"] == \
        ["style block background"]
    assert recs_by_url[site.url("/img/tile.png")]["acquisition"]["referenced_as"] == \
        [f"stylesheet {site.url('/css/shop.css')} background"]
    # The custody log: the capture, then each intake.
    entries = [json.loads(x) for x in (site.home / "custody.jsonl").read_bytes().splitlines()]
    cap = [e for e in entries if e["action"] == "web pages captured"][-1]
    assert cap["items"]["warc"] == out["warc_sha256"]
    assert cap["details"]["capture_id"] == out["capture_id"]
    assert _run(capsys, "log", "verify")[0] == 0
    assert not list(case.glob(".cap-*"))                           # no work folder left


def test_https_capture_records_the_servers_certificate_chain(site, shop_owner, tmp_path,
                                                             capsys):
    case = _new_case(tmp_path, capsys)
    page = site.url("/shop/listing.html", tls=True)
    out = _capture(capsys, case, page, "--no-snapshot", "--ca-file", site.ca_pem)
    rec = json.loads((case / "captures" / f"{out['capture_id']}.json").read_bytes())
    tls = rec["pages"][0]["tls"]
    # openssl's own reading of the server certificate (outside reference)
    der = subprocess.run(["openssl", "x509", "-in", site.root / "tls" / "server.pem",
                          "-outform", "DER"], capture_output=True, check=True).stdout
    assert tls["chain_sha256"][0] == hashlib.sha256(der).hexdigest()
    assert tls["chain_verified"] is True and tls["protocol"].startswith("TLSv1.")
    assert "CN=localhost" in tls["subject"] and "CN=Tidewater Test Root" in tls["issuer"]
    meta = [body.decode() for h, body, _ in _records(Path(out["warc"]))
            if h["WARC-Type"] == "metadata" and h["WARC-Target-URI"] == page]
    chain = [line.split(": ", 1)[1] for m in meta for line in m.splitlines()
             if line.startswith("tls-certificate: ")]
    assert base64.b64decode(chain[0]) == der
    # Without the CA the chain does not verify: recorded, not fatal.
    case2 = _new_case(tmp_path, capsys, "case2")
    out2 = _capture(capsys, case2, site.url("/img/poster-wide.jpg", tls=True), "--no-snapshot")
    rec2 = json.loads((case2 / "exhibits" / f"{out2['exhibits'][0]}.json").read_bytes())
    assert rec2["acquisition"]["tls"]["chain_verified"] is False
    assert "certificate" in rec2["acquisition"]["tls"]["verify_error"]
    assert rec2["acquisition"]["page"] == site.url("/img/poster-wide.jpg", tls=True)


def test_capture_timestamps_the_warc_digest(site, shop_owner, tmp_path, capsys, local_tsa):
    case = _new_case(tmp_path, capsys)
    with local_tsa.serve() as tsa_url:
        out = _capture(capsys, case, site.url("/img/mug.jpg"), "--no-snapshot",
                       "--tsa-url", tsa_url, "--tsa-cert", local_tsa.ca_cert)
    token = case / out["token"]["file"]
    assert hashlib.sha256(token.read_bytes()).hexdigest() == out["token"]["sha256"]
    # openssl ts -verify: the token covers the WARC file's SHA-256 and chains to the TSA's CA.
    proc = subprocess.run(["openssl", "ts", "-verify", "-token_in", "-in", token,
                           "-digest", out["warc_sha256"], "-CAfile", local_tsa.ca_cert,
                           "-untrusted", local_tsa.tsa_cert], capture_output=True, text=True,
                          check=False)
    assert proc.returncode == 0 and "Verification: OK" in proc.stdout, proc.stdout + proc.stderr
    rec = json.loads((case / "exhibits" / f"{out['exhibits'][0]}.json").read_bytes())
    assert rec["acquisition"]["timestamp"]["gen_time"] == out["token"]["gen_time"]


def test_page_snapshot_by_chromium_is_in_the_case_and_the_warc(site, shop_owner, tmp_path,
                                                              capsys):
    from claimkit.capture.snapshot import chromium_path

    if chromium_path() is None:
        pytest.skip("Chromium not installed (apt-get install chromium)")
    from PIL import Image

    case = _new_case(tmp_path, capsys)
    out = _capture(capsys, case, site.url("/shop/listing.html"))
    shot = out["snapshots"][0]
    png = (case / shot["file"]).read_bytes()
    assert hashlib.sha256(png).hexdigest() == shot["sha256"]
    with Image.open(case / shot["file"]) as im:           # Pillow reads it as a PNG
        assert im.format == "PNG" and im.size == (shot["width"], shot["height"])
        assert im.height >= 400                           # the whole page, not one screen
    resources = [(h, body) for h, body, _ in _records(Path(out["warc"]))
                 if h["WARC-Type"] == "resource"]
    assert len(resources) == 1 and resources[0][1] == png
    assert resources[0][0]["Content-Type"] == "image/png"
    # verify's snapshot check: the stored PNG equals its resource record, and a changed one not.
    from claimkit.verify.collection import check_collection
    from claimkit.verify.report import VerifyReport

    def snapshot_checks():
        rep = VerifyReport(str(case))
        check_collection(case, [], rep)
        return [c for c in rep.checks if c["check"].startswith("snapshot ")]

    assert [c["ok"] for c in snapshot_checks()] == [True]
    stored = case / shot["file"]
    stored.chmod(0o644)
    stored.write_bytes(png[:-12] + bytes(12))
    assert [c["ok"] for c in snapshot_checks()] == [False]


def test_chromium_missing_is_said_once_and_the_capture_goes_on(site, shop_owner, tmp_path,
                                                               capsys, monkeypatch):
    monkeypatch.setenv("CLAIMKIT_CHROMIUM", "")
    monkeypatch.setenv("PATH", "/nonexistent")
    case = _new_case(tmp_path, capsys)
    code, out, err = _run(capsys, "case", "capture", case, site.url("/shop/listing.html"),
                          site.url("/chunked.html"), "--json")
    assert code == 0
    assert err.count("Chromium is not installed") == 1
    assert json.loads(out)["snapshots"] == []


def test_chunked_page_is_kept_as_sent_and_read_back_whole(site, shop_owner, tmp_path, capsys):
    case = _new_case(tmp_path, capsys)
    out = _capture(capsys, case, site.url("/chunked.html"), "--no-snapshot")
    page = next((h, body, http) for h, body, http in _records(Path(out["warc"]))
                if h.get("WARC-Target-URI") == site.url("/chunked.html")
                and h["WARC-Type"] == "response")
    assert page[2].get_header("Transfer-Encoding") == "chunked"
    from capture_site import LISTING
    assert page[1] == LISTING.encode()            # warcio de-chunks what we kept raw
    assert len(out["exhibits"]) == 6


def _closed_port() -> int:
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()
    return port


@pytest.mark.parametrize("path, extra, cause", [
    ("/loop/a", [], "redirect loop"),
    ("/shop/notes.txt", [], "not an HTML page or an image (Content-Type text/plain)"),
    ("/big.html", ["--max-bytes", "100000"], "larger than the limit of 100000 bytes"),
    ("/shop/html-image.html", [], "answers with an HTML page"),
    ("/slow.html", ["--timeout", "0.4"], "time limit"),
    ("/img/missing.jpg", [], "answered HTTP 404"),
])
def test_bad_pages_leave_the_case_and_the_log_untouched(site, shop_owner, tmp_path, capsys,
                                                        path, extra, cause):
    case = _new_case(tmp_path, capsys)
    before = _log_lines(site.home)
    url = site.url(path)
    code, out, err = _run(capsys, "case", "capture", case, url, "--no-snapshot", *extra)
    assert code == 2 and out == ""
    lines = [x for x in err.splitlines() if x.startswith("claimkit: error:")]
    assert len(lines) == 1 and cause in lines[0], err
    named = url if path != "/shop/html-image.html" else site.url("/img/fake.jpg")
    assert lines[0].startswith(f"claimkit: error: {named}: "), lines[0]
    assert "Traceback" not in err
    assert sorted(p.name for p in case.iterdir()) == ["case.json", "exhibits", "findings",
                                                       "references"]
    assert not any((case / "exhibits").iterdir())
    assert _log_lines(site.home) == before
    assert _run(capsys, "log", "verify")[0] == 0


@pytest.mark.parametrize("url, cause", [
    ("ftp://127.0.0.1/listing.html", "only http and https"),
    ("file:///etc/hostname", "only http and https"),
    ("http://127.0.0.1:{port}/", "connection refused"),
])
def test_bad_urls_are_refused_with_one_line(site, shop_owner, tmp_path, capsys, url, cause):
    case = _new_case(tmp_path, capsys)
    url = url.format(port=_closed_port())
    code, _, err = _run(capsys, "case", "capture", case, url, "--no-snapshot")
    assert code == 2 and err.startswith(f"claimkit: error: {url}: ") and cause in err
    assert not (case / "captures").exists()


def test_unresolvable_host_is_named(monkeypatch):
    """Name resolution fails without asking any resolver (getaddrinfo replaced)."""
    import socket as sock

    from claimkit.capture import fetch
    from claimkit.errors import InputError

    def fail(*a, **k):
        raise sock.gaierror(-2, "Name or service not known")

    monkeypatch.setattr(fetch.socket, "getaddrinfo", fail)
    with pytest.raises(InputError) as e:
        fetch.fetch("http://tidewater-home-goods.invalid/kitchen")
    assert "cannot resolve host 'tidewater-home-goods.invalid'" in e.value.line()


def test_srcset_parsing_follows_the_html_standard():
    """Cases from the WHATWG algorithm: commas inside URLs, trailing commas, descriptors."""
    from claimkit.capture.pagescan import parse_srcset

    assert parse_srcset("a.jpg 1x, b.jpg 2x") == ["a.jpg", "b.jpg"]
    assert parse_srcset("a.jpg,b.jpg 2x") == ["a.jpg,b.jpg"]      # one URL with a comma
    assert parse_srcset("a.jpg, b.jpg 2x") == ["a.jpg", "b.jpg"]
    assert parse_srcset(" img,1.jpg 100w , c.jpg") == ["img,1.jpg", "c.jpg"]
    assert parse_srcset("x.png 300w (foo, bar), y.png") == ["x.png", "y.png"]
    assert parse_srcset("") == []


def test_request_targets_are_ascii_as_a_browser_sends_them():
    """Spaces and non-ASCII percent-encoded as UTF-8 (RFC 3986 section 2.1), existing escapes
    kept, tabs and line breaks dropped (WHATWG URL)."""
    from claimkit.capture.fetch import check_url

    assert check_url("http://127.0.0.1:8080/kitchen/mug copy ü.jpg?size=large 2")[3] == \
        "/kitchen/mug%20copy%20%C3%BC.jpg?size=large%202"
    assert check_url("https://127.0.0.1/a%20b/c\n.png")[3] == "/a%20b/c.png"
    assert check_url("https://127.0.0.1")[1:] == ("127.0.0.1", 443, "/")
