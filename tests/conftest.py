"""Shared fixtures.

- ``profile_home``: a fresh owner profile for "Ilse Marrow" under ``tmp_path``,
  made with :data:`TEST_PASSPHRASE`; ``CLAIMKIT_HOME`` and
  ``CLAIMKIT_PASSPHRASE`` are set for the test, so the command line finds it.
- ``profile``: that profile, opened with its secrets.
- ``local_tsa``: a throwaway CA and RFC 3161 time-stamping authority made with
  the ``openssl`` command; ``local_tsa.reply(tsq_bytes)`` answers a request
  with ``openssl ts -reply``. ``make_tsa(name)`` makes further, independent ones.
- ``demo_run``: ``claimkit demo`` run once per test session on a smaller picture; what it
  left and what it said. ``test_demo`` checks them; ``test_readme`` then runs the README's
  everyday lines in the same folder (they only add to it).

Key derivation is lowered for speed: ``CLAIMKIT_TEST_FAST_KDF=1`` is set for
the whole test session (scrypt N = 2**10 instead of 2**17), also for the
``claimkit`` processes the tests start. Real profiles never use it.
"""

from __future__ import annotations

import contextlib
import http.server
import os
import shutil
import subprocess
import threading
from dataclasses import dataclass
from pathlib import Path

import pytest

os.environ["CLAIMKIT_TEST_FAST_KDF"] = "1"

TEST_PASSPHRASE = b"harwick-bay-test-passphrase"
TEST_OWNER = "Ilse Marrow"


@pytest.fixture(autouse=True)
def _no_real_home(tmp_path, tmp_path_factory, monkeypatch):
    """Keep every test away from the real ~/.claimkit: CLAIMKIT_HOME points into tmp_path
    (an empty folder, so "no profile" still applies) unless a test sets it otherwise."""
    monkeypatch.setenv("CLAIMKIT_HOME", str(tmp_path / "no-profile-home"))
    monkeypatch.delenv("CLAIMKIT_PASSPHRASE", raising=False)
    monkeypatch.delenv("CLAIMKIT_SESSION", raising=False)     # a session of the user's shell
    # Session files go to the test's own runtime folder (beside tmp_path, not in it:
    # tests list tmp_path), never the machine's /dev/shm.
    runtime = tmp_path_factory.mktemp("runtime")
    runtime.chmod(0o700)
    monkeypatch.setenv("XDG_RUNTIME_DIR", str(runtime))


@pytest.fixture
def profile_passphrase() -> bytes:
    return TEST_PASSPHRASE


@pytest.fixture
def profile_home(tmp_path, monkeypatch) -> Path:
    """A new profile folder (owner "Ilse Marrow", passphrase :data:`TEST_PASSPHRASE`)."""
    from claimkit.evidence.profile import Profile

    home = tmp_path / "claimkit-home"
    Profile.create(home, TEST_OWNER, TEST_PASSPHRASE).close()
    monkeypatch.setenv("CLAIMKIT_HOME", str(home))
    monkeypatch.setenv("CLAIMKIT_PASSPHRASE", TEST_PASSPHRASE.decode())
    return home


@pytest.fixture
def profile(profile_home):
    """The ``profile_home`` profile, opened with its passphrase."""
    from claimkit.evidence.profile import Profile

    p = Profile.open(profile_home, TEST_PASSPHRASE)
    yield p
    p.close()


def _openssl(*args: str, cwd: Path, input: bytes | None = None) -> bytes:
    proc = subprocess.run(["openssl", *args], cwd=cwd, input=input,
                          capture_output=True, check=False)
    if proc.returncode != 0:
        raise RuntimeError(f"openssl {' '.join(args)} failed: "
                           f"{proc.stderr.decode(errors='replace')}")
    return proc.stdout


_TSA_CONF = """\
[ tsa ]
default_tsa = tsa_section

[ tsa_section ]
dir = {dir}
serial = $dir/tsaserial
crypto_device = builtin
signer_cert = $dir/tsa.pem
certs = $dir/ca.pem
signer_key = $dir/tsa.key
signer_digest = sha256
default_policy = 1.3.6.1.4.1.99999.1.1
other_policies = 1.3.6.1.4.1.99999.1.2
digests = sha256, sha384, sha512
accuracy = secs:1
clock_precision_digits = 0
ordering = yes
tsa_name = yes
ess_cert_id_chain = no
ess_cert_id_alg = {ess_alg}
"""


