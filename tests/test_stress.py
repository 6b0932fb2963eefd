"""The attack battery (claimkit.stress) and the ``claimkit stress`` command.

The geometric round trips here are the issue's list: each copy is made with
Pillow (rotate, resize, JPEG) or scikit-image (rescale), examined blind, and
the estimated geometry is checked against the attack's own parameters.
"""

from __future__ import annotations

import io
import json

import numpy as np
import pytest
from PIL import Image
from skimage import data

from claimkit import stress
from claimkit.cli import main
from tests.engine_helpers import SEED, mark, payload

ISSUE_ATTACKS = ["rotate 3", "rotate 17", "rotate 45", "rotate 90", "rotate -128",
                 "resize 0.5", "resize 0.7", "resize 1.6", "aspect 0.9", "mirror",
                 "social 1080 4:5 jpeg 80", "shrink 0.6 rotate 2 jpeg 70"]


def check(bits):
    return bool(np.array_equal(np.asarray(bits), payload()))


@pytest.fixture(scope="module")
def attacks():
    return {a.name: a for a in stress.battery()}


@pytest.fixture(scope="module")
def pictures():
    # 872 x 1000 (dark and noisy: the hard case for the lattice) and 400 x 600.
    return {"hubble": mark(data.hubble_deep_field()), "coffee": mark(data.coffee())}


@pytest.mark.parametrize("pic", ["hubble", "coffee"])
@pytest.mark.parametrize("name", ISSUE_ATTACKS)
def test_issue_attacks_are_claimed_with_the_right_geometry(pictures, attacks, pic, name):
    row = stress.run_attack(attacks[name], pictures[pic], SEED, check,
                            reference_bits=payload().tolist())
    assert row["detected"] and row["same_payload"], row
    assert row["false_alarm_probability"] <= 1e-9, row
    assert abs(row["rotation_error_deg"]) <= stress.ROTATION_TOLERANCE_DEG, row
    assert abs(row["scale_error"]) <= stress.SCALE_TOLERANCE, row
    assert row["estimated_geometry"]["flipped"] == row["true_geometry"]["flipped"]
    assert row["geometry_ok"]


def test_skimage_rescale_round_trip(pictures, attacks):
    row = stress.run_attack(attacks["rescale 0.8 (skimage)"], pictures["hubble"], SEED, check,
                            reference_bits=payload().tolist())
    assert row["detected"] and row["same_payload"] and row["geometry_ok"], row
    assert row["true_geometry"]["scale"] == 0.8


def test_quick_battery_rows(pictures):
    seen = []
    rows = stress.run_battery(pictures["coffee"], SEED, check, quick=True, progress=seen.append)
    names = [a.name for a in stress.battery(quick=True)]
    assert [r["attack"] for r in rows] == names and rows[0]["attack"] == "none"
    assert len(seen) == len(rows)
    for r in rows:
        for key in ("params", "true_geometry", "detected", "same_payload", "false_alarm_probability",
                    "log10_false_alarm_probability", "message_psnr_db", "estimated_geometry",
                    "rotation_error_deg", "scale_error", "geometry_ok", "width", "height"):
            assert key in r, key
        assert "payload_bits" not in r
        json.dumps(r)                                # JSON-ready as it stands
    found = [r for r in rows if r["detected"]]
    assert rows[0]["detected"] and rows[0]["same_payload"] is True
    assert len(found) >= len(rows) - 1, [r["attack"] for r in rows if not r["detected"]]
    assert all(r["same_payload"] for r in found)
    summary = stress.summary(rows)
    assert summary["attacks"] == len(rows) and summary["detected"] == len(found)


def test_unmarked_picture_gives_no_claim_and_no_reference(attacks):
    rows = stress.run_battery(data.rocket(), SEED, check, quick=True)
    assert not any(r["detected"] for r in rows)
    assert all(r["same_payload"] is None for r in rows)
    assert stress.summary(rows)["detected"] == 0


