"""Sign the dossier PDF the PDF way (PAdES, ETSI EN 319 142) and check such a signature.

Why a one-time key: PDF readers check CMS signatures with their own crypto
library, and many in use (poppler with NSS 3.87, as in Debian 12) cannot
verify Ed25519 in CMS yet. So each report gets a fresh ECDSA P-256 key whose
X.509 certificate is issued, and signed, by the owner's Ed25519 key (itself
in a self-signed certificate). The PDF signature is made with the one-time
key, which is then discarded; any reader verifies it, and anyone can check
that the certificate was issued by the owner's key (``verify`` does).

References
----------
ETSI EN 319 142-1, "PAdES digital signatures; Part 1: Building blocks and
PAdES baseline signatures", 2016. RFC 5280 (X.509 certificates), RFC 8410
(Ed25519 in X.509).
"""

from __future__ import annotations

import datetime as dt
import io
import logging
from dataclasses import dataclass

from asn1crypto import algos
from asn1crypto import x509 as ax509
from cryptography import x509
from cryptography.hazmat.primitives import hashes
from cryptography.hazmat.primitives.asymmetric import ec, ed25519
from cryptography.hazmat.primitives.serialization import Encoding
from cryptography.x509.oid import NameOID

from claimkit.errors import Outcome

__all__ = [
    "FIELD_NAME",
    "PdfSignatureCheck",
    "check_pdf_signature",
    "owner_certificate",
    "sign_pdf",
]

FIELD_NAME = "ClaimantSignature"


def _resign(cert: x509.Certificate, profile) -> bytes:
    """Replace a certificate's signature with the owner's Ed25519 signature of its TBS part."""
    a = ax509.Certificate.load(cert.public_bytes(Encoding.DER))
    tbs = a["tbs_certificate"]
    sig = profile.sign(tbs.dump())
    return ax509.Certificate({"tbs_certificate": tbs,
                              "signature_algorithm": {"algorithm": "ed25519"},
                              "signature_value": sig}).dump()


def _name(cn: str, ou: str) -> x509.Name:
    return x509.Name([x509.NameAttribute(NameOID.COMMON_NAME, cn),
                      x509.NameAttribute(NameOID.ORGANIZATIONAL_UNIT_NAME, ou)])


def owner_certificate(profile, now: dt.datetime) -> tuple[bytes, x509.Name]:
    """A self-signed X.509 certificate (DER) for the owner's Ed25519 key."""
    name = _name(profile.owner, f"claimkit owner key {profile.public_key_fingerprint[:16]}")
    throwaway = ed25519.Ed25519PrivateKey.generate()
    cert = (x509.CertificateBuilder().subject_name(name).issuer_name(name)
            .public_key(profile.public_key)
            .serial_number(x509.random_serial_number())
            .not_valid_before(now - dt.timedelta(minutes=5))
            .not_valid_after(now + dt.timedelta(days=3650))
            .add_extension(x509.BasicConstraints(ca=True, path_length=0), critical=True)
            .add_extension(x509.KeyUsage(False, False, False, False, False, True, False,
                                         False, False), critical=True)
            .sign(throwaway, None))
    return _resign(cert, profile), name


def sign_pdf(pdf: bytes, profile, *, reason: str, location: str | None = None) -> bytes:
    """PAdES-sign ``pdf`` with a one-time P-256 key certified by the owner's key."""
    from pyhanko.pdf_utils.incremental_writer import IncrementalPdfFileWriter
    from pyhanko.sign import fields, signers
    from pyhanko_certvalidator.registry import SimpleCertificateStore

    now = dt.datetime.now(dt.timezone.utc)
    root_der, root_name = owner_certificate(profile, now)
    key = ec.generate_private_key(ec.SECP256R1())
    leaf = (x509.CertificateBuilder()
            .subject_name(_name(profile.owner, "claimkit one-time dossier signing key"))
            .issuer_name(root_name).public_key(key.public_key())
            .serial_number(x509.random_serial_number())
            .not_valid_before(now - dt.timedelta(minutes=5))
            .not_valid_after(now + dt.timedelta(days=3650))
            .add_extension(x509.BasicConstraints(ca=False, path_length=None), critical=True)
            .add_extension(x509.KeyUsage(True, True, False, False, False, False, False,
                                         False, False), critical=True)
            .sign(ed25519.Ed25519PrivateKey.generate(), None))
    leaf_der = _resign(leaf, profile)
    leaf_a = ax509.Certificate.load(leaf_der)
    root_a = ax509.Certificate.load(root_der)

    class _OneTime(signers.Signer):
        async def async_sign_raw(self, data, digest_algorithm, dry_run=False):
            return key.sign(data, ec.ECDSA(hashes.SHA256()))

    signer = _OneTime(signing_cert=leaf_a,
                      cert_registry=SimpleCertificateStore.from_certs([root_a]),
                      signature_mechanism=algos.SignedDigestAlgorithm(
                          {"algorithm": "sha256_ecdsa"}))
    meta = signers.PdfSignatureMetadata(field_name=FIELD_NAME,
                                        subfilter=fields.SigSeedSubFilter.PADES,
                                        md_algorithm="sha256", reason=reason,
                                        location=location, name=profile.owner)
    writer = IncrementalPdfFileWriter(io.BytesIO(pdf))
    out = signers.PdfSigner(meta, signer=signer).sign_pdf(writer)
    return out.getvalue()


