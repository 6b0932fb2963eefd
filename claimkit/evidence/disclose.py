"""Key disclosure for one claim: what an independent expert needs, and nothing more.

A disclosure folder holds:

``disclosure.json`` / ``disclosure.sig``
    The work's serial, the record's key commitment, the timestamp inclusion
    proofs, the list of what is withheld, the usual cautions and, only when
    key material is disclosed, ``keys`` (seeds by name, their scope), the
    payload tag and the commitment's opening; canonical JSON signed with the
    owner's Ed25519 key.
``work-record.json`` / ``work-record.sig``
    The signed work record, byte for byte as signed.
``public-key.pem``
    The owner's Ed25519 public key.
``timestamps/T-*.tst``, ``timestamps/T-*.tsa.pem``
    Each RFC 3161 token covering the record and the TSA certificate it was
    checked against.
``CHECK.txt``
    How to re-check every signature with the ``openssl`` command.

Disclosure is a choice. Without key material (``keys=False``, what a bundle
holds by default) the same folder carries only what anyone may see: the
signed record, the commitment value, the public key and the timestamps. With
it, ``disclosure.json`` adds the key material the work's mark format needs
(:func:`disclosed_keys`), the payload tag and the commitment opening.

What key material reveals depends on the mark format, and the disclosure
says so in ``keys.scope``: formats 1 and 2 use the owner-level detection
seed, so their disclosure finds every format-1/2 work of the owner; a format
that derives a key per family of works registers its own provider in
:data:`KEY_MATERIAL`, whose scope is that family. A disclosure never contains
the Ed25519 signing key, the 256-bit marking secret, or the key that makes
payload tags: its holder cannot sign in the owner's name or compute the
payload tag of any other serial (a blind guess succeeds once in 2**24 tries).
"""

from __future__ import annotations

import json
import os
import shutil
import tempfile
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from claimkit.errors import CheckFailed, InputError, Outcome
from claimkit.evidence import keys as keys_module
from claimkit.evidence import merkle, signing, timestamp
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.custodylog import utc_now
from claimkit.evidence.keys import COMMITMENT_SCHEME, commitment_of
from claimkit.evidence.stamping import inclusion_proof
from claimkit.evidence.storage import atomic_write, fsync_dir, outside, sha256_hex

__all__ = [
    "COMMITMENT_CHECKS",
    "KEY_MATERIAL",
    "WITHHELD",
    "DisclosedKeys",
    "DisclosureCheck",
    "check_disclosure",
    "disclosed_keys",
    "what_it_reveals",
    "write_disclosure",
]

DISCLOSURE_TYPE = "claimkit/disclosure/v2"
WITHHELD = [
    "Ed25519 signing key (no one else can sign records or log entries as the owner)",
    "marking secret (256-bit root of every derived key)",
    "payload-tag key (no payload for any other serial can be made)",
]
CAUTION = ("Technical evidence, not legal advice. Disclosed key material lets its holder "
           "detect, and with effort weaken, the owner's marks within its scope (keys.scope); "
           "share it only with the parties to the dispute, and rely on counsel and the local "
           "law for how it is used.")


@dataclass(frozen=True)
class DisclosedKeys:
    """The key material one work's examination needs, and what else it finds.

    ``seeds`` maps a name the examiner knows (``detection`` for formats 1 and 2)
    to the bytes; ``scope`` says in words which works the material detects,
    ``finds_all_owner_works`` whether that is every work of the owner's in the
    format.
    """

    mark_format: str
    seeds: dict[str, bytes]
    derivation: dict[str, str]
    scope: str
    finds_all_owner_works: bool

    def as_json(self) -> dict:
        return {"format": self.mark_format, "scope": self.scope,
                "finds_all_owner_works": self.finds_all_owner_works,
                "seeds": {k: v.hex() for k, v in sorted(self.seeds.items())},
                "derivation": dict(sorted(self.derivation.items()))}


def _owner_level(profile, work) -> DisclosedKeys:
    """Formats 1 and 2: one detection seed for all of the owner's works."""
    return DisclosedKeys(
        mark_format=_format_of(work), seeds={"detection": profile.detection_seed},
        derivation={"detection": "HKDF-SHA256(marking secret, salt=none, "
                                 "info='claimkit/detection/v1')"},
        scope="this disclosure finds every format-1/2 work of the owner (the detection seed "
              "is owner-level in these formats), not only this work",
        finds_all_owner_works=True)


def _one_family(profile, work) -> DisclosedKeys:
    """Format 3: the owner's sync seed (geometry only) and the seed of this work's family.

    No owner-level detection seed: its holder detects the works of this family and
    none of the owner's other families (nor any format-1/2 work)."""
    k = profile.format3_disclosure_keys(work.serial)
    family = k["family"]
    return DisclosedKeys(
        mark_format=_format_of(work),
        seeds={"sync": k["sync"], "family": k["families"][family]},
        derivation={"sync": "HKDF-SHA256(marking secret, salt=none, "
                            "info='claimkit/mark3/sync/v1')",
                    "family": "HKDF-SHA256(marking secret, salt=none, info="
                              f"'claimkit/mark3/family/v1/' || {family} as 2 bytes)",
                    "family_index": str(family)},
        scope=f"this disclosure finds the owner's format-3 works of family {family} (about one "
              "in 16 of them, which ones only the owner can tell), no work of another family "
              "and no format-1/2 work; the sync seed reveals only the geometry grid",
        finds_all_owner_works=False)


