"""TSA certificate paths: claimkit refuses every chain that ``openssl ts -verify`` refuses.

Each chain is made with ``openssl req``/``openssl x509``/``openssl ca``, each token with
``openssl ts -reply``; each token is checked twice, by ``openssl ts -verify`` (the outside
reference, OpenSSL 3's ``crypto/ts/ts_rsp_verify.c`` and ``crypto/x509/x509_vfy.c``) and by
claimkit's :func:`claimkit.evidence.timestamp.check_response`, and ``stamp attach`` through
the profile. The verdicts must agree.
"""

from __future__ import annotations

import hashlib
import subprocess
from pathlib import Path

import pytest
from conftest import _TSA_CONF, _openssl

from claimkit.errors import CheckFailed
from claimkit.evidence import timestamp

EC = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:P-256", "-nodes"]
CA_EXT = "basicConstraints=critical,CA:TRUE{pathlen}\nkeyUsage=critical,keyCertSign,cRLSign\n"
TSA_EXT = "basicConstraints=CA:FALSE\nkeyUsage=critical,digitalSignature\n" \
          "extendedKeyUsage=critical,timeStamping\n"

_CA_CNF = """\
[ ca ]
default_ca = here
[ here ]
dir = {dir}
database = $dir/index.txt
new_certs_dir = $dir
serial = $dir/serial
default_md = sha256
policy = anything
unique_subject = no
[ anything ]
commonName = supplied
organizationName = optional
"""


def _key_csr(d: Path, name: str, cn: str) -> None:
    _openssl("req", "-new", *EC, "-keyout", f"{name}.key", "-out", f"{name}.csr",
             "-subj", f"/O=Harwick Bay Test/CN={cn}", cwd=d)


def _issue(d: Path, name: str, issuer: str, ext: str, *, dates: tuple[str, str] | None = None):
    """Sign ``name``.csr with ``issuer`` (``name`` == ``issuer``: self-signed) under ``ext``."""
    (d / f"{name}.ext").write_text(ext)
    if dates is not None:       # openssl x509 cannot back-date; openssl ca can
        (d / "index.txt").write_text("")
        (d / "serial").write_text("1000\n")
        (d / "ca.cnf").write_text(_CA_CNF.format(dir=d))
        _openssl("ca", "-batch", "-config", "ca.cnf", "-in", f"{name}.csr", "-out",
                 f"{name}.pem", "-cert", f"{issuer}.pem", "-keyfile", f"{issuer}.key",
                 "-startdate", dates[0], "-enddate", dates[1], "-extfile", f"{name}.ext",
                 "-notext", cwd=d)
    elif name == issuer:
        _openssl("x509", "-req", "-in", f"{name}.csr", "-signkey", f"{name}.key", "-days", "30",
                 "-out", f"{name}.pem", "-extfile", f"{name}.ext", cwd=d)
    else:
        _openssl("x509", "-req", "-in", f"{name}.csr", "-CA", f"{issuer}.pem", "-CAkey",
                 f"{issuer}.key", "-CAcreateserial", "-days", "30", "-out", f"{name}.pem",
                 "-extfile", f"{name}.ext", cwd=d)