def _ed25519_ok(key: ed25519.Ed25519PublicKey, signature: bytes, data: bytes) -> bool:
    from cryptography.exceptions import InvalidSignature

    try:
        key.verify(signature, data)
    except InvalidSignature:
        return False
    return True


@dataclass
class PdfSignatureCheck(Outcome):
    """What :func:`check_pdf_signature` found; ``problems`` empty means it holds."""

    signer: str | None = None
    signed_at: str | None = None
    whole_file: bool = False


def check_pdf_signature(pdf: bytes, owner_public_key: ed25519.Ed25519PublicKey) -> PdfSignatureCheck:
    """Check the PAdES signature and that its certificate was issued by the owner's key."""
    from pyhanko.pdf_utils.reader import PdfFileReader
    from pyhanko.sign.validation import validate_pdf_signature

    res = PdfSignatureCheck()
    try:
        reader = PdfFileReader(io.BytesIO(pdf))
        sigs = reader.embedded_signatures
    except Exception as exc:  # noqa: BLE001 - any parse failure of a hostile file is a finding
        res.problems.append(f"the PDF cannot be read ({type(exc).__name__})")
        return res
    if len(sigs) != 1:
        res.problems.append(f"expected one signature, found {len(sigs)}")
        return res
    sig = sigs[0]
    # Trust exactly one root: the embedded certificate that carries the owner's key.
    roots = [c for c in sig.other_embedded_certs + [sig.signer_cert]
             if c.public_key.algorithm == "ed25519"
             and c.public_key["public_key"].native == owner_public_key.public_bytes_raw()]
    from pyhanko_certvalidator import ValidationContext

    ctx = ValidationContext(trust_roots=roots[:1], allow_fetching=False)
    quiet = logging.getLogger("pyhanko")
    level = quiet.level
    quiet.setLevel(logging.CRITICAL)   # pyHanko logs an untrusted path as an error trace
    try:
        status = validate_pdf_signature(sig, signer_validation_context=ctx)
    except Exception as exc:  # noqa: BLE001
        res.problems.append(f"the signature cannot be checked ({type(exc).__name__}: {exc})")
        return res
    finally:
        quiet.setLevel(level)
    if not status.trusted:
        res.problems.append("the signing certificate does not chain to the owner's key")
    if not status.intact:
        res.problems.append("the PDF was changed after it was signed (digest mismatch)")
    if not status.valid:
        res.problems.append("the PDF signature does not verify")
    cov = str(getattr(status, "coverage", ""))
    res.whole_file = cov.endswith("ENTIRE_FILE")
    if not res.whole_file:
        res.problems.append(f"the signature does not cover the whole file ({cov})")
    signer_cert = sig.signer_cert
    res.signer = signer_cert.subject.human_friendly
    res.signed_at = status.signer_reported_dt.isoformat() if status.signer_reported_dt else None
    leaf = x509.load_der_x509_certificate(signer_cert.dump())
    issued = False
    for c in sig.other_embedded_certs + [signer_cert]:
        cand = x509.load_der_x509_certificate(c.dump())
        pub = cand.public_key()
        if isinstance(pub, ed25519.Ed25519PublicKey) and pub.public_bytes_raw() == \
                owner_public_key.public_bytes_raw():
            issued = issued or _ed25519_ok(owner_public_key, leaf.signature,
                                           leaf.tbs_certificate_bytes)
    if not issued:
        res.problems.append("the signing certificate was not issued by the owner's key")
    return res