#: mark format name -> provider of the key material its disclosure carries. A format
#: with per-family keys adds itself here (the evidence layer owns the derivation).
KEY_MATERIAL: dict[str, Callable[..., DisclosedKeys]] = {
    "claimkit-mark/1": _owner_level,
    "claimkit-mark/2": _owner_level,
    "claimkit-mark/3": _one_family,
}


def _seed_hashes(opening: dict, keys: dict, seeds: dict[str, bytes]) -> list[str]:
    """Formats 1 and 2: the opening commits to SHA-256 of each seed, as NAME_seed_sha256."""
    return [f"the {name} seed is not the one committed to" for name, seed in seeds.items()
            if opening.get(f"{name}_seed_sha256") != sha256_hex(seed)]


def _family_digest(opening: dict, keys: dict, seeds: dict[str, bytes]) -> list[str]:
    """Format 3: the opening commits to SHA-256(sync || family as 2 bytes || family seed)."""
    try:
        family = int(keys["derivation"]["family_index"])
        # The derivation arrives with format 3 itself, in evidence/keys.py (the module is
        # imported, not the name, so there is no cycle with the profile, which imports this).
        material = {"sync": seeds["sync"], "family": family, "families": {family: seeds["family"]}}
        digest = keys_module.format3_keys_digest(material)  # type: ignore[attr-defined]
    except (KeyError, ValueError, TypeError):
        return ["the format-3 key material is incomplete"]
    return [] if opening.get("format3_keys_sha256") == digest else \
        ["the format-3 keys are not the ones committed to"]


#: mark format name -> how a disclosure's seeds are checked against the record's commitment.
COMMITMENT_CHECKS: dict[str, Callable[[dict, dict, dict], list[str]]] = {
    "claimkit-mark/3": _family_digest,
}


def _format_of(work) -> str:
    return (work.record.get("mark_params") or {}).get("format", "claimkit-mark/1")


def disclosed_keys(profile, work) -> DisclosedKeys:
    """The key material a disclosure of ``work`` carries (by the work's mark format)."""
    fmt = _format_of(work)
    try:
        provider = KEY_MATERIAL[fmt]
    except KeyError:
        raise InputError(f"{work.work_id}: no key disclosure is defined for mark format "
                         f"{fmt}") from None
    return provider(profile, work)


def what_it_reveals(profile, work_ids: list[str]) -> list[str]:
    """What disclosing these works' keys reveals, one sentence each (said before it is done)."""
    out = []
    for wid in work_ids:
        work = profile.work(wid)
        if work is None:
            raise InputError(f"no work {wid} in this profile")
        keys = disclosed_keys(profile, work)
        out.append(f"{wid} ({keys.mark_format}): {', '.join(sorted(keys.seeds))} seed; "
                   f"{keys.scope}; also the work's payload tag and commitment opening")
    if out:
        out.append("never disclosed: " + "; ".join(WITHHELD))
    return out

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

2. The key commitment (only when disclosure.json carries "keys": key
   material is disclosed by choice, see "keys.scope" for what it finds):
   SHA-256 of the canonical JSON (RFC 8785) of "commitment.opening" must
   equal the record's "key_commitment.value"; for each seed NAME in
   "keys.seeds", "opening.NAME_seed_sha256" must be the SHA-256 of its bytes.

3. Each timestamp token (RFC 3161) in timestamps/ covers a Merkle root
   (RFC 6962) of work records. Check the token's signature and time with:

   openssl ts -verify -digest MERKLE_ROOT -in timestamps/TOKEN.tst -token_in \\
       -CAfile timestamps/TOKEN.tsa.pem

   (add -partial_chain when TOKEN.tsa.pem is the TSA's own certificate rather
   than its CA's; add -attime with the token's time as seconds since 1970 to
   check the certificates at that time, as claimkit does, rather than now).
   TOKEN.tsa.pem is what the owner trusted: check it against the TSA's
   published root, not against this file.

   then the record's inclusion: leaf = SHA-256(0x00 || work-record.json), nodes
   SHA-256(0x01 || left || right) along "audit_path" (disclosure.json).

