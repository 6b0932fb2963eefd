"""Key disclosure for one claim: what an independent expert needs, and nothing more.

A disclosure folder holds:

``disclosure.json`` / ``disclosure.sig``
    The detection seed, the work's serial and payload tag, the opening of the
    record's key commitment, the timestamp inclusion proofs, the list of what
    is withheld, and the usual cautions; canonical JSON signed with the owner's
    Ed25519 key.
``work-record.json`` / ``work-record.sig``
    The signed work record, byte for byte as signed.
``public-key.pem``
    The owner's Ed25519 public key.
``timestamps/T-*.tst``, ``timestamps/T-*.tsa.pem``
    Each RFC 3161 token covering the record and the TSA certificate it was
    checked against.
``CHECK.txt``
    How to re-check every signature with the ``openssl`` command.

What a disclosure reveals, and what it does not (the README states the same):

It reveals the owner's 32-byte detection seed (from which the carrier, pilot
and payload positions are derived), the work's serial and 24-bit payload tag,
the opening of the key commitment in the signed record, the public key, the
signed record, and each RFC 3161 token covering it with its Merkle inclusion
proof. It never contains the Ed25519 signing key, the 256-bit marking secret,
or the key that makes payload tags: a holder cannot sign in the owner's name
or compute the payload tag of any other serial, so cannot make an image that
claimkit accepts as another of the owner's registered works (a blind guess of
a tag succeeds once in 2**24 tries). The detection seed is shared by all of
the owner's works: its holder can find and read the mark in any of the
owner's images, and with effort weaken or remove marks, or copy this work's
mark into another picture.
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from dataclasses import dataclass, field
from pathlib import Path

from claimkit.errors import CheckFailed, InputError, Outcome
from claimkit.evidence import merkle, signing, timestamp
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.custodylog import utc_now
from claimkit.evidence.keys import COMMITMENT_SCHEME, commitment_of
from claimkit.evidence.stamping import inclusion_proof
from claimkit.evidence.storage import atomic_write, fsync_dir, outside, sha256_hex

__all__ = ["WITHHELD", "DisclosureCheck", "check_disclosure", "write_disclosure"]

DISCLOSURE_TYPE = "claimkit/disclosure/v1"
WITHHELD = [
    "Ed25519 signing key (no one else can sign records or log entries as the owner)",
    "marking secret (256-bit root of every derived key)",
    "payload-tag key (no payload for any other serial can be made)",
]
CAUTION = ("Technical evidence, not legal advice. The detection seed lets its holder detect, "
           "and with effort weaken, this owner's marks in any image; share it only with the "
           "parties to the dispute, and rely on counsel and the local law for how it is used.")

_CHECK_TXT = """\
Checking this disclosure with OpenSSL (no claimkit needed)
===========================================================

1. The work record and this disclosure are signed with the owner's Ed25519 key
   (RFC 8032, pure Ed25519 over the exact file bytes):

   openssl pkeyutl -verify -pubin -inkey public-key.pem -rawin \\
       -in work-record.json -sigfile work-record.sig
   openssl pkeyutl -verify -pubin -inkey public-key.pem -rawin \\
       -in disclosure.json -sigfile disclosure.sig

   Compare the SHA-256 of the raw public key with the fingerprint the owner
   published elsewhere: a key that arrives with the evidence proves nothing by
   itself.

2. The key commitment: SHA-256 of the canonical JSON (RFC 8785) of
   disclosure.json's "commitment.opening" must equal the record's
   "key_commitment.value"; "opening.detection_seed_sha256" must be the SHA-256
   of the bytes of "detection.seed_hex".

