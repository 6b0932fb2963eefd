"""Key derivations: what the owner's secrets give, and the identifiers made from them.

The 256-bit marking secret gives, by HKDF-SHA256 (RFC 5869), the 32-byte
detection seed (``info=claimkit/detection/v1``) that the numeric core
expands, and the payload-tag key (``claimkit/payload-tag/v1``) whose HMAC
makes each serial's 24-bit tag. The owner tag is public: the first two bytes
of SHA-256 of the raw Ed25519 public key.

Mark format 3 (:mod:`claimkit.mark.format3`) adds, by the same HKDF, an
owner-level synchronisation seed (``claimkit/mark3/sync/v1``, geometry only,
no claim rests on it), one seed per keyed family of works
(``claimkit/mark3/family/v1/`` || family as 2 bytes) and the key of the keyed
assignment of serials to families (``claimkit/mark3/family-assignment/v1``).
A disclosure of one format-3 work holds the sync seed and its family's seed.
"""

from __future__ import annotations

import hashlib
import hmac
import re

from cryptography.hazmat.primitives import hashes
from cryptography.hazmat.primitives.kdf.hkdf import HKDF

from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.storage import sha256_hex

__all__ = [
    "COMMITMENT_SCHEME",
    "DETECTION_INFO",
    "FORMAT3_FAMILIES",
    "FORMAT3_NAME",
    "MAX_SERIAL",
    "PAYLOAD_TAG_INFO",
    "check_serial",
    "commitment_of",
    "derive_detection_seed",
    "derive_format3_family_seed",
    "derive_format3_sync_seed",
    "derive_payload_tag",
    "format3_commitments",
    "format3_family_of",
    "format3_keys",
    "format3_keys_digest",
    "owner_tag_of",
    "parse_work_id",
    "payload_tag_key",
    "work_id_for",
]

MAX_SERIAL = 2**24 - 1
COMMITMENT_SCHEME = "sha256-canonical-json/v1"
DETECTION_INFO = b"claimkit/detection/v1"
PAYLOAD_TAG_INFO = b"claimkit/payload-tag/v1"
# Mark format 3's key hierarchy (DEVELOPERS.md "Keys"): all from the marking secret by HKDF-SHA256.
FORMAT3_SYNC_INFO = b"claimkit/mark3/sync/v1"
FORMAT3_FAMILY_INFO = b"claimkit/mark3/family/v1/"            # + family index, 2 bytes big-endian
FORMAT3_ASSIGNMENT_INFO = b"claimkit/mark3/family-assignment/v1"
FORMAT3_FAMILIES = 16     # must equal claimkit.mark.format3.FAMILIES (checked by the tests)
FORMAT3_NAME = "claimkit-mark/3"
_WORK_ID = re.compile(r"W-([0-9A-F]{4})-(\d{6,8})\Z")


def derive_detection_seed(marking_secret: bytes) -> bytes:
    """HKDF-SHA256(marking_secret, salt=None, info="claimkit/detection/v1"), 32 bytes (RFC 5869)."""
    return HKDF(algorithm=hashes.SHA256(), length=32, salt=None,
                info=DETECTION_INFO).derive(marking_secret)


def payload_tag_key(marking_secret: bytes) -> bytes:
    """HKDF-SHA256(marking_secret, salt=None, info="claimkit/payload-tag/v1"), 32 bytes."""
    return HKDF(algorithm=hashes.SHA256(), length=32, salt=None,
                info=PAYLOAD_TAG_INFO).derive(marking_secret)


def derive_payload_tag(tag_key: bytes, owner_tag: int, serial: int) -> int:
    """First 24 bits of HMAC-SHA256(tag_key, owner_tag (2 bytes) || serial (3 bytes))."""
    msg = owner_tag.to_bytes(2, "big") + serial.to_bytes(3, "big")
    return int.from_bytes(hmac.new(tag_key, msg, hashlib.sha256).digest()[:3], "big")


def commitment_of(opening: dict) -> str:
    """Hex SHA-256 of the canonical JSON of a commitment opening."""
    return sha256_hex(canonical_json(opening))


