"""``scan``: folders of found images examined with the owner's key, in a stable order.

Attacks are made with Pillow's own JPEG encoder and crop; the payload check
used in workers is compared with the evidence layer's own derivation.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from skimage import data

from claimkit import scan, workflow
from claimkit.cli import main, scale
from claimkit.errors import InputError
from claimkit.evidence.storage import sha256_file
from claimkit.mark import payload


def _save(img, path: Path, **kw) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    (img if isinstance(img, Image.Image) else Image.fromarray(img)).save(path, **kw)
    return path


@pytest.fixture
def finds(profile, tmp_path):
    """Two marked works, and a folder of web finds: attacked copies, an unmarked photo, junk."""
    src = tmp_path / "originals"
    coffee = workflow.mark_file(profile, _save(data.coffee(), src / "coffee.png"),
                                tmp_path / "coffee-marked.png")
    rocket = workflow.mark_file(profile, _save(data.rocket(), src / "rocket.png"),
                                tmp_path / "rocket-marked.png")
    web = tmp_path / "web-finds"
    marked_coffee = Image.open(tmp_path / "coffee-marked.png")
    _save(marked_coffee, web / "shop" / "mug-listing.jpg", quality=75)      # recompressed
    rocket_im = Image.open(tmp_path / "rocket-marked.png")
    w, h = rocket_im.size
    _save(rocket_im.crop((w // 5, h // 6, w // 5 + 360, h // 6 + 300)),
          web / "blog" / "launch-crop.jpg", quality=85)                     # cropped
    _save(data.chelsea(), web / "blog" / "cat.jpg", quality=85)            # never marked
    good = (web / "blog" / "cat.jpg").read_bytes()
    (web / "shop" / "broken.jpg").write_bytes(good[:2000])                 # truncated
    (web / "shop" / "page.html").write_text("<p>Tidewater Home Goods</p>")  # not an image
    return {"web": web, "coffee": coffee["work_id"], "rocket": rocket["work_id"]}


def _run(capsys, *args) -> tuple[int, list[dict], str]:
    code = main(list(args))
    cap = capsys.readouterr()
    rows = [json.loads(x) for x in cap.out.splitlines() if x.strip()] if "--json" in args else []
    return code, rows, cap.err


def test_scan_claims_the_marked_copies_and_names_their_works(profile, finds, tmp_path, capsys):
    report = tmp_path / "scan.csv"
    code, rows, err = _run(capsys, "scan", str(finds["web"]), "--json", "--workers", "1",
                           "--report", str(report))
    assert code == 1                                  # one file could not be read
    names = [Path(r["file"]).name for r in rows]
    # Sorted by path under the folder: blog/..., shop/...; the .html file is not an image.
    assert names == ["cat.jpg", "launch-crop.jpg", "broken.jpg", "mug-listing.jpg"]
    by = {Path(r["file"]).name: r for r in rows}
    assert by["mug-listing.jpg"]["detected"] and by["mug-listing.jpg"]["work_id"] == finds["coffee"]
    assert by["launch-crop.jpg"]["detected"] and by["launch-crop.jpg"]["work_id"] == finds["rocket"]
    for name in ("mug-listing.jpg", "launch-crop.jpg"):
        assert by[name]["registered"] is True
        assert by[name]["false_alarm_probability"] <= 1e-9
        assert set(by[name]["geometry"]) >= {"rotation_deg", "scale", "flipped", "shift_px"}
    assert by["cat.jpg"]["detected"] is False and by["cat.jpg"]["work_id"] is None
    assert "broken.jpg" in by["broken.jpg"]["error"]["message"]
    assert [by[n]["status"] for n in names] == ["not-found", "mark-found", "unreadable", "mark-found"]
    summary = json.loads(err.strip().splitlines()[0])["summary"]
    assert summary["files_read"] == 3 and summary["marks_found"] == 2
    assert summary["files_unreadable"] == 1 and summary["passed_over"] == 1    # page.html
    assert "claimkit: error: " in err and "broken.jpg" in err
    # The CSV has the same files, in the same order, with the same verdicts.
    with report.open(newline="") as fh:
        table = list(csv.DictReader(fh))
    assert [Path(r["file"]).name for r in table] == names
    assert [r["status"] for r in table] == ["not-found", "mark-found", "unreadable", "mark-found"]
    assert table[1]["work_id"] == finds["rocket"]
    assert table[3]["sha256"] == sha256_file(finds["web"] / "shop" / "mug-listing.jpg")


def test_scan_exit_codes(profile, finds, tmp_path, capsys):
    (finds["web"] / "shop" / "broken.jpg").unlink()
    code, _, _ = _run(capsys, "scan", str(finds["web"]), "--workers", "1")
    assert code == 0
    empty = tmp_path / "empty"
    empty.mkdir()
    code, _, err = _run(capsys, "scan", str(empty), "--workers", "1")
    assert code == 2 and "no image files found" in err
    code, _, err = _run(capsys, "scan", str(tmp_path / "not-there"))
    assert code == 2 and "not-there" in err and "Traceback" not in err


def test_payload_checker_agrees_with_the_profile(profile):
    """The picklable checker accepts exactly the payloads the profile's own tags make."""
    check = workflow.owner_payload_check(profile)

    def reference(bits):
        p = payload.unpack(bits)
        return (p["owner_tag"] == profile.owner_tag and p["serial"] > 0
                and p["tag"] == profile.payload_tag(p["serial"]))
    rng = np.random.default_rng(5)
    cases = []
    for serial in (1, 2, 77, 2**24 - 1):
        good = payload.pack(profile.owner_tag, serial, profile.payload_tag(serial))
        cases.append(good)
        bad = good.copy()
        bad[-1] ^= 1                                        # one tag bit wrong
        cases.append(bad)
    cases.append(payload.pack(profile.owner_tag ^ 1, 5, profile.payload_tag(5)))  # other owner
    cases += [rng.integers(0, 2, 64).astype(np.uint8) for _ in range(20)]
    for bits in cases:
        assert check(bits) == reference(bits)
    assert sum(check(b) for b in cases) == 4
    import pickle
    assert pickle.loads(pickle.dumps(check))(cases[0])