3. Each timestamp token (RFC 3161) in timestamps/ covers a Merkle root
   (RFC 6962) of work records. Check the token's signature and time with:

   openssl ts -verify -digest MERKLE_ROOT -in timestamps/TOKEN.tst -token_in \\
       -CAfile timestamps/TOKEN.tsa.pem

   (add -partial_chain when TOKEN.tsa.pem is the TSA's own certificate rather
   than its CA's)

   then the record's inclusion: leaf = SHA-256(0x00 || work-record.json), nodes
   SHA-256(0x01 || left || right) along "audit_path" (disclosure.json).

{caution}
"""


def write_disclosure(profile, work_id: str, out: Path) -> Path:
    """Write the disclosure for ``work_id`` to the new folder ``out`` (all or nothing).

    Raises
    ------
    InputError
        When the work is unknown or ``out`` exists and is not an empty folder.
    """
    out = Path(out)
    work = profile.work(work_id)
    if work is None:
        raise InputError(f"no work {work_id} in this profile")
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise InputError("already exists and is not an empty folder", path=out)
    if not work.verify():
        raise CheckFailed(f"{work_id}: record signature does not verify; not disclosing "
                          "a damaged record", path=profile.home)
    opening = profile.commitment_opening(work_id)
    if commitment_of(opening) != work.record["key_commitment"]["value"]:
        raise CheckFailed(f"{work_id}: the commitment opening does not match the record",
                          path=profile.home)
    seed = profile.detection_seed
    stamps = []
    files: dict[str, bytes] = {
        "public-key.pem": profile.public_key_pem(),
        "work-record.json": work.canonical,
        "work-record.sig": work.signature,
    }
    token_ids = profile.registry.token_ids_of(work_id, by_time=False)
    for token_id in token_ids:
        proof = inclusion_proof(profile, work_id, token_id)
        files[f"timestamps/{token_id}.tst"] = proof["token"]
        files[f"timestamps/{token_id}.tsa.pem"] = proof["tsa_cert_pem"]
        stamps.append({**proof["proof"], "token_file": f"timestamps/{token_id}.tst",
                       "tsa_cert_file": f"timestamps/{token_id}.tsa.pem"})
    doc = {
        "type": DISCLOSURE_TYPE,
        "work_id": work_id,
        "created": {"time": utc_now(), "time_source": "system clock"},
        "owner": work.record["owner"],
        "detection": {
            "seed_hex": seed.hex(),
            "derivation": "HKDF-SHA256(marking secret, salt=none, info='claimkit/detection/v1')",
        },
        "payload": {"owner_tag": profile.owner_tag, "serial": work.serial,
                    "payload_tag": profile.payload_tag(work.serial)},
        "commitment": {"scheme": COMMITMENT_SCHEME,
                       "value": work.record["key_commitment"]["value"],
                       "opening": opening},
        "record": {"file": "work-record.json", "signature_file": "work-record.sig",
                   "sha256": sha256_hex(work.canonical)},
        "timestamps": stamps,
        "withheld": WITHHELD,
        "caution": CAUTION,
    }
    body = canonical_json(doc)
    files["disclosure.json"] = body
    files["disclosure.sig"] = profile.sign(body)
    files["CHECK.txt"] = _CHECK_TXT.format(caution=CAUTION).encode()

    parent = out.parent if str(out.parent) else Path(".")
    if not parent.is_dir():
        raise InputError("folder does not exist", path=parent)
    tmp = Path(tempfile.mkdtemp(dir=parent, prefix=f".{out.name}.", suffix=".part"))
    try:
        (tmp / "timestamps").mkdir()
        for name, data in files.items():
            atomic_write(tmp / name, data)
        if out.exists():
            out.rmdir()
        os.rename(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    fsync_dir(parent)
    profile.log_action("key material disclosed",
                       items={"disclosure": sha256_hex(body), "record": sha256_hex(work.canonical)},
                       details={"work_id": work_id, "folder": str(out.resolve()),
                                "withheld": ["signing key", "marking secret",
                                             "payload-tag key"]})
    return out


@dataclass
class DisclosureCheck(Outcome):
    """Result of :func:`check_disclosure`; ``problems`` empty means every check held."""

    folder: Path
    work_id: str | None = None
    detection_seed: bytes | None = None
    owner_tag: int | None = None
    serial: int | None = None
    payload_tag: int | None = None
    public_key_sha256: str | None = None
    timestamps: list[dict] = field(default_factory=list)


def _inside(folder: Path, name: str) -> Path:
    """A file named by the disclosure, refused unless it lies inside the folder (no links out)."""
    if not isinstance(name, str) or outside(folder, name) is not None:
        raise ValueError(f"{name} points outside the disclosure folder")
    return folder / name


def check_disclosure(folder: Path) -> DisclosureCheck:
    """Re-check a disclosure folder as the other side's expert would, without any secret."""
    folder = Path(folder)
    res = DisclosureCheck(folder)
    try:
        pub = signing.load_public_pem((folder / "public-key.pem").read_bytes())
        body = (folder / "disclosure.json").read_bytes()
        sig = (folder / "disclosure.sig").read_bytes()
        rec_bytes = (folder / "work-record.json").read_bytes()
        rec_sig = (folder / "work-record.sig").read_bytes()
    except FileNotFoundError as exc:
        raise InputError(f"not a disclosure folder: {Path(exc.filename).name} missing",
                         path=folder) from None
    except ValueError:
        raise InputError("public-key.pem is not an Ed25519 public key", path=folder) from None
    res.public_key_sha256 = signing.fingerprint(signing.raw_public(pub))
    if not signing.verify(pub, body, sig):
        res.problems.append("disclosure.json: signature does not verify")
    if not signing.verify(pub, rec_bytes, rec_sig):
        res.problems.append("work-record.json: signature does not verify")
    try:
        doc = json.loads(body)
        record = json.loads(rec_bytes)
    except ValueError:
        res.problems.append("disclosure.json or work-record.json is not JSON")
        return res
    res.work_id = doc.get("work_id")
    try:
        seed = bytes.fromhex(doc["detection"]["seed_hex"])
        opening = doc["commitment"]["opening"]
        res.detection_seed = seed
        res.owner_tag = doc["payload"]["owner_tag"]
        res.serial = doc["payload"]["serial"]
        res.payload_tag = doc["payload"]["payload_tag"]
    except (KeyError, ValueError, TypeError):
        res.problems.append("disclosure.json lacks the detection seed or commitment opening")
        return res
    if record.get("owner", {}).get("public_key_sha256") != res.public_key_sha256:
        res.problems.append("work-record.json names another public key")
    if record.get("work_id") != res.work_id or opening.get("work_id") != res.work_id:
        res.problems.append("work IDs of record, disclosure and opening differ")
    if record.get("serial") != res.serial:
        res.problems.append("the disclosed serial is not the record's")
    if commitment_of(opening) != record.get("key_commitment", {}).get("value"):
        res.problems.append("the commitment opening does not match the record's key commitment")
    if opening.get("detection_seed_sha256") != sha256_hex(seed):
        res.problems.append("the detection seed is not the one committed to")
    if opening.get("payload_tag") != res.payload_tag:
        res.problems.append("the payload tag is not the one committed to")
    for st in doc.get("timestamps", []):
        label = st.get("token_id", "token")
        try:
            token = _inside(folder, st["token_file"]).read_bytes()
            certs = timestamp.load_certificates(_inside(folder, st["tsa_cert_file"]).read_bytes())
            root = bytes.fromhex(st["merkle_root"])
            info = timestamp.check_token(token, digest=root, nonce=int(st["nonce"]), trusted=certs)
            path = [bytes.fromhex(p) for p in st["audit_path"]]
            if not merkle.verify_inclusion(rec_bytes, st["leaf_index"], st["tree_size"],
                                           path, root):
                res.problems.append(f"{label}: the record is not in the stamped Merkle tree")
            else:
                res.timestamps.append({"token_id": label, "gen_time": info.gen_time_iso,
                                       "tsa": info.tsa_name})
        except (OSError, KeyError, ValueError, TypeError) as exc:
            res.problems.append(f"{label}: cannot read ({exc})")
        except (CheckFailed, InputError) as exc:
            res.problems.append(f"{label}: {exc.message}")
    return res
