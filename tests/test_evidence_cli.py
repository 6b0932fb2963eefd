"""The evidence commands end to end: init, works, stamp, log verify, disclose, key export."""

from __future__ import annotations

import hashlib
import json
import shutil
import sqlite3
import subprocess
import sys

from claimkit.cli import main
from claimkit.evidence.disclose import check_disclosure
from claimkit.evidence.profile import Profile

PASS = b"harwick-bay-test-passphrase"


def run(capsys, *argv):
    code = main(list(argv))
    out, err = capsys.readouterr()
    return code, out, err


def add_works(home, n):
    with Profile.open(home, PASS) as p:
        return [p.register_work(
            s, sha256_original=hashlib.sha256(b"o%d" % s).hexdigest(),
            sha256_marked=hashlib.sha256(b"m%d" % s).hexdigest(),
            original_name=f"coffee-{s}.png", marked_name=f"coffee-{s}-marked.jpg",
            fingerprint=f"{s:016x}", mark_params={"strength": 1.0},
            capture={"Make": "Fictional"}, quality={"psnr_db": 42.5}).work_id
            for s in p.allocate_serials(n)]


def test_init_and_refusals(tmp_path, monkeypatch, capsys):
    home = tmp_path / "h"
    monkeypatch.setenv("CLAIMKIT_PASSPHRASE", "pw-1")
    code, out, _ = run(capsys, "--home", str(home), "init", "--owner", "Ilse Marrow")
    assert code == 0 and "Ilse Marrow" in out
    code, _, err = run(capsys, "init", "--home", str(home), "--owner", "Ilse Marrow")
    assert code == 2 and err.startswith("claimkit: error: ") and "already exists" in err
    assert len(err.strip().splitlines()) == 1
    monkeypatch.setenv("CLAIMKIT_PASSPHRASE", "wrong")
    code, _, err = run(capsys, "stamp", "request", "--home", str(home), "--out",
                       str(tmp_path / "x.tsq"))
    assert code == 2 and "wrong passphrase" in err and "Traceback" not in err
    code, _, err = run(capsys, "works", "--home", str(tmp_path / "none"))
    assert code == 2 and "no profile at" in err and "run claimkit init" in err


def test_works_list_show_and_tamper(profile_home, capsys):
    ids = add_works(profile_home, 2)
    code, out, _ = run(capsys, "works", "--json")
    rows = [json.loads(x) for x in out.splitlines()]
    assert code == 0 and [r["work_id"] for r in rows] == ids
    code, out, _ = run(capsys, "works", "show", ids[0].lower())
    assert code == 0 and "valid (Ed25519)" in out
    code, out, _ = run(capsys, "works", "show", ids[1], "--json")
    doc = json.loads(out)
    assert doc["signature_ok"] and doc["record"]["work_id"] == ids[1]
    db = sqlite3.connect(profile_home / "registry.sqlite")
    blob = bytearray(db.execute("SELECT canonical FROM works WHERE work_id = ?",
                                (ids[1],)).fetchone()[0])
    blob[-5] ^= 0x01
    db.execute("UPDATE works SET canonical = ? WHERE work_id = ?", (bytes(blob), ids[1]))
    db.commit()
    code, out, _ = run(capsys, "works", "show", ids[1])
    assert code == 1 and "INVALID" in out
    code, out, _ = run(capsys, "log", "verify")
    assert code == 1 and ids[1] in out and ids[0] not in out
    code, _, err = run(capsys, "works", "show", "W-0000-000009")
    assert code == 2 and "no work" in err


