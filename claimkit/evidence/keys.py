"""Key derivations: what the owner's secrets give, and the identifiers made from them.

The 256-bit marking secret gives, by HKDF-SHA256 (RFC 5869), the 32-byte
detection seed (``info=claimkit/detection/v1``) that the numeric core
expands, and the payload-tag key (``claimkit/payload-tag/v1``) whose HMAC
makes each serial's 24-bit tag. The owner tag is public: the first two bytes
of SHA-256 of the raw Ed25519 public key.
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
    "MAX_SERIAL",
    "PAYLOAD_TAG_INFO",
    "check_serial",
    "commitment_of",
    "derive_detection_seed",
    "derive_payload_tag",
    "owner_tag_of",
    "parse_work_id",
    "payload_tag_key",
    "work_id_for",
]

MAX_SERIAL = 2**24 - 1
COMMITMENT_SCHEME = "sha256-canonical-json/v1"
DETECTION_INFO = b"claimkit/detection/v1"
PAYLOAD_TAG_INFO = b"claimkit/payload-tag/v1"
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
