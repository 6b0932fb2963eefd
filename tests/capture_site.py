"""A fictional shop served on 127.0.0.1 for the capture tests, built once per session.

Scenario (invented): Tidewater Home Goods lists a mug and a rocket poster
using Ilse Marrow's marked photos (scikit-image's ``coffee`` and ``rocket``,
marked once here), next to an unmarked cat photo (``chelsea``) reached
through a redirect, generated backgrounds in the page's CSS and in a linked
stylesheet, a tiny icon, and a missing picture (HTTP 404). The same files are served over plain HTTP (standard
library ``http.server`` in a thread) and over HTTPS with a throwaway CA and
server certificate made by the ``openssl`` command. Nothing leaves the
loopback address.

Other routes give the bad inputs: a redirect loop, a text file, an image URL
answering with HTML, a slow answer and a large one.

Test modules import the ``site`` fixture from here.
"""

from __future__ import annotations

import http.server
import shutil
import ssl
import subprocess
import threading
import time
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

PASS = "tidewater-capture-tests"
OWNER = "Ilse Marrow"

LISTING = """<!doctype html>
<html><head><meta charset="utf-8"><title>Tidewater Home Goods: kitchen</title>
<meta property="og:image" content="/img/mug.jpg">
<style>.hero {{ background-image: url("/img/banner.png"); height: 40px }}</style>
<link rel="stylesheet" href="/css/shop.css">
</head><body>
<h1>Morning mug</h1>
<img src="/img/mug.jpg" srcset="/img/mug-small.jpg 240w, /img/mug.jpg 400w" alt="mug">
<picture><source srcset="/img/poster-wide.jpg 1x" media="(min-width: 800px)">
<img src="/go/cat" alt="cushion"></picture>
<img src="/img/missing.jpg" alt="gone"><img src="/img/icon.png" alt="">
<div class="hero"></div>
<img src="data:image/gif;base64,R0lGODlhAQABAAAAACw=" alt="">
</body></html>
"""


@dataclass
class Site:
    root: Path
    home: Path
    http: str
    https: str
    ca_pem: Path
    files: Path
    work_ids: dict[str, str]
    marked: set[str]              # paths of the marked copies on the site
    unmarked: set[str]
    servers: list = field(default_factory=list)
    hits: list[str] = field(default_factory=list)

    def url(self, path: str, *, tls: bool = False) -> str:
        return (self.https if tls else self.http) + path


def _openssl(*args: str, cwd: Path) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True)


def _throwaway_tls(folder: Path) -> tuple[Path, Path, Path]:
    """A CA and a server certificate for 127.0.0.1 and localhost (EC P-256, 2 days)."""
    folder.mkdir()
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:P-256", "-nodes"]
    _openssl("req", "-x509", *ec, "-keyout", "ca.key", "-out", "ca.pem", "-days", "2",
             "-subj", "/O=Tidewater Test CA/CN=Tidewater Test Root", cwd=folder)
    _openssl("req", "-new", *ec, "-keyout", "server.key", "-out", "server.csr",
             "-subj", "/O=Tidewater Home Goods/CN=localhost", cwd=folder)
    (folder / "server.ext").write_text(
        "basicConstraints=CA:FALSE\nkeyUsage=critical,digitalSignature\n"
        "extendedKeyUsage=serverAuth\nsubjectAltName=IP:127.0.0.1,DNS:localhost\n")
    _openssl("x509", "-req", "-in", "server.csr", "-CA", "ca.pem", "-CAkey", "ca.key",
             "-CAcreateserial", "-out", "server.pem", "-days", "2", "-extfile", "server.ext",
             cwd=folder)
    return folder / "ca.pem", folder / "server.pem", folder / "server.key"


def _handler(files: Path, site_hits: list[str]):
    class Handler(http.server.SimpleHTTPRequestHandler):
        protocol_version = "HTTP/1.1"

        def __init__(self, *a, **kw):
            super().__init__(*a, directory=str(files), **kw)

        def log_message(self, *args):
            pass

        def _send(self, code: int, body: bytes, ctype: str, extra=()) -> None:
            self.send_response(code)
            self.send_header("Content-Type", ctype)
            self.send_header("Content-Length", str(len(body)))
            for k, v in extra:
                self.send_header(k, v)
            self.end_headers()
            self.wfile.write(body)

        def do_GET(self):
            site_hits.append(self.path)
            p = self.path
            if p == "/go/cat":
                return self._send(302, b"", "text/plain", [("Location", "/img/cat.jpg")])
            if p == "/loop/a":
                return self._send(302, b"", "text/plain", [("Location", "/loop/b")])
            if p == "/loop/b":
                return self._send(301, b"", "text/plain", [("Location", "/loop/a")])
            if p == "/img/fake.jpg":
                return self._send(200, b"<html><body>Sign in to see this picture</body></html>",
                                  "text/html; charset=utf-8")
            if p == "/slow.html":
                time.sleep(2.0)
                return self._send(200, b"<html></html>", "text/html")
            if p == "/big.html":
                return self._send(200, b"<html>" + b" " * 300_000 + b"</html>", "text/html")
            if p == "/chunked.html":
                body = LISTING.encode()
                self.send_response(200)
                self.send_header("Content-Type", "text/html; charset=utf-8")
                self.send_header("Transfer-Encoding", "chunked")
                self.end_headers()
                for i in range(0, len(body), 200):
                    part = body[i:i + 200]
                    self.wfile.write(f"{len(part):x}\r\n".encode() + part + b"\r\n")
                self.wfile.write(b"0\r\n\r\n")
                return None
            return super().do_GET()

        def end_headers(self):
            # An ETag as many servers send, so the dossier has one to show.
            if self.path.startswith("/img/"):
                self.send_header("ETag", f'"tw-{abs(hash(self.path)) % 10**8}"')
            super().end_headers()

    return Handler


