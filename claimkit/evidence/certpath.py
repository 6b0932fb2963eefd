"""Certificate paths of timestamp authorities, checked as ``openssl ts -verify`` checks them.

The path itself (names, signatures, validity periods, basic constraints, path
length, ``keyCertSign`` on every issuer, unknown critical extensions) is
validated by pyhanko-certvalidator, a maintained implementation of the RFC 5280
section 6 algorithm; claimkit only adds what RFC 5280 leaves to the application
and OpenSSL adds for time stamping:

- the TSA certificate's purpose, as OpenSSL's ``check_purpose_timestamp_sign``
  (``crypto/x509/v3_purp.c``) has it: extended key usage present, critical, and
  ``timeStamping`` only (RFC 3161 section 2.3); key usage, where present, only
  ``digitalSignature`` and/or ``nonRepudiation``;
- the trust anchor, when it issues a certificate of the path, is held to
  OpenSSL's ``check_ca`` too (RFC 5280 does not process the anchor itself;
  OpenSSL does): key usage, where present, must allow ``keyCertSign``, and basic
  constraints, where present, must say CA.

A trusted certificate that is not self-signed is a trust anchor all the same
(OpenSSL's ``-partial_chain``): the user said to trust it.

One deliberate difference: validity periods are checked at the token's time
(``genTime``), which is what a timestamp claims, where ``openssl ts -verify``
checks them at the present moment. A certificate that has expired since the
token was made does not undo the token (RFC 3161 section 4.3); the CHECK.txt
instructions give the ``-attime`` option for the same check with OpenSSL.

References
----------
D. Cooper et al., "Internet X.509 Public Key Infrastructure Certificate and
CRL Profile", RFC 5280, 2008, section 6. doi:10.17487/RFC5280
C. Adams et al., "Time-Stamp Protocol (TSP)", RFC 3161, 2001, section 2.3.
"""

from __future__ import annotations

from datetime import datetime

from asn1crypto import x509 as asn1_x509
from cryptography import x509
from cryptography.hazmat.primitives.serialization import Encoding

__all__ = ["PathRefused", "tsa_path"]


class PathRefused(Exception):
    """The TSA certificate does not validate; the message names why."""


def _asn1(cert: x509.Certificate) -> asn1_x509.Certificate:
    return asn1_x509.Certificate.load(cert.public_bytes(Encoding.DER))


def _name(cert: asn1_x509.Certificate) -> str:
    return cert.subject.human_friendly


def _check_tsa_purpose(leaf: asn1_x509.Certificate) -> None:
    """OpenSSL's X509_PURPOSE_TIMESTAMP_SIGN for the signer (v3_purp.c)."""
    eku = leaf.extended_key_usage_value
    if eku is None:
        raise PathRefused(f"the TSA certificate ({_name(leaf)}) has no extended key usage "
                          "(timeStamping is required)")
    if set(eku.native) != {"time_stamping"}:
        raise PathRefused(f"the TSA certificate ({_name(leaf)}) has extended key usage "
                          f"{', '.join(sorted(eku.native))}; only timeStamping is allowed")
    if "extended_key_usage" not in leaf.critical_extensions:
        raise PathRefused(f"the TSA certificate ({_name(leaf)}) has a non-critical extended "
                          "key usage; RFC 3161 requires it critical")
    ku = leaf.key_usage_value
    if ku is not None:
        bits = set(ku.native)
        allowed = {"digital_signature", "non_repudiation"}
        if not bits & allowed or bits - allowed:
            raise PathRefused(f"the TSA certificate ({_name(leaf)}) has key usage "
                              f"{', '.join(sorted(bits))}; only digitalSignature and/or "
                              "nonRepudiation are allowed")


def _check_anchor_as_ca(anchor: asn1_x509.Certificate) -> None:
    """OpenSSL's check_ca for the anchor when it issued the next certificate."""
    ku = anchor.key_usage_value
    if ku is not None and "key_cert_sign" not in ku.native:
        raise PathRefused(f"the trusted certificate {_name(anchor)} may not sign certificates "
                          "(key usage lacks keyCertSign): invalid CA certificate")
    bc = anchor.basic_constraints_value
    if bc is not None and not bc["ca"].native:
        raise PathRefused(f"the trusted certificate {_name(anchor)} is not a CA "
                          "(basic constraints CA:FALSE): invalid CA certificate")
    if bc is None and ku is None and not anchor.self_signed:
        raise PathRefused(f"the trusted certificate {_name(anchor)} has no basic constraints: "
                          "invalid CA certificate")


def _within(cert: asn1_x509.Certificate, when: datetime) -> None:
    v = cert["tbs_certificate"]["validity"]
    if not v["not_before"].native <= when <= v["not_after"].native:
        raise PathRefused(f"certificate {_name(cert)} was not valid at the token's time "
                          f"{when:%Y-%m-%dT%H:%M:%SZ} (valid {v['not_before'].native:%Y-%m-%d} "
                          f"to {v['not_after'].native:%Y-%m-%d})")


async def _validate(leaf, pool, anchors, when):
    from pyhanko_certvalidator import CertificateValidator, ValidationContext

    context = ValidationContext(trust_roots=anchors, other_certs=pool, moment=when,
                                allow_fetching=False, revocation_mode="soft-fail")
    validator = CertificateValidator(leaf, pool, validation_context=context)
    return await validator.async_validate_path()


def tsa_path(signer: x509.Certificate, pool: list[x509.Certificate],
             trusted: list[x509.Certificate], when: datetime) -> list[x509.Certificate]:
    """The validated path from a trusted certificate down to the TSA's signing certificate.

    Parameters
    ----------
    signer : Certificate
        The certificate whose key signed the token.
    pool : list of Certificate
        Certificates the token carries (untrusted: path candidates only).
    trusted : list of Certificate
        The trust anchors (a TSA root, or the TSA's own certificate).
    when : datetime
        The token's time; every certificate must be valid then.

    Raises
    ------
    PathRefused
        Naming the certificate and the rule it breaks.
    """
    # pyhanko-certvalidator and asyncio load here, when a path is validated: together they
    # are about a tenth of a second of start-up that commands without tokens need not pay.
    import asyncio

    from pyhanko_certvalidator.authority import CertTrustAnchor, TrustQualifiers
    from pyhanko_certvalidator.errors import (
        PathBuildingError,
        PathValidationError,
        ValidationError,
    )

    leaf = _asn1(signer)
    _check_tsa_purpose(leaf)
    roots = [_asn1(t) for t in trusted]
    if any(r.dump() == leaf.dump() for r in roots):
        _within(leaf, when)
        return [signer]
    anchors = [CertTrustAnchor(r, quals=TrustQualifiers(max_path_length=r.max_path_length))
               for r in roots]
    try:
        path = asyncio.run(_validate(leaf, [_asn1(c) for c in pool], anchors, when))
    except PathBuildingError:
        names = "; ".join(_name(r) for r in roots)
        raise PathRefused(f"the TSA certificate ({_name(leaf)}) does not chain to a trusted "
                          f"certificate ({names}): untrusted TSA") from None
    except (PathValidationError, ValidationError) as exc:
        raise PathRefused(f"the TSA certificate path does not validate: {exc}") from None
    # The anchor of a path is a trust anchor, not a certificate of the path; its certificate
    # is the one the user gave, held to OpenSSL's CA rules here.
    anchor = path.trust_anchor.certificate
    _check_anchor_as_ca(anchor)
    _within(anchor, when)
    certs = [anchor, *path.iter_certs(include_root=False)]
    return [x509.load_der_x509_certificate(c.dump()) for c in reversed(certs)]