def test_attacks_leave_no_border_and_keep_the_aspect():
    white = np.full((300, 500, 3), 255, dtype=np.uint8)
    for deg in (3, 17, 45, -128):
        out = stress.rotate_crop(white, deg)
        assert out.min() >= 250, deg           # no black corner left by the rotation
        assert abs(out.shape[1] / out.shape[0] - 500 / 300) < 0.02
    assert stress.rotate_crop(white, 90).shape == (500, 300, 3)
    social = stress.social(np.full((600, 900, 3), 128, dtype=np.uint8))
    assert social.shape[1] / social.shape[0] == pytest.approx(4 / 5, abs=0.01)
    assert stress.resize(white, 0.9, 1.0).shape == (300, 450, 3)


def test_geometry_errors_wrap_angles():
    truth = {"rotation_deg": -128.0, "scale": 0.6, "aspect": 1.0, "flipped": False}
    est = {"rotation_deg": 231.8, "scale": 0.606, "aspect": 1.0, "flipped": False}
    rot, scl, ok = stress.geometry_errors(truth, est)
    assert rot == pytest.approx(-0.2) and scl == pytest.approx(0.01) and ok
    assert stress.geometry_errors(truth, dict(est, flipped=True))[2] is False
    assert stress.geometry_errors(truth, {}) == (None, None, False)


def test_plot_is_a_png_with_one_bar_per_attack():
    rows = []
    for i, (det, ok) in enumerate([(True, True), (True, False), (False, False)]):
        rows.append({"attack": f"attack {i}", "detected": det, "same_payload": det or None,
                     "geometry_ok": ok, "log10_false_alarm_probability": -40.0 if det else 0.0,
                     "true_geometry": {"rotation_deg": 17.0, "scale": 1.0, "aspect": 1.0, "flipped": False},
                     "estimated_geometry": {"rotation_deg": 16.9, "scale": 1.0, "aspect": 1.0,
                                            "flipped": False} if det else None})
    png = stress.plot_png(rows, title="test")
    im = Image.open(io.BytesIO(png))
    assert im.format == "PNG"
    px = np.asarray(im.convert("RGB")).reshape(-1, 3)
    for colour in (stress._OK, stress._WARN):
        assert np.any(np.all(px == colour, axis=1)), colour


# ---------------------------------------------------------------- command line

@pytest.fixture
def marked_file(profile_home, tmp_path):
    src = tmp_path / "harbour.png"
    Image.fromarray(data.coffee()).save(src)
    out = tmp_path / "harbour_marked.png"
    assert main(["mark", str(src), "--out", str(out)]) == 0
    return out


def test_cli_stress_json_and_plot(marked_file, tmp_path, capsys):
    capsys.readouterr()
    plot = tmp_path / "survives.png"
    assert main(["stress", str(marked_file), "--quick", "--json", "--plot", str(plot)]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    rows = [json.loads(line) for line in lines]
    assert [r["attack"] for r in rows] == [a.name for a in stress.battery(quick=True)]
    assert all(r["file"] == str(marked_file) for r in rows)
    assert rows[0]["detected"] and rows[0]["same_payload"]
    assert Image.open(plot).format == "PNG"
    # An existing plot is not replaced without --force.
    assert main(["stress", str(marked_file), "--quick", "--plot", str(plot)]) == 2
    assert "already exists" in capsys.readouterr().err


def test_cli_stress_bad_input(profile_home, tmp_path, capsys):
    missing = tmp_path / "nowhere.jpg"
    assert main(["stress", str(missing)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) >= 1 and err[0].startswith("claimkit: error: ") and str(missing) in err[0]
    bad = tmp_path / "notes.txt"
    bad.write_text("not a picture")
    assert main(["stress", str(bad)]) == 2
    assert capsys.readouterr().err.startswith("claimkit: error: ")
    Image.fromarray(data.coffee()).save(tmp_path / "c.png")
    assert main(["stress", str(tmp_path / "c.png"), "--plot", str(tmp_path / "p.jpg")]) == 2
    assert ".png" in capsys.readouterr().err


def test_summary_separates_other_payloads_from_misses():
    rows = [{"attack": "none", "detected": True, "same_payload": True, "geometry_ok": True},
            {"attack": "a", "detected": True, "same_payload": False, "geometry_ok": True},
            {"attack": "b", "detected": False, "same_payload": None, "geometry_ok": False}]
    s = stress.summary(rows)
    assert s == {"attacks": 3, "detected": 1, "other_payload": ["a"], "geometry_ok": 2, "missed": ["b"]}
