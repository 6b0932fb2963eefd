"""``claimkit verify``: passes a sound bundle, names every kind of tampering, refuses unsafe zips."""
# ruff: noqa: F811 - the shared fixture is imported, then requested by name

from __future__ import annotations

import json
import shutil
import stat
import zipfile
from pathlib import Path

import pytest
from test_case_fixtures import PASS, built_case  # noqa: F401 - the shared fixture

from claimkit.cli import main
from claimkit.errors import CheckFailed
from claimkit.evidence.canonical import canonical_json
from claimkit.verify import safe_extract, verify_bundle

pytestmark = pytest.mark.slow


def _unpack(bundle: Path, dest: Path) -> Path:
    with zipfile.ZipFile(bundle) as zf:
        zf.extractall(dest)
    return dest


def _failed(rep) -> str:
    return " | ".join(f"{c['check']}: {c['detail']}" for c in rep.failures)


def _resign(folder: Path, home: Path) -> None:
    """What an owner who edits a number would do: rebuild and re-sign the manifest."""
    from claimkit.evidence.profile import Profile
    from claimkit.evidence.storage import sha256_file

    doc = json.loads((folder / "manifest.json").read_bytes())
    for f in doc["files"]:
        f["sha256"] = sha256_file(folder / f["path"])
        f["size"] = (folder / f["path"]).stat().st_size
    data = canonical_json(doc)
    (folder / "manifest.json").write_bytes(data)
    with Profile.open(home, PASS.encode()) as p:
        (folder / "manifest.sig").write_bytes(p.sign(data))


def _pinned(built_case) -> list[str]:
    return ["--expect-key", built_case.key_sha256, "--tsa-roots", str(built_case.tsa_roots),
            "--disclosure", str(built_case.disclosure)]


def test_sound_bundle_with_pins_and_disclosure_passes_every_check(built_case, capsys):
    assert main(["verify", str(built_case.bundle), *_pinned(built_case), "--json"]) == 0
    lines = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    checks, verdict = lines[:-1], lines[-1]
    assert verdict["ok"] and verdict["failed"] == [] and verdict["checks"] == len(checks)
    assert verdict["verdict"] == "passed" and verdict["unpinned"] == []
    assert all(c["status"] == "ok" and c["ok"] is True for c in checks), checks
    names = {c["check"] for c in checks}
    assert {"manifest signature", "file hashes", "custody log", "custody of exhibits",
            "signer key", "timestamp authority", f"disclosure {built_case.work_id}",
            "exhibit-1 re-run", "exhibit-2 re-run", "exhibit-3 re-run", "exhibit-4 re-run",
            "dossier data", "figures", f"reference {built_case.work_id}",
            "HTML dossier", "PDF signature", "PDF content",
            f"robustness {built_case.work_id}"} <= names
    work = [c for c in checks if c["check"] == f"work {built_case.work_id}"]
    assert len(work) == 1 and "1 timestamp token(s) verified" in work[0]["detail"]


def test_default_bundle_no_rerun_passes_with_the_signer_unpinned(built_case, capsys):
    assert main(["verify", str(built_case.bundle), "--no-rerun", "--json"]) == 0
    lines = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    checks, verdict = lines[:-1], lines[-1]
    status = {c["check"]: c["status"] for c in checks}
    assert status["signer key"] == "unpinned" and status["timestamp authority"] == "unpinned"
    assert status["re-run"] == "skipped"
    # "unpinned" is never "ok", in JSON or in words.
    assert all(c["ok"] is None for c in checks if c["status"] != "ok")
    assert verdict["verdict"] == "passed, unpinned"
    assert any(built_case.key_sha256 in x for x in verdict["compare_out_of_band"])
    assert main(["verify", str(built_case.bundle), "--no-rerun"]) == 0
    out = capsys.readouterr().out
    assert f"UNPINNED signer key: the bundle is signed by the key with SHA-256 " \
           f"{built_case.key_sha256}" in out
    assert "compare out of band" in out and "phone" in out


def test_without_a_disclosure_the_re_run_is_named_not_done(built_case, capsys):
    assert main(["verify", str(built_case.bundle)]) == 1
    captured = capsys.readouterr()
    assert "NOT DONE re-run: not done: no key disclosure" in captured.out
    assert "1 check(s) failed: re-run" in captured.err


def test_wrong_expected_key_fails_and_names_both(built_case, capsys):
    wrong = "ab" * 32
    assert main(["verify", str(built_case.bundle), "--no-rerun", "--expect-key", wrong]) == 1
    out = capsys.readouterr().out
    assert f"FAIL     signer key: the bundle is signed by the key with SHA-256 " \
           f"{built_case.key_sha256}, not by the expected {wrong}" in out


