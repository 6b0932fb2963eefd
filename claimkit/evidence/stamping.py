"""Stamping works with RFC 3161 tokens: one request, one token, many works.

``request_stamp`` builds the Merkle tree (RFC 6962) over the canonical records
of the chosen works, in serial order, and a TimeStampReq over its root. The
request (nonce, root, the works in leaf order, the request bytes) is kept in
the registry as *pending*, so that ``attach_stamp`` can check a response
against exactly what was asked: the token must cover that root, carry that
nonce, and pass every check of :mod:`.timestamp`. Then each work keeps its
leaf index and audit path, so that it can be checked alone later.
"""

from __future__ import annotations

import hashlib
import json
import os
from dataclasses import dataclass

from cryptography.hazmat.primitives.serialization import Encoding

from claimkit.errors import CheckFailed, InputError, Outcome
from claimkit.evidence import merkle, timestamp
from claimkit.evidence.custodylog import utc_now
from claimkit.evidence.storage import sha256_hex

__all__ = [
    "StampRequest",
    "StampResult",
    "StampStatus",
    "attach_stamp",
    "pending_requests",
    "request_stamp",
    "stamps_of",
]


@dataclass
class StampRequest:
    request_id: str
    tsq: bytes
    root: str
    nonce: int
    work_ids: list[str]


@dataclass
class StampResult:
    token_id: str
    request_id: str
    gen_time: str
    tsa_name: str | None
    root: str
    work_ids: list[str]


@dataclass
class StampStatus(Outcome):
    """One token's standing for one work, re-checked from what is stored."""

    token_id: str
    gen_time: str
    tsa_name: str | None
    root: str
    leaf_index: int
    tree_size: int

    def as_dict(self) -> dict:
        return {"token_id": self.token_id, "gen_time": self.gen_time, "tsa": self.tsa_name,
                "merkle_root": self.root, "leaf_index": self.leaf_index,
                "tree_size": self.tree_size, "ok": self.ok, "problems": self.problems}


def request_stamp(profile, work_ids: list[str] | None = None) -> StampRequest:
    """Make and remember a TimeStampReq over the Merkle root of the works' records.

    Parameters
    ----------
    profile : Profile
        Opened with the passphrase (the request is logged).
    work_ids : list of str, optional
        Default: every work without a token.
    """
    if work_ids:
        missing = [w for w in work_ids if profile.work(w) is None]
        if missing:
            raise InputError(f"no such work in this profile: {', '.join(missing)}")
        chosen = sorted(set(work_ids), key=lambda w: profile.work(w).serial)
    else:
        chosen = profile.registry.unstamped()
        if not chosen:
            raise InputError("every registered work already has a timestamp token "
                             "(name works to stamp them again)")
    rows = profile.registry.works_in(chosen)
    leaves = [rows[w][0] for w in chosen]
    damaged = [w for w in chosen if not profile.verify_signature(*rows[w])]
    if damaged:
        raise CheckFailed(f"record signature does not verify for {', '.join(damaged[:5])}"
                          f"{' ...' if len(damaged) > 5 else ''}; not stamping a damaged record",
                          path=profile.home)
    root = merkle.root_of(leaves)
    tsq, nonce = timestamp.build_request(root)
    request_id = f"S-{utc_now()[:19].replace('-', '').replace(':', '')}-{os.urandom(3).hex()}"
    with profile.change() as ch:
        ch.registry.insert_stamp_request(request_id=request_id, created=utc_now(), nonce=nonce,
                                         root=root.hex(), work_ids=chosen, tsq=tsq)
        ch.log("stamp requested", items={"request": sha256_hex(tsq)},
               details={"request_id": request_id, "merkle_root": root.hex(),
                        "works": len(chosen)})
    return StampRequest(request_id, tsq, root.hex(), nonce, chosen)


def pending_requests(profile) -> list[dict]:
    return [{"request_id": r[0], "created": r[1], "merkle_root": r[2], "works": len(json.loads(r[3]))}
            for r in profile.registry.pending_requests()]


def find_request(profile, *, tsq: bytes | None = None, root: bytes | None = None,
                 nonce: int | None = None, path: object = None):
    """The request with these bytes, or whose root is ``root`` (and nonce ``nonce``, if any
    request over that root has it; else the newest pending one, which the checks then refuse)."""
    if tsq is not None:
        row = profile.registry.request_by_tsq(tsq)
        if row is None:
            raise InputError("this request was not made by this profile", path=path)
    else:
        if root is None:
            raise ValueError("give the request bytes or the Merkle root")
        rows = profile.registry.requests_by_root(root.hex())
        row = next((r for r in rows if nonce is not None and int(r[1]) == nonce),
                   rows[0] if rows else None)
        if row is None:
            raise CheckFailed(f"the token is for other data: its digest {root.hex()} matches "
                              "no stamp request of this profile", path=path)
    return row


def latest_pending_tsq(profile) -> bytes:
    tsq = profile.registry.latest_pending_tsq()
    if tsq is None:
        raise InputError("no pending stamp request (run claimkit stamp request first)")
    return tsq


