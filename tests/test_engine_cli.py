"""The mark and examine commands as a user runs them, including bad input."""

from __future__ import annotations

import hashlib
import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from skimage import data

from claimkit.cli import main
from claimkit.mark.formats import CURRENT as CURRENT_FORMAT

CK = [sys.executable, "-m", "claimkit"]


def sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()   # FIPS 180-4 via hashlib, not claimkit


@pytest.fixture
def photo(tmp_path) -> Path:
    p = tmp_path / "harbour.png"
    Image.fromarray(data.coffee()).save(p)
    return p


def run(*args, env=None):
    return subprocess.run([*CK, *map(str, args)], capture_output=True, text=True, env=env,
                          check=False)


def test_mark_then_examine_json_contract(profile_home, photo, tmp_path):
    before = sha(photo)
    out = tmp_path / "harbour-marked.jpg"
    r = run("mark", photo, "--out", out, "--json")
    assert r.returncode == 0, r.stderr
    rep = json.loads(r.stdout)
    for key in ("work_id", "psnr_db", "ssim", "sha256_original", "sha256_marked"):
        assert key in rep
    assert rep["sha256_original"] == before == sha(photo)     # original untouched
    assert rep["sha256_marked"] == sha(out)
    assert rep["psnr_db"] >= 42 and rep["ssim"] >= 0.985

    crop = tmp_path / "found.jpg"
    Image.open(out).crop((41, 23, 441, 323)).save(crop, quality=70)
    r = run("examine", crop, photo, "--json")
    assert r.returncode == 0, r.stderr
    lines = [json.loads(x) for x in r.stdout.splitlines()]
    assert [x["file"] for x in lines] == [str(crop), str(photo)]
    hit, miss = lines
    assert hit["detected"] and hit["work_id"] == rep["work_id"] and hit["registered"]
    assert hit["false_alarm_probability"] <= 1e-9 and hit["message_psnr_db"] > 0
    for key in ("rotation_deg", "scale", "flipped", "shift_px"):
        assert key in hit["geometry"]
    assert not miss["detected"] and miss["work_id"] is None and miss["message_psnr_db"] is None
    assert 0 < miss["false_alarm_probability"] <= 1

    r = run("examine", crop)
    assert r.returncode == 0 and "MARK FOUND" in r.stdout and rep["work_id"] in r.stdout
    assert "not legal advice" in r.stdout


def _err(capsys):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) >= 1 and err[0].startswith("claimkit: error: ")
    assert "Traceback" not in "\n".join(err)
    return err[0]


@pytest.mark.parametrize("case", ["missing", "not_image", "truncated", "empty", "too_small"])
def test_bad_inputs_give_one_line_and_exit_2(profile_home, photo, tmp_path, capsys, case):
    bad = tmp_path / f"{case}.jpg"
    if case == "not_image":
        bad.write_text("this is a shopping list, not a photo\n")
    elif case == "truncated":
        Image.fromarray(data.coffee()).save(bad, quality=90)
        bad.write_bytes(bad.read_bytes()[:2000])
    elif case == "empty":
        bad.write_bytes(b"")
    elif case == "too_small":
        Image.fromarray(data.coffee()[:40, :90]).save(bad)
    out = tmp_path / "out.png"
    for argv in (["examine", str(bad)], ["mark", str(bad), "--out", str(out)]):
        assert main(argv) == 2
        line = _err(capsys)
        assert str(bad) in line
        if case == "too_small":
            assert "at least" in line
        assert not out.exists()


def test_pixel_limit_wrong_passphrase_no_profile_and_existing_output(profile_home, photo, tmp_path,
                                                                    capsys, monkeypatch):
    out = tmp_path / "m.png"
    assert main(["mark", str(photo), "--out", str(out), "--max-pixels", "1000"]) == 2
    assert "limit" in _err(capsys) and not out.exists()
    assert main(["mark", str(photo), "--out", str(out)]) == 0
    capsys.readouterr()
    digest = sha(out)
    assert main(["mark", str(photo), "--out", str(out)]) == 2
    assert "--force" in _err(capsys) and sha(out) == digest
    assert main(["mark", str(photo), "--out", str(photo), "--force"]) == 2
    _err(capsys)
    monkeypatch.setenv("CLAIMKIT_PASSPHRASE", "not the passphrase")
    assert main(["examine", str(out)]) == 2
    assert "passphrase" in _err(capsys)
    monkeypatch.setenv("CLAIMKIT_HOME", str(tmp_path / "nobody"))
    assert main(["examine", str(out)]) == 2
    assert "init" in _err(capsys)


def test_sixteen_bit_grey_round_trip(profile_home, tmp_path, capsys):
    src = tmp_path / "scan16.png"
    grey = (data.moon().astype(np.uint16) * 257)
    Image.fromarray(grey).save(src)
    out = tmp_path / "scan16-marked.png"
    assert main(["mark", str(src), "--out", str(out)]) == 0
    written = np.array(Image.open(out))
    assert written.dtype.itemsize == 2 or written.max() > 255
    capsys.readouterr()
    assert main(["examine", "--json", str(out)]) == 0
    assert json.loads(capsys.readouterr().out)["detected"]


def test_verdict_names_an_older_mark_format():
    from claimkit.cli.engine import _verdict_line
    rep = {"file": "copy.jpg", "detected": True, "work_id": "W-0001-000001", "registered": True,
           "false_alarm_text": "below 1e-12", "geometry_text": "no rotation, scaling or mirroring",
           "message_psnr_db": 25.0, "mark_format": "claimkit-mark/1"}
    assert "older format claimkit-mark/1" in _verdict_line(rep)
    rep["mark_format"] = CURRENT_FORMAT.name
    assert "older format" not in _verdict_line(rep)