def test_tsa_roots_that_did_not_issue_the_token_fail(built_case, tmp_path, make_tsa, capsys):
    other = make_tsa("Unrelated Test TSA")
    assert main(["verify", str(built_case.bundle), "--no-rerun", "--expect-key",
                 built_case.key_sha256, "--tsa-roots", str(other.ca_cert)]) == 1
    out = capsys.readouterr().out
    assert f"FAIL     work {built_case.work_id}:" in out and "untrusted TSA" in out


def test_a_disclosure_for_other_key_or_record_is_refused(built_case, tmp_path):
    from claimkit.evidence.profile import Profile

    other = Profile.create(tmp_path / "mallory", "Someone Else", b"other-passphrase")
    d = tmp_path / "forged"
    shutil.copytree(built_case.disclosure / built_case.work_id, d)
    # A disclosure signed by another key (the forger's), for the same work id.
    body = (d / "disclosure.json").read_bytes()
    (d / "disclosure.sig").write_bytes(other.sign(body))
    (d / "public-key.pem").write_bytes(other.public_key_pem())
    other.close()
    rep = verify_bundle(built_case.bundle, disclosure=d, robustness=False)
    text = _failed(rep)
    assert f"disclosure {d.name}" in text and "signed by another key" in text
    assert "re-run" in text          # no key material verified, so nothing re-runs


def test_the_case_folder_itself_verifies(built_case):
    rep = verify_bundle(built_case.case, rerun=False)
    # The quick path says plainly that it did not re-derive the numbers, and nothing fails.
    assert rep.failures == [], _failed(rep)
    assert [c["check"] for c in rep.checks if c["status"] == "skipped"] == ["re-run"]
    assert {"dossier data", "custody of exhibits", "file hashes"} <= \
        {c["check"] for c in rep.checks if c["ok"]}