def _serve(handler, ctx: ssl.SSLContext | None) -> tuple[http.server.ThreadingHTTPServer, str]:
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    server.daemon_threads = True
    if ctx is not None:
        server.socket = ctx.wrap_socket(server.socket, server_side=True)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    scheme = "https" if ctx else "http"
    return server, f"{scheme}://127.0.0.1:{server.server_address[1]}"


def _build(root: Path) -> Site:
    from skimage import data

    from claimkit.evidence.profile import Profile
    from claimkit.workflow import mark_file

    if shutil.which("openssl") is None:
        pytest.skip("openssl command not installed")
    home, studio, files = root / "home", root / "studio", root / "site"
    studio.mkdir()
    (files / "img").mkdir(parents=True)
    (files / "shop").mkdir()
    work_ids = {}
    with Profile.create(home, OWNER, PASS.encode()) as p:
        for name, pic in (("mug", data.coffee()[:320, 80:560]),
                          ("poster", data.rocket()[40:360, 100:580])):
            Image.fromarray(pic).save(studio / f"{name}.png")
            rep = mark_file(p, studio / f"{name}.png", studio / f"{name}-marked.png")
            work_ids[name] = rep["work_id"]
    mug = Image.open(studio / "mug-marked.png").convert("RGB")
    mug.save(files / "img" / "mug.jpg", quality=90)
    mug.resize((mug.width * 3 // 4, mug.height * 3 // 4), Image.Resampling.LANCZOS).save(
        files / "img" / "mug-small.jpg", quality=90)
    Image.open(studio / "poster-marked.png").convert("RGB").save(
        files / "img" / "poster-wide.jpg", quality=88)
    Image.fromarray(data.chelsea()[:240, :320]).save(files / "img" / "cat.jpg", quality=85)
    yy, xx = np.mgrid[0:80, 0:320]
    banner = np.stack([xx * 255 // 320, yy * 3, 255 - xx * 255 // 320], -1).astype(np.uint8)
    Image.fromarray(banner).save(files / "img" / "banner.png")
    Image.fromarray(banner[:16, :16]).save(files / "img" / "icon.png")
    (files / "shop" / "listing.html").write_text(LISTING.format())
    (files / "css").mkdir()
    (files / "css" / "shop.css").write_text(
        "body { margin: 0 }\n.tile { background: #fff url('../img/tile.png') repeat; }\n")
    Image.fromarray(np.ascontiguousarray(banner[:, :96])).save(files / "img" / "tile.png")
    (files / "shop" / "notes.txt").write_text("Tidewater Home Goods stock list\n")
    (files / "shop" / "html-image.html").write_text(
        '<html><body><img src="/img/mug.jpg"><img src="/img/fake.jpg"></body></html>')
    twenty = "".join(f'<img src="/bench/{i:02d}.jpg">' for i in range(20))
    (files / "shop" / "twenty.html").write_text(f"<html><body>{twenty}</body></html>")
    (files / "bench").mkdir()
    small = Image.open(files / "img" / "mug-small.jpg")
    for i in range(20):
        small.rotate(i * 0.5).save(files / "bench" / f"{i:02d}.jpg", quality=85)
    ca, cert, key = _throwaway_tls(root / "tls")
    hits: list[str] = []
    handler = _handler(files, hits)
    plain, http_url = _serve(handler, None)
    ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    ctx.load_cert_chain(cert, key)
    secure, https_url = _serve(handler, ctx)
    return Site(root, home, http_url, https_url, ca, files, work_ids,
                marked={"/img/mug.jpg", "/img/mug-small.jpg", "/img/poster-wide.jpg"},
                unmarked={"/img/cat.jpg", "/img/banner.png", "/img/tile.png"}, servers=[plain, secure],
                hits=hits)


_CACHE: dict[str, Site] = {}


@pytest.fixture(scope="session")
def site(tmp_path_factory) -> Site:
    """The shop, served once per session, whichever module asks first."""
    if "site" not in _CACHE:
        _CACHE["site"] = _build(tmp_path_factory.mktemp("capture-site"))
    return _CACHE["site"]


@pytest.fixture
def shop_owner(site, monkeypatch) -> Path:
    """The site owner's profile as the current one (CLAIMKIT_HOME and the passphrase set)."""
    monkeypatch.setenv("CLAIMKIT_HOME", str(site.home))
    monkeypatch.setenv("CLAIMKIT_PASSPHRASE", PASS)
    return site.home