def test_stamp_request_attach_and_verify(profile_home, local_tsa, tmp_path, capsys):
    ids = add_works(profile_home, 3)
    tsq = tmp_path / "shoot.tsq"
    code, out, _ = run(capsys, "stamp", "request", "--out", str(tsq), "--json")
    req = json.loads(out)
    assert code == 0 and req["works"] == ids and tsq.exists()
    tsr = local_tsa.reply_file(tsq, tmp_path / "shoot.tsr")
    # openssl ts -verify: the response against the request file claimkit wrote.
    assert local_tsa.openssl_verify(tsr.read_bytes(), tsq=tsq.read_bytes())[0]
    code, _, err = run(capsys, "stamp", "attach", str(tsr), "--tsa-cert",
                       str(tmp_path / "missing.pem"))
    assert code == 2 and "missing.pem" in err
    code, out, _ = run(capsys, "stamp", "attach", str(tsr), "--tsa-cert", str(local_tsa.ca_cert))
    assert code == 0 and "3 work(s) stamped" in out
    code, out, _ = run(capsys, "works", "show", ids[2])
    assert code == 0 and "leaf 3 of 3): valid" in out
    code, out, _ = run(capsys, "log", "verify", "--json")
    doc = json.loads(out)
    assert code == 0 and doc["ok"] and doc["tokens_checked"] == 1 and doc["works_checked"] == 3


def test_untrusted_tsa_is_a_failed_check(profile_home, local_tsa, make_tsa, tmp_path, capsys):
    add_works(profile_home, 1)
    tsq = tmp_path / "a.tsq"
    run(capsys, "stamp", "request", "--out", str(tsq))
    rogue = make_tsa("Rogue Harbour TSA")
    tsr = rogue.reply_file(tsq, tmp_path / "a.tsr")
    code, _, err = run(capsys, "stamp", "attach", str(tsr), "--tsa-cert", str(local_tsa.ca_cert))
    assert code == 1 and "a.tsr" in err and "untrusted TSA" in err


def test_stamp_over_http(profile_home, local_tsa, tmp_path, capsys):
    ids = add_works(profile_home, 2)
    run(capsys, "stamp", "request", ids[0], "--out", str(tmp_path / "one.tsq"))
    with local_tsa.serve() as url:
        code, out, err = run(capsys, "stamp", "attach", str(tmp_path / "one.tsr"),
                             "--tsa-cert", str(local_tsa.ca_cert), "--tsa-url", url)
    assert code == 0, err
    assert (tmp_path / "one.tsr").exists()
    code, out, _ = run(capsys, "works", "--json")
    stamped = {json.loads(x)["work_id"]: json.loads(x)["stamped"] for x in out.splitlines()}
    assert stamped[ids[0]] and not stamped[ids[1]]
    code, _, err = run(capsys, "stamp", "attach", str(tmp_path / "two.tsr"), "--tsa-cert",
                       str(local_tsa.ca_cert), "--tsa-url", "http://127.0.0.1:9/none")
    assert code == 2 and "no pending stamp request" in err


def test_log_verify_names_tampered_line(profile_home, capsys):
    add_works(profile_home, 3)
    log = profile_home / "custody.jsonl"
    lines = log.read_bytes().splitlines(keepends=True)
    lines[2] = lines[2].replace(b"coffee-2", b"coffee-9")
    log.write_bytes(b"".join(lines))
    code, out, _ = run(capsys, "log", "verify")
    assert code == 1 and "line 3: entry #3 altered" in out
    code, out, _ = run(capsys, "log", "verify", "--json")
    doc = json.loads(out)
    assert not doc["ok"] and doc["problems"][0]["line"] == 3


