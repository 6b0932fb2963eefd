"""Exit codes and overwrite rules for every problem a user can fix, intake refusal, withdrawal.

Each bad input must give exit 2 with one line ``claimkit: error: ...`` on
stderr, never exit 3 (internal fault), and never replace a file without
``--force``. Runs as root in CI, where permission bits do not stop writes, so
an unwritable place is made with a path under a regular file (ENOTDIR).
"""

from __future__ import annotations

import json

import pytest
from PIL import Image
from skimage import data

from claimkit.cli import main


def _one_error_line(capsys) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert err and err[0].startswith("claimkit: error: "), err
    assert "internal fault" not in err[0] and "Traceback" not in "\n".join(err)
    return err[0]


@pytest.fixture
def marked(profile_home, tmp_path, capsys):
    src = tmp_path / "coffee.png"
    Image.fromarray(data.coffee()[:256, :256]).save(src)
    out = tmp_path / "coffee-m.png"
    assert main(["mark", str(src), "--out", str(out)]) == 0
    capsys.readouterr()
    return out


def test_examine_goes_on_past_a_bad_file(marked, tmp_path, capsys):
    bad = tmp_path / "notes.jpg"
    bad.write_text("not a picture")
    assert main(["examine", "--json", str(bad), str(marked)]) == 2
    cap = capsys.readouterr()
    rows = [json.loads(line) for line in cap.out.splitlines()]
    assert rows[0]["file"] == str(bad) and rows[0]["error"]["exit_code"] == 2
    assert rows[1]["file"] == str(marked) and rows[1]["detected"] is True
    assert cap.err.startswith(f"claimkit: error: {bad}: ")


def test_no_output_replaced_without_force(marked, tmp_path, capsys):
    folder = tmp_path / "finds"
    folder.mkdir()
    (folder / "a.png").write_bytes(marked.read_bytes())
    report = tmp_path / "exists.csv"
    report.write_text("keep me\n")
    assert main(["scan", str(folder), "--report", str(report), "--workers", "1"]) == 2
    assert "--force" in _one_error_line(capsys) and report.read_text() == "keep me\n"
    assert main(["scan", str(folder), "--report", str(report), "--workers", "1",
                 "--force"]) == 0
    assert report.read_text().startswith("file") or "," in report.read_text()


def test_unwritable_places_are_exit_2(profile_home, marked, tmp_path, capsys):
    blocker = tmp_path / "plain-file"
    blocker.write_text("x")
    below = blocker / "sub"                     # ENOTDIR: a path under a regular file
    argvs = [
        ["case", "new", str(below / "case"), "--title", "t"],
        ["scan", str(marked), "--report", str(below / "r.csv"), "--workers", "1"],
        ["demo", str(below / "demo")],
        ["key", "export", "--out", str(below / "k.pem")],
        ["mark", str(marked), "--out", str(below / "m.png")],
    ]
    for argv in argvs:
        assert main(argv) == 2, argv
        _one_error_line(capsys)


@pytest.mark.parametrize("kind", ["truncated", "one-pixel", "bomb", "not-an-image"])
def test_intake_refuses_what_cannot_be_examined(profile_home, tmp_path, capsys, monkeypatch,
                                               kind):
    assert main(["case", "new", str(tmp_path / "case"), "--title", "Harbour copies"]) == 0
    bad = tmp_path / f"{kind}.jpg"
    if kind == "truncated":
        Image.fromarray(data.coffee()).save(bad, quality=90)
        bad.write_bytes(bad.read_bytes()[:5000])
    elif kind == "one-pixel":
        Image.new("RGB", (1, 1)).save(bad)
    elif kind == "bomb":
        Image.new("L", (4000, 4000)).save(bad, quality=50)     # small file, many pixels
        monkeypatch.setenv("CLAIMKIT_MAX_PIXELS", "1000000")
    else:
        bad.write_text("a shopping list")
    capsys.readouterr()
    assert main(["case", "add", str(tmp_path / "case"), str(bad), "--source", "x"]) == 2
    line = _one_error_line(capsys)
    assert str(bad) in line
    assert not list((tmp_path / "case" / "exhibits").glob("*.json"))


def test_withdraw_keeps_the_exhibit_and_logs_it(profile_home, marked, tmp_path, capsys):
    case = tmp_path / "case"
    second = tmp_path / "copy.jpg"
    Image.open(marked).save(second, quality=90)
    assert main(["case", "new", str(case), "--title", "Harbour copies"]) == 0
    for f in (marked, second):
        assert main(["case", "add", str(case), str(f), "--source", f"https://x.example/{f.name}"]) == 0
    assert main(["case", "examine", str(case), "--decoys", "2", "--no-robustness"]) == 0
    assert main(["case", "withdraw", str(case), "2", "--reason", "licensed after all",
                 "--json"]) == 0
    row = json.loads(capsys.readouterr().out.splitlines()[-1])
    assert row["status"] == "withdrawn" and row["exhibit_id"] == "exhibit-2"
    assert list((case / "exhibits").glob("exhibit-2-*"))          # the copy is kept
    assert (case / "exhibits" / "withdrawn" / "exhibit-2.json").is_file()
    log = "".join(p.read_text() for p in profile_home.rglob("*.jsonl"))
    assert "exhibit withdrawn" in log
    assert main(["case", "withdraw", str(case), "exhibit-2", "--reason", "again"]) == 2
    _one_error_line(capsys)
    assert main(["report", str(case), "--json"]) == 0
    rep = json.loads(capsys.readouterr().out)
    assert rep["summary"]["detected"] == ["exhibit-1"]
    text = (case / "report" / "dossier.html").read_text()
    assert "Exhibit 2" in text and "withdrawn" in text and "licensed after all" in text
    assert main(["case", "export", str(case), "--out", str(tmp_path / "b.zip")]) == 0
    # The key disclosure travels apart from the bundle; with it everything re-runs.
    work_id = rep["summary"]["works"][0]
    (tmp_path / "keys").mkdir()
    assert main(["disclose", work_id, "--out", str(tmp_path / "keys" / work_id)]) == 0
    assert main(["verify", str(tmp_path / "b.zip"), "--disclosure",
                 str(tmp_path / "keys")]) == 0, capsys.readouterr().out


def test_one_input_with_a_folder_for_out_says_so(marked, tmp_path, capsys):
    # With one input --out names the marked file: an existing folder, or a path written as a
    # folder (a trailing slash) that does not exist yet, gets the same line, and nothing is made.
    for out in (str(tmp_path), str(tmp_path / "new-folder") + "/"):
        assert main(["mark", str(marked), "--out", out]) == 2
        assert "with one input, --out names the marked file" in _one_error_line(capsys)
    assert not (tmp_path / "new-folder").exists()