def test_any_single_byte_change_is_named(built_case, tmp_path):
    """Flip one byte in every file in turn; the quick path (no re-run) already names it."""
    base = _unpack(built_case.bundle, tmp_path / "base")
    files = sorted(p.relative_to(base).as_posix() for p in base.rglob("*") if p.is_file())
    assert len(files) > 20
    for rel in files:
        work = tmp_path / "w"
        shutil.rmtree(work, ignore_errors=True)
        shutil.copytree(base, work)
        p = work / rel
        p.chmod(0o644)
        data = bytearray(p.read_bytes())
        data[len(data) // 2] ^= 0x01
        p.write_bytes(bytes(data))
        rep = verify_bundle(work, rerun=False)
        assert not rep.ok
        text = _failed(rep)
        if rel in ("manifest.json", "manifest.sig"):
            assert "manifest" in text, (rel, text)
        elif rel == "handover/public-key.pem":
            assert "manifest" in text or "key" in text, (rel, text)
        else:
            assert f"{rel}: SHA-256 differs from the manifest" in text, (rel, text)


def test_a_changed_exhibit_fails_the_full_verify_too(built_case, tmp_path):
    work = _unpack(built_case.bundle, tmp_path / "w")
    p = next((work / "exhibits").glob("exhibit-1-*"))
    data = bytearray(p.read_bytes())
    data[-100] ^= 0x01
    p.write_bytes(bytes(data))
    rep = verify_bundle(work, rerun=False)
    text = _failed(rep)
    assert f"{p.relative_to(work).as_posix()}: SHA-256 differs" in text
    assert "exhibit-1 exhibit" in text and "differs from the intake record" in text


def test_removed_exhibit_is_named(built_case, tmp_path):
    work = _unpack(built_case.bundle, tmp_path / "w")
    p = next((work / "exhibits").glob("exhibit-2-*"))
    p.unlink()
    rep = verify_bundle(work, rerun=False)
    text = _failed(rep)
    assert "listed but missing" in text and "exhibit-2 exhibit" in text and "exhibit removed" in text


def test_exhibit_removed_with_its_records_and_re_signed_is_still_named(built_case, tmp_path):
    work = _unpack(built_case.bundle, tmp_path / "w")
    for p in list((work / "exhibits").glob("exhibit-2*")) + list((work / "findings").glob("exhibit-2*")):
        p.unlink()
    doc = json.loads((work / "manifest.json").read_bytes())
    doc["files"] = [f for f in doc["files"] if (work / f["path"]).exists()]
    (work / "manifest.json").write_bytes(canonical_json(doc))
    _resign(work, built_case.home)
    rep = verify_bundle(work, rerun=False)
    assert "exhibit-2: taken in according to the custody log, but not in the bundle" in _failed(rep)


def test_replaced_key_is_named(built_case, tmp_path):
    from claimkit.evidence.profile import Profile

    work = _unpack(built_case.bundle, tmp_path / "w")
    other = Profile.create(tmp_path / "mallory", "Someone Else", b"other-passphrase")
    (work / "handover" / "public-key.pem").write_bytes(other.public_key_pem())
    # Even a manifest re-signed with the other key does not pass.
    _resign_with(work, other)
    other.close()
    rep = verify_bundle(work, rerun=False)
    text = _failed(rep)
    assert "case.json names another key" in text
    assert "its public key is not the bundle's" in text or "signature does not verify" in text
    assert "custody log" in text


def _resign_with(folder: Path, profile) -> None:
    from claimkit.evidence.storage import sha256_file

    doc = json.loads((folder / "manifest.json").read_bytes())
    for f in doc["files"]:
        f["sha256"] = sha256_file(folder / f["path"])
    doc["signer"]["public_key_sha256"] = profile.public_key_fingerprint
    data = canonical_json(doc)
    (folder / "manifest.json").write_bytes(data)
    (folder / "manifest.sig").write_bytes(profile.sign(data))


def test_edited_number_in_the_dossier_data_is_named(built_case, tmp_path):
    work = _unpack(built_case.bundle, tmp_path / "w")
    p = work / "report" / "dossier.json"
    d = json.loads(p.read_bytes())
    d["results"][0]["alignment"]["ssim"] = 0.9999
    p.write_bytes(canonical_json(d) + b"\n")
    rep = verify_bundle(work, rerun=False)
    text = _failed(rep)
    assert "report/dossier.json: SHA-256 differs from the manifest" in text
    assert "dossier.results[0].alignment.ssim: stored 0.9999" in text


def test_edited_finding_is_caught_even_when_the_owner_re_signs(built_case, tmp_path):
    """An owner who edits a score and re-signs everything is still caught by the re-run."""
    work = _unpack(built_case.bundle, tmp_path / "w")
    p = work / "findings" / "exhibit-1.json"
    f = json.loads(p.read_bytes())
    f["result"]["score_pilot"] = round(f["result"]["score_pilot"] + 3.0, 4)
    f["result"]["log10_false_alarm_probability"] -= 10
    f["examined"]["software"] = "claimkit 0.0.9"     # and claims an older version made it
    p.write_bytes(canonical_json(f) + b"\n")
    _resign(work, built_case.home)
    rep = verify_bundle(work, robustness=False, disclosure=built_case.disclosure)
    names = {c["check"] for c in rep.failures}
    assert "exhibit-1 re-run" in names, _failed(rep)
    assert "custody of exhibits" in names          # not the finding that was logged
    assert "dossier data" in names                 # the dossier no longer matches its findings
    assert "score_pilot: stored" in _failed(rep)
    # A re-run that differs says which versions made and re-ran the numbers.
    assert "examined with claimkit 0.0.9 and re-run with claimkit " in _failed(rep)


def test_edited_content_line_and_a_stripped_method_are_caught_by_the_re_run(built_case, tmp_path):
    """Two edits, one per exhibit, in one full verify (it keeps the suite's time; each re-run
    is reported on its own line).

    Exhibit 1: the content line's statistic and the reported likelihood ratio are re-derived,
    not read. Exhibit 2: a finding made by the JPEG luma-plane reading, stripped of its method
    (as findings were before methods were recorded), is re-run by the RGB reading those
    findings were made by and no longer reproduces. (That the recorded method is re-run as
    recorded is what the sound bundle's passing re-run shows.)"""
    work = _unpack(built_case.bundle, tmp_path / "w")
    p = work / "findings" / "exhibit-1.json"
    f = json.loads(p.read_bytes())
    value = f["content"]["statistic"]["value"]
    f["content"]["statistic"]["value"] = value + 40
    f["evaluation"]["reported_log10_lr"] = 2.5      # stored 6 (the cap)
    p.write_bytes(canonical_json(f) + b"\n")
    p = work / "findings" / "exhibit-2.json"
    f = json.loads(p.read_bytes())
    assert f["examined"]["examination_method"] == "jpeg-y-1"
    assert f["result"]["examination_method"] == "jpeg-y-1"
    del f["examined"]["examination_method"]
    p.write_bytes(canonical_json(f) + b"\n")
    _resign(work, built_case.home)
    rep = verify_bundle(work, robustness=False, disclosure=built_case.disclosure)
    text = _failed(rep)
    rerun = {c["check"]: c["detail"] for c in rep.failures
             if c["check"].startswith("exhibit-") and c["check"].endswith(" re-run")}
    assert set(rerun) == {"exhibit-1 re-run", "exhibit-2 re-run"}, text
    assert f"content.statistic.value: stored {value + 40}, reproduced {value}" in rerun["exhibit-1 re-run"]
    assert "evaluation.reported_log10_lr: stored 2.5" in rerun["exhibit-1 re-run"]
    assert "score_pilot: stored" in rerun["exhibit-2 re-run"], text


def test_exit_code_and_error_line(built_case, tmp_path, capsys):
    work = _unpack(built_case.bundle, tmp_path / "w")
    (work / "exhibits" / "exhibit-3.json").write_bytes(b"{}")
    assert main(["verify", str(work)]) == 1
    captured = capsys.readouterr()
    assert "FAIL" in captured.out
    assert captured.err.startswith(f"claimkit: error: {work}: ")
    assert "check(s) failed" in captured.err


def _zip_with(path: Path, name: str, data: bytes = b"x", *, mode: int = 0o100644) -> None:
    with zipfile.ZipFile(path, "w") as zf:
        info = zipfile.ZipInfo(name)
        info.external_attr = mode << 16
        zf.writestr(info, data)


@pytest.mark.parametrize("name, why", [
    ("../escape.txt", "climbs out"),
    ("report/../../escape.txt", "climbs out"),
    ("/etc/claimkit-test", "absolute path"),
    ("C:/windows/file", "absolute path"),
    ("report\\..\\x", "backslash"),
])
def test_unsafe_zip_names_are_refused(tmp_path, name, why):
    z = tmp_path / "evil.zip"
    _zip_with(z, name)
    dest = tmp_path / "out"
    dest.mkdir()
    with pytest.raises(CheckFailed, match=why):
        safe_extract(z, dest)
    assert not (tmp_path / "escape.txt").exists()
    rep = verify_bundle(z)
    assert not rep.ok and rep.failures[0]["check"] == "bundle layout"


def test_symlink_entries_are_refused(tmp_path):
    z = tmp_path / "link.zip"
    _zip_with(z, "report/dossier.pdf", b"/etc/passwd", mode=stat.S_IFLNK | 0o777)
    with pytest.raises(CheckFailed, match="symbolic link"):
        safe_extract(z, tmp_path)


def test_duplicate_names_are_refused(tmp_path):
    z = tmp_path / "dup.zip"
    with zipfile.ZipFile(z, "w") as zf:
        zf.writestr("case.json", b"{}")
        with pytest.warns(UserWarning):
            zf.writestr("case.json", b"{}")
    with pytest.raises(CheckFailed, match="appears twice"):
        safe_extract(z, tmp_path)


def test_folder_with_a_link_out_is_refused(built_case, tmp_path):
    work = _unpack(built_case.bundle, tmp_path / "w")
    (work / "references" / "outside.jpg").symlink_to("/etc/hostname")
    rep = verify_bundle(work, rerun=False)
    assert not rep.ok and "symbolic link" in _failed(rep)


@pytest.mark.parametrize("target, field, value", [
    ("findings/exhibit-1.json", "arrays", {"file": "../../outside.npz", "sha256": "0" * 64}),
    ("findings/exhibit-1.json", "reference", {"file": "/etc/hostname", "kind": "marked",
                                         "sha256": "0" * 64}),
    ("findings/exhibit-1.json", "message_arrays", {"file": "../../outside.npz",
                                              "sha256": "0" * 64}),
    ("findings/exhibit-1.json", "reference", {"file": "references/x.png", "kind": "reduced",
                                         "made_from": {"file": "/etc/hostname"}}),
    ("exhibits/exhibit-1.json", "file", "exhibits/../../../etc/hostname"),
    ("exhibits/exhibit-1.json", "exhibit_id", "../exhibit-1"),
])
def test_paths_named_inside_records_are_not_followed(built_case, tmp_path, target, field, value):
    work = _unpack(built_case.bundle, tmp_path / "w")
    p = work / target
    d = json.loads(p.read_bytes())
    d[field] = value
    p.write_bytes(canonical_json(d) + b"\n")
    _resign(work, built_case.home)         # even a re-signed bundle may not point outside
    rep = verify_bundle(work)
    names = [c["check"] for c in rep.failures]
    assert names == ["paths in the bundle"], _failed(rep)


def test_not_a_zip_is_bad_input(tmp_path, capsys):
    p = tmp_path / "bundle.zip"
    p.write_bytes(b"not a zip")
    assert main(["verify", str(p)]) == 2
    assert "not a readable zip file" in capsys.readouterr().err