def build_chain(d: Path, kind: str) -> list[str]:
    """Root, intermediates and TSA certificate of one kind; returns the intermediates' names."""
    d.mkdir(parents=True)
    _key_csr(d, "root", f"{kind} Root")
    _issue(d, "root", "root", CA_EXT.format(pathlen=""))
    inter_ext = {
        "no-keycertsign": "basicConstraints=critical,CA:TRUE\nkeyUsage=critical,digitalSignature\n",
        "not-a-ca": "basicConstraints=critical,CA:FALSE\nkeyUsage=critical,keyCertSign\n",
        "path-length": CA_EXT.format(pathlen=",pathlen:0"),
    }.get(kind, CA_EXT.format(pathlen=""))
    _key_csr(d, "inter", f"{kind} Intermediate")
    dates = ("20250101000000Z", "20250601000000Z") if kind == "expired-intermediate" else None
    _issue(d, "inter", "root", inter_ext, dates=dates)
    chain = ["inter"]
    if kind == "path-length":      # a second CA below a CA that allows none
        _key_csr(d, "inter2", f"{kind} Sub-intermediate")
        _issue(d, "inter2", "inter", CA_EXT.format(pathlen=""))
        chain.append("inter2")
    tsa_ext = {
        "wrong-eku": TSA_EXT.replace("timeStamping", "codeSigning"),
        "eku-not-critical": TSA_EXT.replace("critical,timeStamping", "timeStamping"),
        "extra-eku": TSA_EXT.replace("timeStamping", "timeStamping,codeSigning"),
        "key-usage-certsign": TSA_EXT.replace("digitalSignature", "keyCertSign"),
    }.get(kind, TSA_EXT)
    _key_csr(d, "tsa", f"{kind} TSA")
    _issue(d, "tsa", chain[-1], tsa_ext)
    if tsa_ext != TSA_EXT:
        # openssl ts -reply will not sign with a certificate of another purpose; it signs
        # with a proper one for the same key, and _resign puts the improper one in its place.
        (d / "tsa.pem").rename(d / "tsa-bad.pem")
        _issue(d, "tsa", chain[-1], TSA_EXT)
    (d / "chain.pem").write_bytes(b"".join((d / f"{c}.pem").read_bytes() for c in chain))
    (d / "tsaserial").write_text("01\n")
    conf = _TSA_CONF.format(dir=d, ess_alg="sha256").replace("$dir/ca.pem", "$dir/chain.pem")
    (d / "tsa.cnf").write_text(conf)
    return chain


def _resign(d: Path, name: str) -> None:
    """Swap the TSA certificate of a response for ``tsa-bad.pem`` (same key, other
    extensions) and sign again with the TSA's key, as a TSA holding such a certificate would:
    the signer identifier, the ESS certificate hash (RFC 5035) and the signature follow."""
    bad = d / "tsa-bad.pem"
    if not bad.exists():
        return
    from asn1crypto import cms, pem
    from asn1crypto import x509 as ax509
    from cryptography.hazmat.primitives import hashes, serialization
    from cryptography.hazmat.primitives.asymmetric import ec

    cert = ax509.Certificate.load(pem.unarmor(bad.read_bytes())[2])
    resp = timestamp._response_class().load((d / name).read_bytes())
    token = resp["time_stamp_token"]
    sd = token["content"]
    sd["certificates"] = cms.CertificateSet(
        [cms.CertificateChoices(name="certificate", value=cert)]
        + [c for c in sd["certificates"] if c.chosen.subject != cert.subject])
    si = sd["signer_infos"][0]
    si["sid"] = cms.SignerIdentifier(name="issuer_and_serial_number", value={
        "issuer": cert.issuer, "serial_number": cert.serial_number})
    for attr in si["signed_attrs"]:
        if attr["type"].native == "signing_certificate_v2":
            cid = attr["values"][0]["certs"][0]
            cid["cert_hash"] = hashlib.sha256(cert.dump()).digest()
            cid["issuer_serial"] = None
    si["signed_attrs"] = cms.CMSAttributes([a for a in si["signed_attrs"]])
    key = serialization.load_pem_private_key((d / "tsa.key").read_bytes(), None)
    signed = b"\x31" + si["signed_attrs"].dump(force=True)[1:]
    si["signature"] = key.sign(signed, ec.ECDSA(hashes.SHA256()))
    (d / name).write_bytes(resp.dump(force=True))


KINDS = {  # kind -> what OpenSSL 3 says (the test checks it says so)
    "good": None,
    "no-keycertsign": "invalid CA certificate",
    "not-a-ca": "invalid CA certificate",
    "expired-intermediate": "certificate has expired",
    "path-length": "path length constraint exceeded",
    "wrong-eku": "unsuitable certificate purpose",
    "eku-not-critical": "unsuitable certificate purpose",
    "extra-eku": "unsuitable certificate purpose",
    "key-usage-certsign": "unsuitable certificate purpose",
}


@pytest.fixture(scope="module")
def chains(tmp_path_factory):
    import shutil
    if shutil.which("openssl") is None:
        pytest.skip("openssl command not installed")
    base = tmp_path_factory.mktemp("chains")
    digest = hashlib.sha256(b"Harwick Bay lighthouse, registered works").digest()
    tsq, nonce = timestamp.build_request(digest)
    out = {}
    for kind in KINDS:
        d = base / kind
        build_chain(d, kind)
        (d / "q.tsq").write_bytes(tsq)
        _openssl("ts", "-reply", "-config", "tsa.cnf", "-queryfile", "q.tsq", "-out", "r.tsr",
                 cwd=d)
        _resign(d, "r.tsr")
        out[kind] = d
    return out, digest, tsq, nonce