def owner_tag_of(raw_pub: bytes) -> int:
    """16-bit owner tag: the first two bytes of SHA-256 of the raw public key."""
    return int.from_bytes(hashlib.sha256(raw_pub).digest()[:2], "big")


def work_id_for(owner_tag: int, serial: int) -> str:
    """``W-TTTT-SSSSSS``: the owner tag in hex, the serial in decimal."""
    return f"W-{owner_tag:04X}-{serial:06d}"


def parse_work_id(work_id: str) -> tuple[int, int] | None:
    """(owner_tag, serial) from ``W-TTTT-SSSSSS``, or None when it is not one."""
    m = _WORK_ID.match(work_id or "")
    return (int(m.group(1), 16), int(m.group(2))) if m else None


def check_serial(serial: int) -> None:
    """Refuse anything but an integer serial in 1..MAX_SERIAL (ValueError)."""
    if not isinstance(serial, int) or isinstance(serial, bool) or not 1 <= serial <= MAX_SERIAL:
        raise ValueError(f"serial must be an integer in 1..{MAX_SERIAL}")


# ---------------------------------------------------------------- mark format 3

def _hkdf(marking_secret: bytes, info: bytes) -> bytes:
    return HKDF(algorithm=hashes.SHA256(), length=32, salt=None, info=info).derive(marking_secret)


def derive_format3_sync_seed(marking_secret: bytes) -> bytes:
    """HKDF-SHA256(marking_secret, info="claimkit/mark3/sync/v1"): the owner's synchronisation seed."""
    return _hkdf(marking_secret, FORMAT3_SYNC_INFO)


def derive_format3_family_seed(marking_secret: bytes, family: int) -> bytes:
    """HKDF-SHA256(marking_secret, info="claimkit/mark3/family/v1/" || family as 2 bytes)."""
    if not 0 <= family < FORMAT3_FAMILIES:
        raise ValueError(f"family {family} outside 0..{FORMAT3_FAMILIES - 1}")
    return _hkdf(marking_secret, FORMAT3_FAMILY_INFO + family.to_bytes(2, "big"))


def format3_family_of(marking_secret: bytes, serial: int) -> int:
    """The keyed family of a serial: HMAC-SHA256(assignment key, serial as 3 bytes), first 4 bytes mod F.

    The assignment key is HKDF(marking_secret, "claimkit/mark3/family-assignment/v1"); without
    it nobody can tell which works share a family (F divides 2^32, so every family is equally likely).
    """
    check_serial(serial)
    key = _hkdf(marking_secret, FORMAT3_ASSIGNMENT_INFO)
    digest = hmac.new(key, serial.to_bytes(3, "big"), hashlib.sha256).digest()
    return int.from_bytes(digest[:4], "big") % FORMAT3_FAMILIES


def format3_keys(marking_secret: bytes, *, serial: int | None = None) -> dict:
    """Format 3 keys as bytes: the sync seed and family seeds.

    With ``serial``, only what that work's disclosure needs: the sync seed,
    the work's family and that family's seed (its holder can detect the
    owner's works of that family, none in other families). Without, every
    family (the owner's examination). Returns ``{"sync": bytes, "families":
    {index: seed}}`` (and ``"family"`` with ``serial``).
    """
    sync = derive_format3_sync_seed(marking_secret)
    if serial is None:
        return {"sync": sync, "families": {f: derive_format3_family_seed(marking_secret, f)
                                           for f in range(FORMAT3_FAMILIES)}}
    family = format3_family_of(marking_secret, serial)
    return {"sync": sync, "family": family,
            "families": {family: derive_format3_family_seed(marking_secret, family)}}


def format3_keys_digest(keys: dict) -> str:
    """SHA-256 (hex) of sync seed || family (2 bytes) || family seed: what a format-3 record commits to."""
    family = keys["family"]
    return sha256_hex(keys["sync"] + family.to_bytes(2, "big") + keys["families"][family])


def format3_commitments(marking_secret: bytes, serial: int) -> dict:
    """What a format-3 work's key commitment adds: ``format3_keys_sha256`` (:func:`format3_keys_digest`)."""
    return {"format3_keys_sha256": format3_keys_digest(format3_keys(marking_secret, serial=serial))}
