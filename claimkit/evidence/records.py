"""Work records: the signed statement that a marked file was made from an original, and when.

A record is canonical JSON (RFC 8785) signed with the owner's Ed25519 key;
the bytes that were signed are stored and handed over as they are, and
:class:`WorkRecord` keeps them beside the decoded record.
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass, field

from claimkit import __version__
from claimkit.evidence import signing
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.keys import COMMITMENT_SCHEME, check_serial, commitment_of
from claimkit.evidence.storage import sha256_hex

__all__ = ["RECORD_TYPE", "WorkRecord", "build_record"]

RECORD_TYPE = "claimkit/work-record/v1"
_HEX64 = re.compile(r"[0-9a-f]{64}\Z")


@dataclass
class WorkRecord:
    """A registered work: the signed record as stored.

    Attributes
    ----------
    work_id : str
        ``W-TTTT-SSSSSS`` (owner tag in hex, serial in decimal).
    serial : int
        The work serial carried in the mark's payload.
    record : dict
        The record, decoded from ``canonical``.
    canonical : bytes
        The exact bytes that were signed (canonical JSON, RFC 8785).
    signature : bytes
        Ed25519 signature of ``canonical``.
    public_key : bytes
        Raw public key of the profile the record was read from (for :meth:`verify`).
    """

    work_id: str
    serial: int
    record: dict
    canonical: bytes
    signature: bytes
    public_key: bytes | None = field(default=None, repr=False)

    @classmethod
    def from_row(cls, row: tuple[str, int, bytes, bytes], public_key: bytes) -> WorkRecord:
        """From a registry row (work_id, serial, canonical, signature)."""
        work_id, serial, canonical, signature = row
        try:
            record = json.loads(canonical)
        except ValueError:
            record = {}
        return cls(work_id, serial, record, canonical, signature, public_key)

    @property
    def record_sha256(self) -> str:
        """Hex SHA-256 of the canonical record (what the custody log names)."""
        return sha256_hex(self.canonical)

    def verify(self, public_key: bytes | signing.Ed25519PublicKey | None = None) -> bool:
        """True when the signature verifies and the record names the signing key.

        Parameters
        ----------
        public_key : bytes or Ed25519PublicKey, optional
            Default: the key of the profile the record came from.
        """
        key = self.public_key if public_key is None else public_key
        if key is None:
            raise ValueError("no public key to verify against")
        if isinstance(key, bytes):
            raw = key
            key = signing.public_from_raw(key)
        else:
            raw = signing.raw_public(key)
        if not signing.verify(key, self.canonical, self.signature):
            return False
        try:
            rec = json.loads(self.canonical)
        except ValueError:
            return False
        return (rec.get("owner", {}).get("public_key_sha256") == signing.fingerprint(raw)
                and rec.get("work_id") == self.work_id and rec.get("serial") == self.serial)


def build_record(*, work_id: str, serial: int, owner: dict, opening: dict,
                 sha256_original: str, sha256_marked: str, original_name: str,
                 marked_name: str, fingerprint: str, mark_params: dict, capture: dict,
                 quality: dict, registered_at: str) -> bytes:
    """The canonical bytes of a new work record (the caller signs them).

    Parameters
    ----------
    owner : dict
        ``name``, ``public_key_sha256``, ``owner_tag`` (hex).
    opening : dict
        The opening of the key commitment; only its hash enters the record.

    Raises
    ------
    ValueError
        For a bad serial, a hash that is not lower-case hex SHA-256, or a value
        that canonical JSON cannot hold.
    """
    check_serial(serial)
    for label, value in (("sha256_original", sha256_original),
                         ("sha256_marked", sha256_marked)):
        if not isinstance(value, str) or not _HEX64.match(value):
            raise ValueError(f"{label} must be a lower-case hex SHA-256")
    record = {
        "type": RECORD_TYPE,
        "work_id": work_id,
        "serial": serial,
        "owner": owner,
        "original": {"name": original_name, "sha256": sha256_original},
        "marked": {"name": marked_name, "sha256": sha256_marked},
        "fingerprint": fingerprint,
        "mark_params": mark_params or {},
        "capture": capture or {},
        "quality": quality or {},
        "key_commitment": {"scheme": COMMITMENT_SCHEME, "value": commitment_of(opening)},
        "registered": {"time": registered_at, "time_source": "system clock"},
        "software": f"claimkit {__version__}",
    }
    try:
        return canonical_json(record)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"work record for serial {serial}: {exc}") from None
