"""One JSON vocabulary across every command (``schemas/vocabulary.json``).

A whole flow is run through the command line with ``--json``; every object
printed is read back with Python's ``json`` module and each top-level field
is checked against the vocabulary: the name is listed, the JSON type is the
listed one (the same fact has the same type in every command), status values
are single tokens from the list, and none of the retired synonyms appears
(``out``, ``bundle`` for the output path; ``original``, ``input`` for the input file).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest
from PIL import Image
from skimage import data

from claimkit.cli import main

VOCAB = json.loads((Path(__file__).resolve().parent.parent / "schemas" / "vocabulary.json")
                   .read_text(encoding="utf-8"))
_JSON_TYPES = {str: "string", bool: "boolean", int: "integer", float: "number",
               list: "array", dict: "object", type(None): "null"}


def json_type(value) -> str:
    return _JSON_TYPES[type(value)]


def check_object(command: str, obj: dict) -> None:
    fields = VOCAB["fields"]
    for key, value in obj.items():
        assert key not in VOCAB["retired"], f"{command}: {key} (say {VOCAB['retired'][key]})"
        assert key in fields, f"{command}: field {key!r} is not in schemas/vocabulary.json"
        allowed = fields[key]["type"]
        allowed = allowed if isinstance(allowed, list) else [allowed]
        got = json_type(value)
        assert got in allowed or (got == "integer" and "number" in allowed), \
            f"{command}: {key} is {got}, the vocabulary says {allowed}"
    if "status" in obj:
        assert obj["status"] in VOCAB["status"], f"{command}: status {obj['status']!r}"
        assert " " not in obj["status"]


def run_json(capsys, command: str, argv: list[str], *, code: int = 0,
             summary: bool = False) -> list[dict]:
    """Run a command; check every JSON object on stdout, and with ``summary`` the summary
    object on stderr (its one line of JSON, beside the human ``claimkit: error:`` lines)
    and every field inside it. Returns the stdout rows, then the summary object."""
    assert main(argv) == code, (argv, capsys.readouterr().err)
    cap = capsys.readouterr()
    rows = [json.loads(line) for line in cap.out.splitlines() if line.strip()]
    assert rows, f"{command} printed no JSON"
    for row in rows:
        check_object(command, row)
    if summary:
        told = [json.loads(x) for x in cap.err.splitlines() if x.startswith("{")]
        assert len(told) == 1 and list(told[0]) == ["summary"], (command, cap.err)
        check_object(f"{command} (stderr)", told[0])
        check_object(f"{command} (stderr summary)", told[0]["summary"])
        rows.append(told[0]["summary"])
    return rows


def test_vocabulary_document_is_consistent():
    for name, spec in VOCAB["fields"].items():
        assert spec.get("meaning"), name
        types = spec["type"] if isinstance(spec["type"], list) else [spec["type"]]
        assert set(types) <= set(_JSON_TYPES.values()), name
    assert all(" " not in s for s in VOCAB["status"])
    assert not set(VOCAB["retired"]) & set(VOCAB["fields"])


@pytest.mark.slow
def test_every_command_speaks_the_vocabulary(tmp_path, monkeypatch, capsys, local_tsa):
    home = tmp_path / "home"
    monkeypatch.setenv("CLAIMKIT_HOME", str(home))
    monkeypatch.setenv("CLAIMKIT_PASSPHRASE", "vocabulary test passphrase")
    shoot = tmp_path / "shoot"
    shoot.mkdir()
    Image.fromarray(data.coffee()[:256, :320]).save(shoot / "cup.png")
    Image.fromarray(data.chelsea()[:256, :320]).save(shoot / "cat.jpg", quality=92)
    seen: set[str] = set()

    def run(command, argv, **kw):
        rows = run_json(capsys, command, argv, **kw)
        for r in rows:
            seen.update(r)
        return rows

    run("init", ["init", "--owner", "Ilse Marrow", "--json"])
    run("rights set", ["rights", "set", "--web-statement", "https://x.example/terms", "--json"])
    run("rights show", ["rights", "show", "--json"])
    marked = tmp_path / "web" / "cup.jpg"
    mark = run("mark", ["mark", str(shoot / "cup.png"), "--out", str(marked), "--json"])[0]
    told = run("mark (folder)", ["mark", str(shoot), "--out", str(tmp_path / "marked"), "--json",
                                 "--workers", "1"], summary=True)[-1]
    assert told["inputs"] == 2 and told["marked"] + told["already_done"] == 2
    assert told["files_failed"] == 0
    run("works", ["works", "--json"])
    run("works show", ["works", "show", mark["work_id"], "--json"])
    tsq = tmp_path / "s.tsq"
    run("stamp request", ["stamp", "request", "--out", str(tsq), "--json"])
    tsr = local_tsa.reply_file(tsq, tmp_path / "s.tsr")
    run("stamp attach", ["stamp", "attach", str(tsr), "--tsa-cert", str(local_tsa.ca_cert),
                         "--json"])
    run("log verify", ["log", "verify", "--json"])
    run("key export", ["key", "export", "--out", str(tmp_path / "k.pem"), "--json"])
    run("disclose", ["disclose", mark["work_id"], "--out", str(tmp_path / "disc"), "--json"])
    copy = tmp_path / "found" / "copy.jpg"
    copy.parent.mkdir()
    with Image.open(marked) as im:
        im.resize((288, 230)).save(copy, quality=85)
    bad = tmp_path / "found" / "notes.jpg"
    bad.write_text("not a picture")
    rows = run("examine", ["examine", str(copy), str(bad), "--json"], code=2)
    assert rows[0]["detected"] and "error" in rows[1]
    run("stress", ["stress", str(marked), "--json"])
    case = tmp_path / "case"
    run("case new", ["case", "new", str(case), "--title", "Cup on a shop site", "--json"])
    run("case add", ["case", "add", str(case), str(copy), "--source", "https://x.example/p",
                     "--json"])
    run("case examine", ["case", "examine", str(case), "--decoys", "2", "--no-robustness",
                         "--json"])
    run("report", ["report", str(case), "--json", "--disclose", "--out",
                   str(tmp_path / "d.pdf")])
    run("case export", ["case", "export", str(case), "--out", str(tmp_path / "b.zip"), "--json"])
    run("verify", ["verify", str(tmp_path / "b.zip"), "--json"])
    told = run("scan", ["scan", str(tmp_path / "found"), "--json", "--workers", "1"], code=1,
               summary=True)[-1]
    assert told["files_read"] == 1 and told["marks_found"] == 1 and told["files_unreadable"] == 1
    run("case withdraw", ["case", "withdraw", str(case), "1", "--reason", "licensed", "--json"])
    monkeypatch.setenv("XDG_RUNTIME_DIR", str(tmp_path))      # the session file's folder
    session = run("unlock", ["unlock", "--for", "5m", "--json"])[0]
    monkeypatch.setenv(session["variable"], session["session"])
    run("lock", ["lock", "--json"])
    # Every field of the vocabulary but those of commands not run here is in use.
    unused = set(VOCAB["fields"]) - seen - set(VOCAB.get("not_run_here", []))
    assert not unused, f"listed but never printed: {sorted(unused)}"
