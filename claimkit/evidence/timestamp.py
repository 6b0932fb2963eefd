"""RFC 3161 trusted timestamps: build a request, check a response or a stored token.

A timestamp token is a CMS SignedData (RFC 5652) whose content is a TSTInfo:
the TSA's statement that it saw a given digest at a given time. A token is
accepted only when every one of these holds, and each failure says which:

1. the response status is *granted* (or *grantedWithMods*);
2. the token is SignedData over a TSTInfo, version 1;
3. the message imprint is the digest we asked about, with the algorithm we asked for;
4. the nonce is the one in our request;
5. the signed attributes carry content type = TSTInfo and a message digest
   equal to the hash of the TSTInfo;
6. the signature over the signed attributes verifies with the signer
   certificate's key (RSA PKCS #1 v1.5 or PSS, ECDSA, Ed25519);
7. the signer certificate is the one the ESS signing-certificate attribute
   (RFC 2634 / RFC 5035) names;
8. the signer certificate is for time stamping (extended key usage
   ``timeStamping`` only, critical: RFC 3161 section 2.3; key usage as OpenSSL
   requires) and valid at the token's time;
9. the signer certificate is, or has a valid RFC 5280 path (basic constraints,
   path length, key usage of every issuer) to, a certificate the user said to
   trust: :mod:`.certpath`.

Revocation (CRL/OCSP) is not checked: it needs the network, and a token made
before a revocation stays valid. Say so where it matters.

References
----------
C. Adams, P. Cain, D. Pinkas, R. Zuccherato, "Internet X.509 Public Key
Infrastructure Time-Stamp Protocol (TSP)", RFC 3161, 2001. doi:10.17487/RFC3161
R. Housley, "Cryptographic Message Syntax (CMS)", RFC 5652, 2009. doi:10.17487/RFC5652
J. Schaad, "ESS Update: Adding CertID Algorithm Agility", RFC 5035, 2007.
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass
from datetime import datetime

from asn1crypto import cms, core, tsp
from asn1crypto import x509 as asn1_x509
from cryptography import x509
from cryptography.exceptions import InvalidSignature, UnsupportedAlgorithm
from cryptography.hazmat.primitives import hashes
from cryptography.hazmat.primitives.asymmetric import ec, ed25519, padding, rsa
from cryptography.hazmat.primitives.serialization import Encoding

from claimkit.errors import CheckFailed, InputError
from claimkit.evidence import certpath

__all__ = [
    "TokenInfo",
    "build_request",
    "check_response",
    "check_token",
    "load_certificates",
    "parse_request",
    "send_request",
    "token_from_response",
    "token_imprint",
]

_HASHES = {"sha1": hashes.SHA1, "sha224": hashes.SHA224, "sha256": hashes.SHA256,
           "sha384": hashes.SHA384, "sha512": hashes.SHA512}


@dataclass
class TokenInfo:
    """What a verified token says."""

    gen_time: datetime
    serial_number: int
    policy: str
    tsa_name: str | None
    nonce: int | None
    imprint: bytes
    hash_algorithm: str
    signer_subject: str
    signer_cert_der: bytes
    token_der: bytes

    @property
    def gen_time_iso(self) -> str:
        return self.gen_time.strftime("%Y-%m-%dT%H:%M:%SZ")


class _Response(core.Sequence):
    """TimeStampResp with the token optional, as RFC 3161 section 2.4.2 has it
    (asn1crypto's own class requires the token, so a refusal would not parse)."""

    _fields = [("status", tsp.PKIStatusInfo),  # noqa: RUF012 - asn1crypto API
               ("time_stamp_token", cms.ContentInfo, {"optional": True})]


class _Refused(Exception):
    """Internal: a check failed; becomes CheckFailed with the source file named."""


# --------------------------------------------------------------------------- requests

def build_request(digest: bytes, *, nonce: int | None = None,
                  hash_algorithm: str = "sha256") -> tuple[bytes, int]:
    """A DER TimeStampReq over ``digest`` asking for the TSA's certificate.

    Returns
    -------
    (bytes, int)
        The request and its nonce (64 random bits unless given).
    """
    if len(digest) != _HASHES[hash_algorithm].digest_size:
        raise ValueError(f"digest length {len(digest)} does not fit {hash_algorithm}")
    if nonce is None:
        nonce = int.from_bytes(os.urandom(8), "big") | 1 << 63  # full 64 bits, never 0
    req = tsp.TimeStampReq({
        "version": "v1",
        "message_imprint": {"hash_algorithm": {"algorithm": hash_algorithm},
                            "hashed_message": digest},
        "nonce": nonce,
        "cert_req": True,
    })
    return req.dump(), nonce


def parse_request(der: bytes) -> tuple[bytes, str, int | None]:
    """(digest, hash algorithm, nonce) of a DER TimeStampReq."""
    req = tsp.TimeStampReq.load(der)
    mi = req["message_imprint"]
    return (mi["hashed_message"].native, mi["hash_algorithm"]["algorithm"].native,
            req["nonce"].native)


def send_request(url: str, tsq: bytes, *, timeout: float = 30.0) -> bytes:
    """POST a request to a TSA over HTTP (RFC 3161 section 3.4); returns the response bytes."""
    # urllib.request (with http.client, email and ssl) loads only for a command that sends.
    import urllib.error
    import urllib.request

    request = urllib.request.Request(url, data=tsq, method="POST", headers={
        "Content-Type": "application/timestamp-query",
        "Accept": "application/timestamp-reply"})
    try:
        with urllib.request.urlopen(request, timeout=timeout) as resp:
            return resp.read()
    except urllib.error.HTTPError as exc:
        raise InputError(f"the TSA answered HTTP {exc.code} {exc.reason}", path=url) from None
    except (urllib.error.URLError, OSError, ValueError) as exc:
        reason = getattr(exc, "reason", exc)
        raise InputError(f"cannot reach the TSA: {reason}", path=url) from None


# --------------------------------------------------------------------------- certificates

def load_certificates(data: bytes, *, path: object = None) -> list[x509.Certificate]:
    """Certificates from PEM (one or more) or DER bytes."""
    try:
        if b"-----BEGIN" in data:
            certs = x509.load_pem_x509_certificates(data)
        else:
            certs = [x509.load_der_x509_certificate(data)]
    except ValueError:
        raise InputError("not a PEM or DER certificate", path=path) from None
    if not certs:
        raise InputError("no certificate in the file", path=path)
    return certs


def _hash_name(alg: str) -> type[hashes.HashAlgorithm]:
    try:
        return _HASHES[alg]
    except KeyError:
        raise _Refused(f"unsupported hash algorithm {alg}") from None


def _verify_signature(public_key, signature: bytes, data: bytes,
                      sig_alg: cms.SignedDigestAlgorithm, digest_alg: str) -> None:
    hash_cls = _hash_name(digest_alg)
    kind = sig_alg.signature_algo
    try:
        if isinstance(public_key, rsa.RSAPublicKey):
            if kind == "rsassa_pkcs1v15":
                public_key.verify(signature, data, padding.PKCS1v15(), hash_cls())
            elif kind == "rsassa_pss":
                params = sig_alg["parameters"]
                pss_hash = _hash_name(params["hash_algorithm"]["algorithm"].native)
                public_key.verify(signature, data, padding.PSS(
                    mgf=padding.MGF1(pss_hash()), salt_length=params["salt_length"].native),
                    pss_hash())
            else:
                raise _Refused(f"signature algorithm {kind} does not fit an RSA key")
        elif isinstance(public_key, ec.EllipticCurvePublicKey):
            if kind != "ecdsa":
                raise _Refused(f"signature algorithm {kind} does not fit an EC key")
            public_key.verify(signature, data, ec.ECDSA(hash_cls()))
        elif isinstance(public_key, ed25519.Ed25519PublicKey):
            public_key.verify(signature, data)
        else:
            raise _Refused(f"unsupported TSA key type {type(public_key).__name__}")
    except InvalidSignature:
        raise _Refused("the TSA's signature does not verify (token forged or altered)") from None


_DER = Encoding.DER


# --------------------------------------------------------------------------- checks

def token_from_response(tsr: bytes) -> bytes:
    """The DER token (ContentInfo) from a TimeStampResp, after checking its status."""
    try:
        resp = _Response.load(tsr)
        status = resp["status"]["status"].native
        text = resp["status"]["status_string"].native
        fail = resp["status"]["fail_info"].native
    except (ValueError, TypeError, KeyError):
        raise _Refused("not an RFC 3161 time-stamp response") from None
    if status not in ("granted", "granted_with_mods"):
        detail = "; ".join(" ".join(x) if isinstance(x, (list, set)) else str(x)
                           for x in (text and list(text), fail and sorted(fail)) if x)
        raise _Refused(f"the TSA refused the request: status {status}"
                       + (f" ({detail})" if detail else ""))
    token = resp["time_stamp_token"]
    if isinstance(token, core.Void) or not token.contents:
        raise _Refused("response granted but holds no token")
    return token.dump()


def token_imprint(token_der: bytes) -> tuple[bytes, str, int | None]:
    """(digest, hash algorithm, nonce) the token claims, without checking anything else."""
    tst = cms.ContentInfo.load(token_der)["content"]["encap_content_info"]["content"].parsed
    mi = tst["message_imprint"]
    return (mi["hashed_message"].native, mi["hash_algorithm"]["algorithm"].native,
            tst["nonce"].native)


def _check(token_der: bytes, digest: bytes, nonce: int | None,
           trusted: list[x509.Certificate], hash_algorithm: str) -> TokenInfo:
    try:
        info = cms.ContentInfo.load(token_der)
        if info["content_type"].native != "signed_data":
            raise _Refused("the token is not CMS SignedData")
        sd = info["content"]
        encap = sd["encap_content_info"]
        if encap["content_type"].native != "tst_info":
            raise _Refused("the token's content is not a TSTInfo")
        tst_der = encap["content"].contents
        tst = tsp.TSTInfo.load(tst_der)
        tst.native  # parse it all now, so damage is found here  # noqa: B018
        signer_infos = list(sd["signer_infos"])
        certs = [c.chosen for c in sd["certificates"] if c.name == "certificate"] \
            if sd["certificates"].native is not None else []
    except _Refused:
        raise
    except (ValueError, TypeError, KeyError, AttributeError):
        raise _Refused("the token is damaged (not valid DER/CMS)") from None

    # 2-4: what is stamped
    if tst["version"].native != "v1":
        raise _Refused(f"TSTInfo version {tst['version'].native} is not v1")
    mi = tst["message_imprint"]
    got_alg = mi["hash_algorithm"]["algorithm"].native
    got = mi["hashed_message"].native
    if got_alg != hash_algorithm or got != digest:
        raise _Refused(f"the token is for other data: it covers {got_alg}:{got.hex()}, "
                       f"expected {hash_algorithm}:{digest.hex()}")
    if nonce is not None and tst["nonce"].native != nonce:
        have = tst["nonce"].native
        raise _Refused(f"wrong nonce: the token has {have if have is not None else 'none'}, "
                       f"the request had {nonce} (a replayed or foreign response)")
    gen_time = tst["gen_time"].native

    # 5: signed attributes
    if len(signer_infos) != 1:
        raise _Refused(f"the token has {len(signer_infos)} signers, expected 1")
    si = signer_infos[0]
    digest_alg = si["digest_algorithm"]["algorithm"].native
    attrs = si["signed_attrs"]
    if not attrs.contents:
        raise _Refused("the token has no signed attributes")
    by_type: dict[str, list] = {}
    for a in attrs:
        by_type.setdefault(a["type"].native, []).append(a["values"])
    if [v.native for v in by_type.get("content_type", [[]])[0]] != ["tst_info"]:
        raise _Refused("signed content-type attribute is not TSTInfo")
    md = by_type.get("message_digest")
    if not md or md[0][0].native != hashlib.new(digest_alg, tst_der).digest():
        raise _Refused("the token's TSTInfo does not match its signed message digest "
                       "(content altered)")

    # find the signer certificate
    sid = si["sid"]
    signer_asn1 = None
    for c in certs + [asn1_x509.Certificate.load(t.public_bytes(_DER)) for t in trusted]:
        if sid.name == "issuer_and_serial_number":
            if (c.issuer == sid.chosen["issuer"]
                    and c.serial_number == sid.chosen["serial_number"].native):
                signer_asn1 = c
                break
        elif c.key_identifier == sid.chosen.native:
            signer_asn1 = c
            break
    if signer_asn1 is None:
        raise _Refused("the TSA's signing certificate is neither in the token nor among the "
                       "trusted certificates")
    signer = x509.load_der_x509_certificate(signer_asn1.dump())

    # 6: signature over the DER SET OF signed attributes (RFC 5652 section 5.4)
    signed_bytes = b"\x31" + attrs.dump()[1:]
    _verify_signature(signer.public_key(), si["signature"].native, signed_bytes,
                      si["signature_algorithm"], digest_alg)

    # 7: ESS signing certificate
    cert_der = signer_asn1.dump()
    ess_v2 = by_type.get("signing_certificate_v2")
    ess_v1 = by_type.get("signing_certificate")
    if ess_v2:
        cid = ess_v2[0][0]["certs"][0]
        alg = cid["hash_algorithm"]["algorithm"].native if cid["hash_algorithm"].native \
            else "sha256"
        ok = cid["cert_hash"].native == hashlib.new(alg, cert_der).digest()
    elif ess_v1:
        cid = ess_v1[0][0]["certs"][0]
        ok = cid["cert_hash"].native == hashlib.sha1(cert_der).digest()
    else:
        raise _Refused("the token lacks the ESS signing-certificate attribute")
    if not ok:
        raise _Refused("the ESS signing-certificate attribute names another certificate "
                       "(signer certificate substituted)")

    # 8-9: a time-stamping certificate on a path to a trusted one (certpath: RFC 5280
    # path validation by pyhanko-certvalidator, and OpenSSL's time-stamping purpose)
    pool = [x509.load_der_x509_certificate(c.dump()) for c in certs]
    try:
        certpath.tsa_path(signer, pool, trusted, gen_time)
    except certpath.PathRefused as exc:
        raise _Refused(str(exc)) from None

    tsa = tst["tsa"]
    return TokenInfo(
        gen_time=gen_time, serial_number=tst["serial_number"].native,
        policy=tst["policy"].native, tsa_name=_tsa_name(tsa),
        nonce=tst["nonce"].native, imprint=got, hash_algorithm=got_alg,
        signer_subject=signer.subject.rfc4514_string(), signer_cert_der=cert_der,
        token_der=token_der)


# What a damaged token can raise once past the first parse (bad key, bad certificate, ...).
_DAMAGE = (ValueError, TypeError, KeyError, AttributeError, IndexError, UnsupportedAlgorithm)


def _tsa_name(tsa) -> str | None:
    """The TSA's name from TSTInfo (its common name when it is a directory name)."""
    if not tsa.native:
        return None
    if tsa.name == "directory_name":
        return tsa.chosen.native.get("common_name") or tsa.chosen.human_friendly
    return str(tsa.native)


def check_token(token_der: bytes, *, digest: bytes, nonce: int | None,
                trusted: list[x509.Certificate], hash_algorithm: str = "sha256",
                path: object = None) -> TokenInfo:
    """Check a stored token (a CMS ContentInfo) against the digest and nonce it must cover.

    Raises
    ------
    CheckFailed
        Naming the first check that failed.
    """
    try:
        return _check(token_der, digest, nonce, trusted, hash_algorithm)
    except _Refused as exc:
        raise CheckFailed(str(exc), path=path) from None
    except _DAMAGE as exc:
        raise CheckFailed(f"the token is damaged ({type(exc).__name__}: {exc})",
                          path=path) from None


def check_response(tsr: bytes, *, digest: bytes, nonce: int | None,
                   trusted: list[x509.Certificate], hash_algorithm: str = "sha256",
                   path: object = None) -> TokenInfo:
    """Check a DER TimeStampResp: status, then every check of :func:`check_token`."""
    try:
        token = token_from_response(tsr)
        return _check(token, digest, nonce, trusted, hash_algorithm)
    except _Refused as exc:
        raise CheckFailed(str(exc), path=path) from None
    except _DAMAGE as exc:
        raise CheckFailed(f"the token is damaged ({type(exc).__name__}: {exc})",
                          path=path) from None
