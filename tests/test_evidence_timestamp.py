"""RFC 3161: tokens from OpenSSL's own TSA (`openssl ts -reply`), cross-checked with `openssl ts -verify`."""

from __future__ import annotations

import hashlib
import json
import sqlite3

import pytest
from asn1crypto import cms, tsp

from claimkit.errors import CheckFailed, InputError
from claimkit.evidence import merkle, timestamp

DIGEST = hashlib.sha256(b"harwick bay, low tide, 06:30").digest()


def trusted(tsa, which="ca"):
    path = tsa.ca_cert if which == "ca" else tsa.tsa_cert
    return timestamp.load_certificates(path.read_bytes())


def stamp(tsa, digest=DIGEST, **kw):
    tsq, nonce = timestamp.build_request(digest, **kw)
    return tsq, nonce, tsa.reply(tsq)


def test_request_is_standard(local_tsa):
    tsq, nonce = timestamp.build_request(DIGEST)
    assert timestamp.parse_request(tsq) == (DIGEST, "sha256", nonce)
    assert nonce >= 2**63  # 64 random bits
    req = tsp.TimeStampReq.load(tsq)
    assert req["cert_req"].native is True and req["version"].native == "v1"


def test_good_token_accepted_and_openssl_agrees(local_tsa):
    tsq, nonce, tsr = stamp(local_tsa)
    info = timestamp.check_response(tsr, digest=DIGEST, nonce=nonce, trusted=trusted(local_tsa))
    assert info.imprint == DIGEST and info.nonce == nonce and info.tsa_name == local_tsa.name
    assert info.signer_subject.startswith("CN=Harwick Test TSA")
    ok, out = local_tsa.openssl_verify(tsr, tsq=tsq)  # independent check: openssl ts -verify
    assert ok, out
    # Trusting the TSA's own certificate instead of its CA works too.
    timestamp.check_response(tsr, digest=DIGEST, nonce=nonce, trusted=trusted(local_tsa, "tsa"))


def test_token_for_other_data_refused(local_tsa):
    _tsq, nonce, tsr = stamp(local_tsa)
    other = hashlib.sha256(b"someone else's picture").digest()
    with pytest.raises(CheckFailed, match="for other data"):
        timestamp.check_response(tsr, digest=other, nonce=nonce, trusted=trusted(local_tsa))
    assert not local_tsa.openssl_verify(tsr, digest=other)[0]


def test_wrong_nonce_refused(local_tsa):
    _tsq, nonce, tsr = stamp(local_tsa)
    with pytest.raises(CheckFailed, match="wrong nonce"):
        timestamp.check_response(tsr, digest=DIGEST, nonce=nonce ^ 1,
                                 trusted=trusted(local_tsa))


def _forge(tsr: bytes, mutate) -> bytes:
    resp = tsp.TimeStampResp.load(tsr)
    token = cms.ContentInfo.load(resp["time_stamp_token"].dump())
    mutate(token)
    return tsp.TimeStampResp({"status": resp["status"].native, "time_stamp_token": token}
                             ).dump(force=True)