def _openssl_verdict(d: Path, digest: bytes, *, ca: Path | None = None) -> tuple[bool, str]:
    proc = subprocess.run(
        ["openssl", "ts", "-verify", "-digest", digest.hex(), "-in", "r.tsr",
         "-CAfile", str(ca or d / "root.pem"), "-untrusted", "chain.pem"],
        cwd=d, capture_output=True, text=True, check=False)
    return proc.returncode == 0, proc.stdout + proc.stderr


def _claimkit_verdict(d: Path, digest: bytes, nonce: int, *, ca: Path | None = None):
    trusted = timestamp.load_certificates((ca or d / "root.pem").read_bytes())
    try:
        timestamp.check_response((d / "r.tsr").read_bytes(), digest=digest, nonce=nonce,
                                 trusted=trusted)
    except CheckFailed as exc:
        return False, exc.message
    return True, ""


@pytest.mark.parametrize("kind", list(KINDS))
def test_claimkit_agrees_with_openssl_ts_verify(chains, kind):
    dirs, digest, _, nonce = chains
    d = dirs[kind]
    ok_openssl, said = _openssl_verdict(d, digest)
    want = KINDS[kind]
    # The reference's own verdict first, so that a chain that does not break what it
    # means to break cannot pass for a test.
    assert ok_openssl is (want is None), said
    if want:
        assert want in said, said
    ok_ck, why = _claimkit_verdict(d, digest, nonce)
    assert ok_ck is ok_openssl, f"claimkit: {why!r}; openssl: {said}"


def test_other_root_refused_by_both(chains):
    dirs, digest, _, nonce = chains
    other = dirs["path-length"] / "root.pem"
    assert not _openssl_verdict(dirs["good"], digest, ca=other)[0]
    ok, why = _claimkit_verdict(dirs["good"], digest, nonce, ca=other)
    assert not ok and "untrusted TSA" in why


def test_stamp_attach_refuses_what_openssl_refuses(chains, profile, tmp_path):
    """Through the profile: a request over one work, answered by each chain's TSA."""
    from test_evidence_timestamp import _works

    from claimkit.evidence.stamping import attach_stamp, request_stamp

    dirs = chains[0]
    work_id = _works(profile, 1)[0].work_id
    for kind, d in dirs.items():
        req = request_stamp(profile, [work_id])
        (d / "p.tsq").write_bytes(req.tsq)
        _openssl("ts", "-reply", "-config", "tsa.cnf", "-queryfile", "p.tsq", "-out", "p.tsr",
                 cwd=d)
        _resign(d, "p.tsr")
        ok_openssl = subprocess.run(
            ["openssl", "ts", "-verify", "-queryfile", "p.tsq", "-in", "p.tsr", "-CAfile",
             "root.pem", "-untrusted", "chain.pem"], cwd=d, capture_output=True,
            check=False).returncode == 0
        try:
            attach_stamp(profile, (d / "p.tsr").read_bytes(), (d / "root.pem").read_bytes(),
                         tsq=req.tsq)
            ok_ck = True
        except CheckFailed:
            ok_ck = False
        assert ok_ck is ok_openssl, kind


REASONS = {  # kind -> words claimkit's refusal must contain (it names the rule broken)
    "no-keycertsign": "not allowed to sign certificates",
    "not-a-ca": "is not a CA",
    "expired-intermediate": "expired",
    "path-length": "maximum path length",
    "wrong-eku": "only timeStamping",
    "eku-not-critical": "non-critical",
    "extra-eku": "only timeStamping",
    "key-usage-certsign": "key usage",
}


@pytest.mark.parametrize("kind", list(REASONS))
def test_refusal_names_the_rule(chains, kind):
    dirs, digest, _, nonce = chains
    ok, why = _claimkit_verdict(dirs[kind], digest, nonce)
    assert not ok and REASONS[kind] in why, why