def test_cost_per_file_does_not_depend_on_the_registry(profile, finds, monkeypatch, capsys):
    """No per-file pass over the registered works: one look-up by serial per claimed file."""
    lookups = []
    real = profile.work_by_payload

    def by_payload(tag, serial):
        lookups.append(serial)
        return real(tag, serial)

    def forbidden(*a, **k):
        raise AssertionError("scan must not walk the registry")

    monkeypatch.setattr(profile, "work_by_payload", by_payload)
    monkeypatch.setattr(profile, "works", forbidden)
    monkeypatch.setattr(profile, "works_by_fingerprint", forbidden)
    scale.scan_folders(profile, [finds["web"]], workers=1, json_lines=True)
    capsys.readouterr()
    assert len(lookups) == 2


def test_claimed_copies_go_into_a_case(profile, finds, tmp_path, capsys):
    from claimkit.case.store import new_case, open_case

    case_dir = tmp_path / "case-tidewater"
    new_case(case_dir, "Tidewater Home Goods: unlicensed product photos", profile)
    code = scale.scan_folders(profile, [finds["web"]], workers=1, json_lines=True,
                             case_dir=case_dir)
    rows = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    assert code == 1
    exhibits = open_case(case_dir).exhibits()
    assert len(exhibits) == 2
    claimed = {sha256_file(r["file"]) for r in rows if r.get("detected")}
    assert {e.sha256 for e in exhibits} == claimed
    assert sorted(r["exhibit_id"] for r in rows if r.get("detected")) == ["exhibit-1", "exhibit-2"]
    # Scanning again does not take the same file in twice.
    scale.scan_folders(profile, [finds["web"]], workers=1, case_dir=case_dir)
    assert "already exhibit" in capsys.readouterr().err
    assert len(open_case(case_dir).exhibits()) == 2
    with pytest.raises(InputError, match="not a case folder"):
        scale.scan_folders(profile, [finds["web"]], workers=1, case_dir=tmp_path / "no-case")


def test_scan_with_two_worker_processes_matches_one(profile, finds, capsys):
    scale.scan_folders(profile, [finds["web"]], workers=1, json_lines=True)
    one = capsys.readouterr().out
    scale.scan_folders(profile, [finds["web"]], workers=2, json_lines=True)
    two = capsys.readouterr().out
    assert one == two


def test_another_owners_key_claims_nothing(tmp_path, finds, capsys):
    from claimkit.evidence.profile import Profile

    other = Profile.create(tmp_path / "other-home", "Oren Vasquez", b"another passphrase")
    try:
        code = scale.scan_folders(other, [finds["web"]], workers=1, json_lines=True)
    finally:
        other.close()
    rows = [json.loads(x) for x in capsys.readouterr().out.splitlines()]
    assert code == 1
    assert not any(r.get("detected") for r in rows)


def test_report_is_not_left_half_written(profile, finds, tmp_path, monkeypatch, capsys):
    report = tmp_path / "scan.csv"
    report.write_text("an older report\n")

    def boom(*a, **k):
        raise RuntimeError("simulated crash")

    monkeypatch.setattr(scan, "scan_task", boom)
    with pytest.raises(RuntimeError), monkeypatch.context() as m:
        m.setattr(scale, "_scan_line", boom)
        scale.scan_folders(profile, [finds["web"]], workers=1, report=report, force=True)
    assert report.read_text() == "an older report\n"
    assert not list(tmp_path.glob(".scan.csv.*"))


def test_ctrl_c_keeps_the_report_of_the_files_done(profile, finds, tmp_path, monkeypatch,
                                                   capsys):
    import signal

    real = scan.scan_task
    calls = []

    def task(*args):
        calls.append(args[0])
        if len(calls) == 2:
            signal.raise_signal(signal.SIGINT)
        return real(*args)

    monkeypatch.setattr(scan, "scan_task", task)
    report = tmp_path / "partial.csv"
    code = scale.scan_folders(profile, [finds["web"]], workers=1, json_lines=True, report=report)
    cap = capsys.readouterr()
    assert code == 130 and "interrupted" in cap.err
    rows = [json.loads(x) for x in cap.out.splitlines()]
    assert len(rows) == 2
    with report.open(newline="") as fh:
        assert [r["file"] for r in csv.DictReader(fh)] == [r["file"] for r in rows]
    summary = next(json.loads(x) for x in cap.err.splitlines() if x.startswith("{"))["summary"]
    assert summary["files_read"] == 2 and summary["not_started"] == 2