@dataclass
class LocalTSA:
    """A throwaway time-stamping authority run by ``openssl ts -reply``.

    Attributes
    ----------
    dir : Path
        Its files: ``ca.pem`` (trust anchor), ``tsa.pem``/``tsa.key`` (signer),
        ``tsa.cnf`` (the ``openssl ts`` configuration).
    """

    dir: Path
    name: str

    @property
    def ca_cert(self) -> Path:
        return self.dir / "ca.pem"

    @property
    def tsa_cert(self) -> Path:
        return self.dir / "tsa.pem"

    @property
    def config(self) -> Path:
        return self.dir / "tsa.cnf"

    def reply(self, tsq: bytes) -> bytes:
        """Answer a DER TimeStampReq with a DER TimeStampResp (``openssl ts -reply``)."""
        q = self.dir / "last.tsq"
        r = self.dir / "last.tsr"
        q.write_bytes(tsq)
        _openssl("ts", "-reply", "-config", str(self.config), "-queryfile", str(q),
                 "-out", str(r), cwd=self.dir)
        return r.read_bytes()

    def reply_file(self, tsq_path: Path, out: Path) -> Path:
        out.write_bytes(self.reply(Path(tsq_path).read_bytes()))
        return out

    def openssl_verify(self, tsr: bytes, *, tsq: bytes | None = None,
                       digest: bytes | None = None) -> tuple[bool, str]:
        """Cross-check a response with ``openssl ts -verify`` against this TSA's CA."""
        r = self.dir / "verify.tsr"
        r.write_bytes(tsr)
        args = ["openssl", "ts", "-verify", "-in", str(r), "-CAfile", str(self.ca_cert),
                "-untrusted", str(self.tsa_cert)]
        if tsq is not None:
            (self.dir / "verify.tsq").write_bytes(tsq)
            args += ["-queryfile", str(self.dir / "verify.tsq")]
        elif digest is not None:
            args += ["-digest", digest.hex()]
        proc = subprocess.run(args, capture_output=True, text=True, check=False)
        return proc.returncode == 0, proc.stdout + proc.stderr

    @contextlib.contextmanager
    def serve(self):
        """Serve RFC 3161 over HTTP on localhost (RFC 3161 section 3.4); yields the URL."""
        tsa = self

        class Handler(http.server.BaseHTTPRequestHandler):
            def do_POST(self):
                body = self.rfile.read(int(self.headers.get("Content-Length", 0)))
                if self.headers.get("Content-Type") != "application/timestamp-query":
                    self.send_error(415)
                    return
                reply = tsa.reply(body)
                self.send_response(200)
                self.send_header("Content-Type", "application/timestamp-reply")
                self.send_header("Content-Length", str(len(reply)))
                self.end_headers()
                self.wfile.write(reply)

            def log_message(self, *args):
                pass

        server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        thread = threading.Thread(target=server.serve_forever, daemon=True)
        thread.start()
        try:
            yield f"http://127.0.0.1:{server.server_address[1]}/tsa"
        finally:
            server.shutdown()
            server.server_close()


def make_local_tsa(folder: Path, name: str = "Harwick Test TSA", *,
                   ess_alg: str = "sha256", eku: bool = True) -> LocalTSA:
    """Make a CA and a TSA certificate signed by it (EC P-256), and the ts config."""
    if shutil.which("openssl") is None:
        pytest.skip("openssl command not installed (apt-get install openssl)")
    folder.mkdir(parents=True, exist_ok=True)
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:P-256", "-nodes"]
    _openssl("req", "-x509", *ec, "-keyout", "ca.key", "-out", "ca.pem", "-days", "30",
             "-subj", f"/O=Harwick Bay Test/CN={name} Root", cwd=folder)
    _openssl("req", "-new", *ec, "-keyout", "tsa.key", "-out", "tsa.csr",
             "-subj", f"/O=Harwick Bay Test/CN={name}", cwd=folder)
    ext = "basicConstraints=CA:FALSE\nkeyUsage=critical,digitalSignature\n"
    if eku:
        ext += "extendedKeyUsage=critical,timeStamping\n"
    (folder / "tsa.ext").write_text(ext)
    _openssl("x509", "-req", "-in", "tsa.csr", "-CA", "ca.pem", "-CAkey", "ca.key",
             "-CAcreateserial", "-out", "tsa.pem", "-days", "30", "-extfile", "tsa.ext",
             cwd=folder)
    (folder / "tsaserial").write_text("01\n")
    (folder / "tsa.cnf").write_text(_TSA_CONF.format(dir=folder, ess_alg=ess_alg))
    return LocalTSA(folder, name)


@pytest.fixture
def local_tsa(tmp_path) -> LocalTSA:
    """A local RFC 3161 TSA (CA + TSA certificate) made with OpenSSL for this test."""
    return make_local_tsa(tmp_path / "tsa")


@pytest.fixture
def make_tsa(tmp_path):
    """Factory for further local TSAs: ``make_tsa("Other TSA", ess_alg="sha1", eku=True)``."""
    count = [0]

    def factory(name: str = "Other TSA", **kw) -> LocalTSA:
        count[0] += 1
        return make_local_tsa(tmp_path / f"tsa-extra-{count[0]}", name, **kw)

    return factory


@dataclass
class DemoRun:
    folder: Path          # the demo's folder, ``<root>/demo-out``
    out: dict             # what ``run_demo`` returned
    lines: list[str]      # what it said, line by line
    scenario: dict


_DEMO: dict[str, DemoRun] = {}


@pytest.fixture
def demo_run(tmp_path_factory) -> DemoRun:
    """The demo, run once per session (a relative folder, as in the README's first command)."""
    if shutil.which("openssl") is None:
        pytest.skip("openssl command not installed")
    if "demo" not in _DEMO:
        import copy

        from claimkit.demo import SCENARIO, run_demo

        root = tmp_path_factory.mktemp("demo")
        sc = copy.deepcopy(SCENARIO)
        sc["work"]["upscale"] = 1.5        # the real demo uses 3; the steps are the same
        lines: list[str] = []
        with pytest.MonkeyPatch.context() as mp:
            mp.chdir(root)
            out = run_demo(Path("demo-out"), echo=lines.append, scenario=sc, decoys=8,
                           robustness=False)   # the battery itself is covered by the case tests
        _DEMO["demo"] = DemoRun(root / "demo-out", out, lines, sc)
    return _DEMO["demo"]