def test_disclose_and_key_export(profile_home, local_tsa, tmp_path, capsys):
    ids = add_works(profile_home, 2)
    tsq = tmp_path / "s.tsq"
    run(capsys, "stamp", "request", "--out", str(tsq))
    tsr = local_tsa.reply_file(tsq, tmp_path / "s.tsr")
    run(capsys, "stamp", "attach", str(tsr), "--tsa-cert", str(local_tsa.ca_cert))
    out_dir = tmp_path / "for-expert"
    code, out, _ = run(capsys, "disclose", ids[1], "--out", str(out_dir))
    assert code == 0 and "not legal advice" in out
    # It says what it gives away: formats 1 and 2 disclose an owner-level seed.
    assert "this disclosure finds every format-1/2 work of the owner" in out
    check = check_disclosure(out_dir)
    assert check.ok, check.problems
    with Profile.open(profile_home, PASS) as p:
        assert check.detection_seed == p.detection_seed
        assert check.payload_tag == p.payload_tag(check.serial)
        secrets = [p._secrets.signing_seed.hex(), p._secrets.marking_secret.hex(),
                   p._tag_key.hex()]
        other_tag = p.payload_tag(1)
    # Nothing that signs or makes payloads for other works is in the folder.
    blob = b"".join(f.read_bytes() for f in out_dir.rglob("*") if f.is_file())
    for s in secrets:
        assert s.encode() not in blob and bytes.fromhex(s) not in blob
    assert str(other_tag).encode() not in json.dumps(
        json.loads((out_dir / "disclosure.json").read_bytes())["payload"]).encode()
    code, _, err = run(capsys, "disclose", ids[0], "--out", str(out_dir))
    assert code == 2 and "already exists" in err
    # The expert's side: openssl verifies both signatures with the exported key.
    pem = tmp_path / "ilse.pem"
    code, out, _ = run(capsys, "key", "export", "--out", str(pem))
    assert code == 0 and pem.read_bytes() == (out_dir / "public-key.pem").read_bytes()
    if shutil.which("openssl"):
        for name in ("work-record", "disclosure"):
            proc = subprocess.run(
                ["openssl", "pkeyutl", "-verify", "-pubin", "-inkey", str(pem), "-rawin",
                 "-in", str(out_dir / f"{name}.json"), "-sigfile", str(out_dir / f"{name}.sig")],
                capture_output=True, text=True, check=False)
            assert proc.returncode == 0, proc.stderr
        # The token as CHECK.txt tells the expert to check it: openssl ts -verify over the root.
        stamp_info = json.loads((out_dir / "disclosure.json").read_bytes())["timestamps"][0]
        proc = subprocess.run(
            ["openssl", "ts", "-verify", "-digest", stamp_info["merkle_root"], "-token_in",
             "-in", str(out_dir / stamp_info["token_file"]),
             "-CAfile", str(out_dir / stamp_info["tsa_cert_file"])],
            capture_output=True, text=True, check=False)
        assert proc.returncode == 0, proc.stdout + proc.stderr
    # A changed byte in the disclosure is found.
    doc = out_dir / "disclosure.json"
    doc.write_bytes(doc.read_bytes().replace(b'"serial":', b'"seria1":'))
    assert not check_disclosure(out_dir).ok
    code, out, _ = run(capsys, "log", "verify")
    assert code == 0  # the disclosure was logged, and the log is intact


def test_console_script_runs(profile_home):
    proc = subprocess.run([sys.executable, "-m", "claimkit", "works"], capture_output=True,
                          text=True, check=False)
    assert proc.returncode == 0, proc.stderr


def test_disclosure_check_never_reads_outside_its_folder(profile_home, local_tsa, tmp_path, capsys):
    ids = add_works(profile_home, 1)
    tsq = tmp_path / "s.tsq"
    run(capsys, "stamp", "request", "--out", str(tsq))
    tsr = local_tsa.reply_file(tsq, tmp_path / "s.tsr")
    run(capsys, "stamp", "attach", str(tsr), "--tsa-cert", str(local_tsa.ca_cert))
    out_dir = tmp_path / "for-expert"
    assert run(capsys, "disclose", ids[0], "--out", str(out_dir))[0] == 0
    outside = tmp_path / "outside.tsr"
    outside.write_bytes(b"not for reading")
    doc = json.loads((out_dir / "disclosure.json").read_bytes())
    doc["timestamps"][0]["token_file"] = "../outside.tsr"
    (out_dir / "disclosure.json").write_text(json.dumps(doc))
    check = check_disclosure(out_dir)
    assert not check.ok
    assert any("outside the disclosure folder" in p for p in check.problems)
