"""The owner profile: keys at rest, serials, work records, signatures checked by OpenSSL."""

from __future__ import annotations

import base64
import hashlib
import json
import os
import shutil
import sqlite3
import stat
import subprocess
import threading

import pytest

from claimkit.errors import InputError, ProfileError
from claimkit.evidence import custodylog
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.keys import commitment_of
from claimkit.evidence.profile import Profile

PASS = b"harwick-bay-test-passphrase"  # same as conftest.TEST_PASSPHRASE


def _register(p: Profile, serial: int, **over):
    fields = {"sha256_original": hashlib.sha256(b"orig%d" % serial).hexdigest(),
              "sha256_marked": hashlib.sha256(b"marked%d" % serial).hexdigest(),
              "original_name": f"harwick-{serial:03d}.tif",
              "marked_name": f"harwick-{serial:03d}.jpg",
              "fingerprint": f"{serial:016x}", "mark_params": {"strength": 1.25, "tile": 128},
              "capture": {"DateTimeOriginal": "2026:05:04 06:30:00", "Make": "Fictional"},
              "quality": {"psnr_db": 43.27, "ssim": 0.9912}}
    fields.update(over)
    return p.register_work(serial, **fields)


def openssl_verify(tmp_path, pub_pem: bytes, data: bytes, sig: bytes) -> bool:
    # Independent check: OpenSSL's pure-Ed25519 verification (openssl pkeyutl -rawin).
    if shutil.which("openssl") is None:
        pytest.skip("openssl not installed")
    (tmp_path / "pub.pem").write_bytes(pub_pem)
    (tmp_path / "data.bin").write_bytes(data)
    (tmp_path / "data.sig").write_bytes(sig)
    proc = subprocess.run(["openssl", "pkeyutl", "-verify", "-pubin", "-inkey",
                           str(tmp_path / "pub.pem"), "-rawin", "-in", str(tmp_path / "data.bin"),
                           "-sigfile", str(tmp_path / "data.sig")], capture_output=True, text=True,
                          check=False)
    return proc.returncode == 0 and "Signature Verified Successfully" in proc.stdout


def test_profile_files_are_private(profile_home):
    assert stat.S_IMODE(profile_home.stat().st_mode) == 0o700
    for f in profile_home.iterdir():
        if f.is_file():
            assert stat.S_IMODE(f.stat().st_mode) == 0o600, f.name
    sealed = (profile_home / "secrets.sealed").read_bytes()
    doc = json.loads(sealed)
    assert doc["kdf"]["name"] == "scrypt" and doc["cipher"]["name"] == "AES-256-GCM"
    assert b"signing_seed" not in sealed and b"marking_secret" not in sealed


def test_refuses_existing_profile(profile_home):
    with pytest.raises(InputError, match="already exists"):
        Profile.create(profile_home, "Someone Else", b"x")


def test_wrong_passphrase_and_missing_profile(profile_home, tmp_path):
    with pytest.raises(ProfileError) as err:
        Profile.open(profile_home, b"not the passphrase")
    assert "wrong passphrase" in err.value.line()
    assert "secrets.sealed" in err.value.line()
    with pytest.raises(ProfileError, match=r"no profile at .* \(run claimkit init\)"):
        Profile.open(tmp_path / "nowhere", PASS)


def test_altered_key_file_is_refused(profile_home):
    f = profile_home / "secrets.sealed"
    doc = json.loads(f.read_bytes())
    doc["kdf"]["n"] = 2**11  # a changed header is authenticated data
    f.write_bytes(json.dumps(doc).encode())
    with pytest.raises(ProfileError, match="wrong passphrase"):
        Profile.open(profile_home, PASS)