def attach_stamp(profile, tsr: bytes, tsa_cert_pem: bytes, *, tsq: bytes | None = None,
                 tsr_path: object = None, cert_path: object = None) -> StampResult:
    """Check a TimeStampResp against its pending request and store the token.

    Parameters
    ----------
    tsr : bytes
        The DER response.
    tsa_cert_pem : bytes
        The certificate(s) to trust: the TSA's own certificate or its CA.
    tsq : bytes, optional
        The request the response answers; default the request whose root the
        token covers.

    Raises
    ------
    CheckFailed
        Naming the check that failed (status, imprint, nonce, signature, certificate).
    """
    trusted = timestamp.load_certificates(tsa_cert_pem, path=cert_path)
    if tsq is None:
        try:
            token_der = timestamp.token_from_response(tsr)
            digest, _, token_nonce = timestamp.token_imprint(token_der)
        except timestamp._Refused as exc:
            raise CheckFailed(str(exc), path=tsr_path) from None
        except (ValueError, TypeError, KeyError, AttributeError):
            raise CheckFailed("the token is damaged (not valid DER/CMS)", path=tsr_path) from None
        row = find_request(profile, root=digest, nonce=token_nonce, path=tsr_path)
    else:
        row = find_request(profile, tsq=tsq, path=tsr_path)
    request_id, nonce, root_hex, work_ids_json, _, _state = row
    root = bytes.fromhex(root_hex)
    info = timestamp.check_response(tsr, digest=root, nonce=int(nonce), trusted=trusted,
                                    path=tsr_path)
    work_ids = json.loads(work_ids_json)
    works = [profile.work(w) for w in work_ids]
    leaves = [w.canonical for w in works]
    tree = merkle.MerkleTree(leaves)
    if tree.root != root:
        raise CheckFailed("the records changed after the request was made; make a new request",
                          path=tsr_path)
    token = info.token_der
    token_sha = sha256_hex(token)
    token_id = f"T-{token_sha[:12]}"
    if profile.registry.has_token(token_id):
        raise InputError(f"this token is already attached ({token_id})", path=tsr_path)
    cert_pem = b"".join(c.public_bytes(Encoding.PEM) for c in trusted)
    now = utc_now()
    with profile.change() as ch:
        ch.registry.insert_token(
            token_id=token_id, request_id=request_id, token=token, token_sha256=token_sha,
            tsa_cert=cert_pem, gen_time=info.gen_time_iso, tsa_name=info.tsa_name,
            tsa_serial=str(info.serial_number), attached_at=now,
            leaves=[(w, i, tree.size, json.dumps([p.hex() for p in tree.proof(i)]))
                    for i, w in enumerate(work_ids)])
        ch.log("works stamped",
               items={"token": token_sha, "response": sha256_hex(tsr),
                      "tsa_certificate": hashlib.sha256(info.signer_cert_der).hexdigest()},
               details={"request_id": request_id, "token_id": token_id,
                        "merkle_root": root_hex, "works": len(work_ids),
                        "gen_time": info.gen_time_iso,
                        "time_source": "RFC 3161 timestamp authority",
                        "tsa": info.tsa_name or info.signer_subject})
    return StampResult(token_id, request_id, info.gen_time_iso, info.tsa_name, root_hex, work_ids)


def check_stamp(profile, work, token_id: str) -> StampStatus:
    """Re-check one stored token for one work: token integrity, TSA checks, inclusion proof."""
    row = profile.registry.stamp_of(work.work_id, token_id)
    token, token_sha, cert_pem, gen_time, tsa_name, root_hex, nonce, idx, size, proof, _ = row
    token = bytes(token)
    status = StampStatus(token_id, gen_time, tsa_name, root_hex, idx, size)
    if sha256_hex(token) != token_sha:
        status.problems.append("token bytes altered since they were attached")
    try:
        info = timestamp.check_token(token, digest=bytes.fromhex(root_hex), nonce=int(nonce),
                                     trusted=timestamp.load_certificates(bytes(cert_pem)))
        if info.gen_time_iso != gen_time:
            status.problems.append(f"stored time {gen_time} differs from the token's "
                                   f"{info.gen_time_iso}")
    except (CheckFailed, InputError) as exc:
        status.problems.append(f"token check failed: {exc.message}")
    try:
        path = [bytes.fromhex(p) for p in json.loads(proof)]
        included = merkle.verify_inclusion(work.canonical, idx, size, path,
                                           bytes.fromhex(root_hex))
    except ValueError:
        included = False
    if not included:
        status.problems.append("the record is not in the stamped Merkle tree "
                               "(record or inclusion proof altered)")
    return status


def stamps_of(profile, work) -> list[StampStatus]:
    """Every token of a work, each re-checked."""
    ids = profile.registry.token_ids_of(work.work_id)
    return [check_stamp(profile, work, t) for t in ids]


def inclusion_proof(profile, work_id: str, token_id: str) -> dict:
    """What an outside party needs to check one work against one token."""
    row = profile.registry.stamp_of(work_id, token_id)
    token, _, cert, gen_time, _, root, nonce, idx, size, proof, tsq = row
    return {"token": bytes(token), "tsa_cert_pem": bytes(cert), "tsq": bytes(tsq),
            "proof": {"scheme": "RFC 6962 Merkle tree over canonical work records",
                      "token_id": token_id, "gen_time": gen_time, "merkle_root": root,
                      "nonce": str(nonce), "leaf_index": idx, "tree_size": size,
                      "audit_path": json.loads(proof)}}
