"""Benchmark of ``case capture`` (prints; asserts nothing).

Target (issue "Where the copy was found, proven"): capturing a page with 20
images completes in under 10 s on this machine, apart from the server's own
time.

A page with N images (generated photos, 640 x 480 JPEG, about 60 kB each) is
served over HTTP and HTTPS on 127.0.0.1 by the standard library's server in a
thread; the server's own time (from the request line read to the last byte
written, per request) is summed and subtracted. Three runs each: HTTP,
HTTPS, and HTTPS with a Chromium snapshot where Chromium is installed.

Run: ``python benchmarks/bench_capture.py [N]``. Needs ``openssl``.
"""

from __future__ import annotations

import http.server
import os
import ssl
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
from PIL import Image

os.environ["CLAIMKIT_TEST_FAST_KDF"] = "1"

from claimkit.capture.collect import capture_pages
from claimkit.capture.fetch import FetchOptions
from claimkit.capture.snapshot import chromium_path
from claimkit.case.store import new_case
from claimkit.evidence.profile import Profile

SERVER_SECONDS = [0.0]
_LOCK = threading.Lock()


def _site(folder: Path, n: int) -> None:
    (folder / "img").mkdir(parents=True)
    rng = np.random.default_rng(7)
    yy, xx = np.mgrid[0:480, 0:640]
    for i in range(n):
        base = np.stack([(xx + 9 * i) % 256, (yy + 5 * i) % 256, (xx + yy) % 256], -1)
        pic = np.clip(base + rng.normal(0, 12, base.shape), 0, 255).astype(np.uint8)
        Image.fromarray(pic).save(folder / "img" / f"{i:02d}.jpg", quality=85)
    tags = "".join(f'<img src="/img/{i:02d}.jpg" alt="item {i}">' for i in range(n))
    (folder / "page.html").write_text(f"<!doctype html><html><body>{tags}</body></html>")


def _server(folder: Path, ctx: ssl.SSLContext | None) -> tuple[object, str]:
    class Handler(http.server.SimpleHTTPRequestHandler):
        def __init__(self, *a, **kw):
            super().__init__(*a, directory=str(folder), **kw)

        def handle_one_request(self):
            t0 = time.perf_counter()
            super().handle_one_request()
            with _LOCK:
                SERVER_SECONDS[0] += time.perf_counter() - t0

        def log_message(self, *args):
            pass

    srv = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
    if ctx is not None:
        srv.socket = ctx.wrap_socket(srv.socket, server_side=True)
    threading.Thread(target=srv.serve_forever, daemon=True).start()
    return srv, f"{'https' if ctx else 'http'}://127.0.0.1:{srv.server_address[1]}/page.html"


def _tls(folder: Path) -> tuple[ssl.SSLContext, Path]:
    folder.mkdir()
    def run(*a):
        return subprocess.run(["openssl", *a], cwd=folder, check=True, capture_output=True)

    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:P-256", "-nodes"]
    run("req", "-x509", *ec, "-keyout", "ca.key", "-out", "ca.pem", "-days", "1",
        "-subj", "/CN=Bench Root")
    run("req", "-new", *ec, "-keyout", "s.key", "-out", "s.csr", "-subj", "/CN=localhost")
    (folder / "ext").write_text("subjectAltName=IP:127.0.0.1\n")
    run("x509", "-req", "-in", "s.csr", "-CA", "ca.pem", "-CAkey", "ca.key",
        "-CAcreateserial", "-out", "s.pem", "-days", "1", "-extfile", "ext")
    ctx = ssl.SSLContext(ssl.PROTOCOL_TLS_SERVER)
    ctx.load_cert_chain(folder / "s.pem", folder / "s.key")
    return ctx, folder / "ca.pem"


def main(n: int = 20) -> None:
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        _site(tmp / "site", n)
        ctx, ca = _tls(tmp / "tls")
        _, http_url = _server(tmp / "site", None)
        _, https_url = _server(tmp / "site", ctx)
        profile = Profile.create(tmp / "home", "Ilse Marrow", b"bench-passphrase")
        print(f"capture of a page with {n} images (640 x 480 JPEG), 3 runs each; "
              "times in seconds")
        runs = [("HTTP", http_url, False), ("HTTPS", https_url, False)]
        if chromium_path():
            runs.append(("HTTPS + snapshot", https_url, True))
        else:
            print("(Chromium not installed: no snapshot run)")
        for label, url, snap in runs:
            totals, own = [], []
            for r in range(3):
                case = new_case(tmp / f"case-{label}-{r}".replace(" ", ""), "bench", profile)
                SERVER_SECONDS[0] = 0.0
                t0 = time.perf_counter()
                res = capture_pages(case, [url], profile, snapshot=snap,
                                    options=FetchOptions(ca_file=str(ca)), notice=lambda _: None)
                total = time.perf_counter() - t0
                assert len(res.exhibit_ids) == n
                totals.append(total)
                own.append(total - SERVER_SECONDS[0])
            print(f"{label:>17}: total {statistics.median(totals):.2f}, server "
                  f"{statistics.median(totals) - statistics.median(own):.2f}, capture apart "
                  f"from the server {statistics.median(own):.2f} (target < 10)")
        profile.close()


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 20)