def test_derived_values(profile):
    raw = profile.public_key_raw
    assert profile.public_key_fingerprint == hashlib.sha256(raw).hexdigest()
    assert profile.owner_tag == int.from_bytes(hashlib.sha256(raw).digest()[:2], "big")
    assert len(profile.detection_seed) == 32
    tags = {profile.payload_tag(s) for s in range(1, 200)}
    assert all(0 <= t < 2**24 for t in tags) and len(tags) > 190
    ro = Profile.open_public(profile.home)
    with pytest.raises(ProfileError, match="passphrase"):
        ro.detection_seed  # noqa: B018
    ro.close()


def test_serials_never_reused(profile):
    a = profile.allocate_serials(3)
    b = profile.allocate_serials(2)  # nothing registered for a: still never handed out again
    assert a == [1, 2, 3] and b == [4, 5]
    results: list[list[int]] = []

    def grab():
        p = Profile.open(profile.home, PASS)
        for _ in range(10):
            results.append(p.allocate_serials(2))
        p.close()

    threads = [threading.Thread(target=grab) for _ in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    got = [s for r in results for s in r]
    assert len(got) == len(set(got)) == 60 and min(got) == 6
    with pytest.raises(InputError, match="never allocated"):
        _register(profile, 999)


def test_register_and_look_up(profile, tmp_path):
    s1, s2 = profile.allocate_serials(2)
    w = _register(profile, s1)
    assert w.work_id == f"W-{profile.owner_tag:04X}-{s1:06d}"
    assert w.verify() and w.canonical == canonical_json(w.record)
    rec = w.record
    assert rec["owner"]["public_key_sha256"] == profile.public_key_fingerprint
    assert rec["capture"]["Make"] == "Fictional" and rec["quality"]["psnr_db"] == 43.27
    # The commitment opens to the detection seed hash and the payload tag; the key is absent.
    opening = profile.commitment_opening(w.work_id)
    assert commitment_of(opening) == rec["key_commitment"]["value"]
    assert opening["payload_tag"] == profile.payload_tag(s1)
    assert profile.detection_seed.hex() not in w.canonical.decode()
    with pytest.raises(InputError, match="already registered"):
        _register(profile, s1)
    w2 = _register(profile, s2, fingerprint=f"{s1 ^ 0b101:016x}")
    assert profile.work(w.work_id).canonical == w.canonical
    assert profile.work_by_payload(profile.owner_tag, s2).work_id == w2.work_id
    assert profile.work_by_payload(profile.owner_tag ^ 1, s2) is None
    assert profile.work_by_hash(rec["original"]["sha256"]).work_id == w.work_id
    assert profile.work_by_hash(rec["marked"]["sha256"].upper()).work_id == w.work_id
    assert profile.work_by_hash("0" * 64) is None
    assert [x.work_id for x in profile.works()] == [w.work_id, w2.work_id]
    near = profile.works_by_fingerprint(f"{s1:016x}", 2)
    assert [(x.work_id, d) for x, d in near] == [(w.work_id, 0), (w2.work_id, 2)]
    assert len(profile.works_by_fingerprint(f"{s1:016x}", 1)) == 1


def test_every_signature_verifies_with_openssl(profile, tmp_path):
    # Records and every custody-log entry: verified by `openssl pkeyutl -verify -rawin`.
    (s,) = profile.allocate_serials(1)
    w = _register(profile, s)
    pem = profile.public_key_pem()
    assert openssl_verify(tmp_path, pem, w.canonical, w.signature)
    bad = bytearray(w.canonical)
    bad[10] ^= 0x01
    assert not openssl_verify(tmp_path, pem, bytes(bad), w.signature)
    profile.log_action("disputed file taken in", items={"exhibit": "ab" * 32},
                       details={"source": "https://tidewater.example/shop/item-17"})
    for line in profile.log_path.read_bytes().splitlines():
        entry = json.loads(line)
        body = canonical_json({k: v for k, v in entry.items() if k != "sig"})
        assert openssl_verify(tmp_path, pem, body, base64.b64decode(entry["sig"]))


def test_altered_record_in_registry_is_named(profile):
    (s,) = profile.allocate_serials(1)
    w = _register(profile, s)
    db = sqlite3.connect(profile.home / "registry.sqlite")
    blob = bytearray(w.canonical)
    i = blob.index(b"harwick")
    blob[i] ^= 0x20
    db.execute("UPDATE works SET canonical = ? WHERE work_id = ?", (bytes(blob), w.work_id))
    db.commit()
    db.close()
    status = profile.check_work(w.work_id)
    assert not status.signature_ok and not status.ok
    report = profile.audit()
    assert not report.ok
    assert any(w.work_id in p and "signature" in p for p in report.problems)
    assert any(w.work_id in p and "custody-log" in p for p in report.problems)


def test_interrupted_log_write_is_finished_on_next_open(profile, monkeypatch):
    # Ctrl-C after the registry commit, before the log line: the entry waits in the outbox.
    (s1, s2) = profile.allocate_serials(2)

    def interrupted(path, lines):
        raise KeyboardInterrupt

    monkeypatch.setattr(custodylog, "append_lines", interrupted)
    with pytest.raises(KeyboardInterrupt):
        _register(profile, s1)
    monkeypatch.undo()
    ro = Profile.open_public(profile.home)
    report = ro.audit()
    assert report.ok and report.pending_entries == 1  # consistent, and says what is pending
    ro.close()
    p2 = Profile.open(profile.home, PASS)
    assert p2.pending_log_entries() == 0
    actions = [json.loads(x)["action"] for x in p2.log_path.read_bytes().splitlines()]
    assert actions.count("work registered") == 1
    assert p2.audit().ok

    # Ctrl-C after the log line reached the disk, before the registry noted it: adopted once.
    real = custodylog.append_lines

    def written_then_interrupted(path, lines):
        real(path, lines)
        raise KeyboardInterrupt

    monkeypatch.setattr(custodylog, "append_lines", written_then_interrupted)
    with pytest.raises(KeyboardInterrupt):
        _register(p2, s2)
    monkeypatch.undo()
    p3 = Profile.open(profile.home, PASS)
    actions = [json.loads(x)["action"] for x in p3.log_path.read_bytes().splitlines()]
    assert actions.count("work registered") == 2
    assert p3.audit().ok and p3.pending_log_entries() == 0
    p3.log_action("examined", items={"exhibit": "cd" * 32})
    assert p3.audit().ok


def test_log_action_validates_items(profile):
    with pytest.raises(ValueError):
        profile.log_action("examined", items={"exhibit": "not a hash"})
    entry = profile.log_action("report built", items={"report": "ef" * 32}, actor="paralegal")
    assert entry["actor"] == "paralegal" and entry["seq"] == 2
    assert os.path.getsize(profile.log_path) > 0


def test_two_processes_logging_at_once_keep_one_chain(profile):
    # Two handles on one profile (as two claimkit processes would have) log in parallel.
    other = Profile.open(profile.home, PASS)
    errors: list[BaseException] = []

    def work(p, tag):
        try:
            for i in range(15):
                entry = p.log_action("examined", items={"exhibit": f"{tag}{i:02x}" * 21 + "0"})
                assert entry["action"] == "examined"
        except BaseException as exc:  # noqa: BLE001 - reported below
            errors.append(exc)

    threads = [threading.Thread(target=work, args=(p, t)) for p, t in ((profile, "a"),
                                                                        (other, "b"))]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    other.close()
    assert not errors, errors
    report = profile.audit()
    assert report.ok and report.log.lines == 31


def test_foreign_lines_at_the_end_of_the_log_stop_writing(profile):
    # Lines the registry never queued (someone appended to the log): refuse to chain onto them.
    from claimkit.errors import CheckFailed

    with open(profile.log_path, "ab") as fh:
        fh.write(b'{"action":"work registered","seq":2}\n')
    with pytest.raises(CheckFailed, match="did not write"):
        profile.log_action("examined", items={"exhibit": "aa" * 32})