{caution}
"""


#: What a claimkit 0.2 disclosure (``claimkit/disclosure/v1``, always with the detection seed)
#: finds, in the words of :attr:`DisclosureCheck.scope`.
V1_SCOPE = ("a claimkit 0.2 disclosure: its detection seed finds every format-1/2 work of the "
            "owner")


def write_disclosure(profile, work_id: str, out: Path, *, keys: bool = True) -> Path:
    """Write the disclosure for ``work_id`` to the new folder ``out`` (all or nothing).

    With ``keys=False`` the folder holds no key material (no seed, no payload tag,
    no commitment opening): the public evidence of the work only, nothing logged.

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
    opening = profile.commitment_opening(work_id) if keys else None
    if opening is not None and commitment_of(opening) != work.record["key_commitment"]["value"]:
        raise CheckFailed(f"{work_id}: the commitment opening does not match the record",
                          path=profile.home)
    material = disclosed_keys(profile, work) if keys else None
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
        "keys": material.as_json() if material else None,
        "payload": {"owner_tag": profile.owner_tag, "serial": work.serial,
                    **({"payload_tag": profile.payload_tag(work.serial)} if keys else {})},
        "commitment": {"scheme": COMMITMENT_SCHEME,
                       "value": work.record["key_commitment"]["value"],
                       **({"opening": opening} if keys else {})},
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
    if material is not None:
        # The folder's name only: an absolute path would travel with the custody excerpt.
        profile.log_action("key material disclosed",
                           items={"disclosure": sha256_hex(body),
                                  "record": sha256_hex(work.canonical)},
                           details={"work_id": work_id, "folder": out.name,
                                    "format": material.mark_format,
                                    "seeds": sorted(material.seeds), "scope": material.scope,
                                    "withheld": ["signing key", "marking secret",
                                                 "payload-tag key"]})
    return out


@dataclass
class DisclosureCheck(Outcome):
    """Result of :func:`check_disclosure`; ``problems`` empty means every check held."""

    folder: Path
    work_id: str | None = None
    keys_included: bool = False
    seeds: dict[str, bytes] = field(default_factory=dict)
    mark_format: str | None = None
    scope: str | None = None
    format3: dict | None = None     # format 3: {"sync", "family", "families": {family: seed}}
    owner_tag: int | None = None
    serial: int | None = None
    payload_tag: int | None = None
    public_key_sha256: str | None = None
    timestamps: list[dict] = field(default_factory=list)

    @property
    def detection_seed(self) -> bytes | None:
        return self.seeds.get("detection")


def _inside(folder: Path, name: str) -> Path:
    """A file named by the disclosure, refused unless it lies inside the folder (no links out)."""
    if not isinstance(name, str) or outside(folder, name) is not None:
        raise ValueError(f"{name} points outside the disclosure folder")
    return folder / name


def check_disclosure(folder: Path, *, tsa_roots: list | None = None) -> DisclosureCheck:
    """Re-check a disclosure folder as the other side's expert would, without any secret.

    Parameters
    ----------
    tsa_roots : list of Certificate, optional
        The timestamp authorities the checker trusts. Without them each token is
        checked against the certificate the folder brings (integrity only: the
        caller must report the authority as not pinned).
    """
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
        res.owner_tag = doc["payload"]["owner_tag"]
        res.serial = doc["payload"]["serial"]
        commitment = doc["commitment"]["value"]
        keys = doc.get("keys")
        if keys is None and doc.get("type") == "claimkit/disclosure/v1" and "detection" in doc:
            # claimkit 0.2 put the owner's detection seed in every disclosure, in the bundle
            # (CHANGELOG.md); it is read as the key material it was.
            keys = {"seeds": {"detection": doc["detection"]["seed_hex"]},
                    "format": (record.get("mark_params") or {}).get("format", "claimkit-mark/1"),
                    "scope": V1_SCOPE}
        if keys is not None:
            res.seeds = {k: bytes.fromhex(v) for k, v in keys["seeds"].items()}
            res.mark_format, res.scope = keys["format"], keys["scope"]
            opening = doc["commitment"]["opening"]
            res.payload_tag = doc["payload"]["payload_tag"]
            res.keys_included = True
            if "sync" in res.seeds and "family" in res.seeds:
                family = int(keys["derivation"]["family_index"])
                res.format3 = {"sync": res.seeds["sync"], "family": family,
                               "families": {family: res.seeds["family"]}}
    except (KeyError, ValueError, TypeError, AttributeError):
        res.problems.append("disclosure.json lacks its payload, commitment or key fields")
        return res
    if record.get("owner", {}).get("public_key_sha256") != res.public_key_sha256:
        res.problems.append("work-record.json names another public key")
    if record.get("work_id") != res.work_id:
        res.problems.append("work IDs of record and disclosure differ")
    if record.get("serial") != res.serial:
        res.problems.append("the disclosed serial is not the record's")
    if commitment != record.get("key_commitment", {}).get("value"):
        res.problems.append("the disclosure names another key commitment than the record")
    if res.keys_included:
        if opening.get("work_id") != res.work_id:
            res.problems.append("the commitment opening is for another work")
        if commitment_of(opening) != commitment:
            res.problems.append("the commitment opening does not match the record's key "
                                "commitment")
        # Each format says how its seeds are committed to in the record.
        check = COMMITMENT_CHECKS.get(res.mark_format or "", _seed_hashes)
        res.problems += check(opening, keys, res.seeds)
        if opening.get("payload_tag") != res.payload_tag:
            res.problems.append("the payload tag is not the one committed to")
    for st in doc.get("timestamps", []):
        label = st.get("token_id", "token")
        try:
            token = _inside(folder, st["token_file"]).read_bytes()
            certs = tsa_roots if tsa_roots is not None else \
                timestamp.load_certificates(_inside(folder, st["tsa_cert_file"]).read_bytes())
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