def test_forged_tsa_signature_refused(local_tsa):
    tsq, nonce, tsr = stamp(local_tsa)

    def flip_signature(token):
        si = token["content"]["signer_infos"][0]
        sig = bytearray(si["signature"].native)
        sig[len(sig) // 2] ^= 0x01
        si["signature"] = bytes(sig)

    forged = _forge(tsr, flip_signature)
    with pytest.raises(CheckFailed, match="signature does not verify"):
        timestamp.check_response(forged, digest=DIGEST, nonce=nonce, trusted=trusted(local_tsa))
    assert not local_tsa.openssl_verify(forged, tsq=tsq)[0]  # openssl refuses it too


def test_altered_tstinfo_refused(local_tsa):
    _tsq, nonce, tsr = stamp(local_tsa)
    token_der = timestamp.token_from_response(tsr)
    tst_der = cms.ContentInfo.load(token_der)["content"]["encap_content_info"]["content"].contents
    # Move the time by changing one digit of the GeneralizedTime inside the signed TSTInfo.
    i = tst_der.index(b"\x18\x0f") + 2 + 3
    altered = tst_der[:i] + bytes([tst_der[i] ^ 0x01]) + tst_der[i + 1:]
    bad = token_der.replace(tst_der, altered)
    with pytest.raises(CheckFailed, match="message digest"):
        timestamp.check_token(bad, digest=DIGEST, nonce=nonce, trusted=trusted(local_tsa))


def test_untrusted_tsa_refused(local_tsa, make_tsa):
    rogue = make_tsa("Rogue Harbour TSA")
    tsq, nonce, tsr = stamp(rogue)
    with pytest.raises(CheckFailed, match="untrusted TSA"):
        timestamp.check_response(tsr, digest=DIGEST, nonce=nonce, trusted=trusted(local_tsa))
    assert not local_tsa.openssl_verify(tsr, tsq=tsq)[0]


def test_ess_v1_signing_certificate_accepted(make_tsa):
    tsa = make_tsa("Old Style TSA", ess_alg="sha1")  # RFC 3161 ESS signingCertificate (v1)
    tsq, nonce, tsr = stamp(tsa)
    timestamp.check_response(tsr, digest=DIGEST, nonce=nonce, trusted=trusted(tsa))
    assert tsa.openssl_verify(tsr, tsq=tsq)[0]


def test_rejected_request_reports_status(local_tsa):
    # The local TSA accepts sha256/384/512 only: a SHA-1 request is rejected (badAlg).
    _tsq, nonce, tsr = stamp(local_tsa, hashlib.sha1(b"x").digest(), hash_algorithm="sha1")
    with pytest.raises(CheckFailed, match="refused the request: status rejection"):
        timestamp.check_response(tsr, digest=DIGEST, nonce=nonce, trusted=trusted(local_tsa))


def test_garbage_refused(local_tsa):
    with pytest.raises(CheckFailed, match="not an RFC 3161"):
        timestamp.check_response(b"\x30\x03\x02\x01", digest=DIGEST, nonce=1,
                                 trusted=trusted(local_tsa))
    with pytest.raises(InputError, match="certificate"):
        timestamp.load_certificates(b"not a certificate")


# --------------------------------------------------------------------------- stamping works

def _works(profile, n):
    serials = profile.allocate_serials(n)
    return [profile.register_work(
        s, sha256_original=hashlib.sha256(b"o%d" % s).hexdigest(),
        sha256_marked=hashlib.sha256(b"m%d" % s).hexdigest(), original_name=f"shoot-{s}.tif",
        marked_name=f"shoot-{s}.jpg", fingerprint=f"{s:016x}", mark_params={}, capture={},
        quality={}) for s in serials]


def test_stamp_many_works_with_one_token(profile, local_tsa, tmp_path):
    works = _works(profile, 5)
    req = profile.stamp_request()
    assert req.work_ids == [w.work_id for w in works]
    assert req.root == merkle.root_of([w.canonical for w in works]).hex()
    tsr = local_tsa.reply(req.tsq)
    res = profile.stamp_attach(tsr, local_tsa.ca_cert.read_bytes())
    assert res.work_ids == req.work_ids
    for w in works:
        st = profile.check_work(w.work_id)
        assert st.ok and len(st.stamps) == 1 and st.stamps[0].tree_size == 5
    # openssl ts -verify on the stored token, over the Merkle root.
    token = profile.db.execute("SELECT token FROM tokens").fetchone()[0]
    (tmp_path / "tok.tst").write_bytes(token)
    import subprocess
    proc = subprocess.run(["openssl", "ts", "-verify", "-digest", req.root, "-token_in", "-in",
                           str(tmp_path / "tok.tst"), "-CAfile", str(local_tsa.ca_cert)],
                          capture_output=True, text=True, check=False)
    assert proc.returncode == 0, proc.stderr
    with pytest.raises(InputError, match="already attached"):
        profile.stamp_attach(tsr, local_tsa.ca_cert.read_bytes())
    with pytest.raises(InputError, match="already has a timestamp"):
        profile.stamp_request()
    assert profile.audit().ok


def test_swapped_tokens_and_wrong_nonce(profile, local_tsa):
    a_works = _works(profile, 2)
    req_a = profile.stamp_request([w.work_id for w in a_works])
    b_works = _works(profile, 1)
    req_b = profile.stamp_request([b_works[0].work_id])
    tsr_a = local_tsa.reply(req_a.tsq)
    with pytest.raises(CheckFailed, match="for other data"):
        profile.stamp_attach(tsr_a, local_tsa.ca_cert.read_bytes(), tsq=req_b.tsq)
    # A response to a request this profile never made, over the same root: its nonce differs.
    foreign_tsq, _ = timestamp.build_request(bytes.fromhex(req_b.root))
    with pytest.raises(CheckFailed, match="wrong nonce"):
        profile.stamp_attach(local_tsa.reply(foreign_tsq), local_tsa.ca_cert.read_bytes())
    # A token over data no request of this profile covers.
    stray_tsq, _ = timestamp.build_request(DIGEST)
    with pytest.raises(CheckFailed, match="other data"):
        profile.stamp_attach(local_tsa.reply(stray_tsq), local_tsa.ca_cert.read_bytes())
    profile.stamp_attach(tsr_a, local_tsa.ca_cert.read_bytes())  # matched by its root
    assert profile.check_work(a_works[1].work_id).ok
    assert not profile.check_work(b_works[0].work_id).stamps


def test_single_byte_change_in_stored_token_is_named(profile, local_tsa):
    works = _works(profile, 3)
    req = profile.stamp_request()
    res = profile.stamp_attach(local_tsa.reply(req.tsq), local_tsa.ca_cert.read_bytes())
    db = sqlite3.connect(profile.home / "registry.sqlite")
    token = bytes(db.execute("SELECT token FROM tokens").fetchone()[0])
    for pos in (len(token) // 3, len(token) // 2, len(token) - 3):
        bad = bytearray(token)
        bad[pos] ^= 0x04
        db.execute("UPDATE tokens SET token = ?", (bytes(bad),))
        db.commit()
        st = profile.check_work(works[0].work_id)
        assert not st.ok and any(res.token_id in p for p in st.all_problems())
        assert any(res.token_id in p for p in profile.audit().problems)
    # An altered inclusion proof is named too.
    db.execute("UPDATE tokens SET token = ?", (token,))
    proof = json.loads(db.execute("SELECT proof FROM work_stamps WHERE work_id = ?",
                                  (works[0].work_id,)).fetchone()[0])
    proof[0] = ("0" if proof[0][0] != "0" else "1") + proof[0][1:]
    db.execute("UPDATE work_stamps SET proof = ? WHERE work_id = ?",
               (json.dumps(proof), works[0].work_id))
    db.commit()
    st = profile.check_work(works[0].work_id)
    assert any("Merkle tree" in p for p in st.all_problems())
    assert profile.check_work(works[1].work_id).ok


def test_swapped_stored_tokens_are_named(profile, local_tsa):
    first = _works(profile, 2)
    res_a = profile.stamp_attach(local_tsa.reply(profile.stamp_request().tsq),
                                 local_tsa.ca_cert.read_bytes())
    second = _works(profile, 2)
    res_b = profile.stamp_attach(local_tsa.reply(profile.stamp_request().tsq),
                                 local_tsa.ca_cert.read_bytes())
    db = sqlite3.connect(profile.home / "registry.sqlite")
    rows = dict(db.execute("SELECT token_id, token FROM tokens").fetchall())
    sums = dict(db.execute("SELECT token_id, token_sha256 FROM tokens").fetchall())
    for mine, theirs in ((res_a.token_id, res_b.token_id), (res_b.token_id, res_a.token_id)):
        db.execute("UPDATE tokens SET token = ?, token_sha256 = ? WHERE token_id = ?",
                   (rows[theirs], sums[theirs], mine))
    db.commit()
    for w, tid in ((first[0], res_a.token_id), (second[1], res_b.token_id)):
        problems = profile.check_work(w.work_id).all_problems()
        assert any(tid in p and "for other data" in p for p in problems), problems
    assert not profile.audit().ok


def test_same_works_requested_twice_each_response_finds_its_request(profile, local_tsa):
    works = _works(profile, 2)
    ids = [w.work_id for w in works]
    first = profile.stamp_request(ids)
    second = profile.stamp_request(ids)
    assert first.root == second.root and first.nonce != second.nonce
    tsr_first = local_tsa.reply(first.tsq)
    tsr_second = local_tsa.reply(second.tsq)
    assert profile.stamp_attach(tsr_first, local_tsa.ca_cert.read_bytes()).request_id == \
        first.request_id
    assert profile.stamp_attach(tsr_second, local_tsa.ca_cert.read_bytes()).request_id == \
        second.request_id
    assert len(profile.check_work(ids[0]).stamps) == 2
