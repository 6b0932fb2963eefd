"""Batch marking: trees, skips, bad files, a vanished file, a full disk, Ctrl-C, resumption.

Every test ends with :func:`assert_consistent`, the invariant the batch layer
promises whatever happened to the run: each output file under its final name
is registered with exactly its SHA-256, each original is registered at most
once, no staged or partial file is left, and the profile's own audit (custody
log signatures and chain, record signatures) passes.
"""

from __future__ import annotations

import errno
import json
import os
import signal
import subprocess
import sys
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path

import numpy as np
import pytest
from PIL import Image
from skimage import data

from claimkit import batch, runner, workflow
from claimkit.cli import scale
from claimkit.evidence.profile import Profile
from claimkit.evidence.storage import sha256_file
from tests.conftest import TEST_PASSPHRASE


def _save(img: np.ndarray, path: Path, **kw) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    Image.fromarray(img).save(path, **kw)
    return path


@pytest.fixture
def shoot(tmp_path) -> Path:
    """A small shoot in two day folders (skimage.data pictures), plus a note file."""
    root = tmp_path / "shoot"
    _save(data.coffee(), root / "day1" / "coffee.jpg", quality=92)
    _save(data.chelsea(), root / "day1" / "chelsea.png")
    _save(data.rocket()[:320, :480], root / "day2" / "rocket.jpg", quality=92)
    _save(data.brick(), root / "day2" / "brick.tif")
    _save(data.coins(), root / "day2" / "deeper" / "coins.png")
    (root / "notes.txt").write_text("shot list for Harwick Bay Studio")
    return root


def _originals(root: Path) -> list[Path]:
    return sorted(p for p in root.rglob("*") if p.suffix in (".jpg", ".png", ".tif"))


def assert_consistent(profile: Profile, out: Path, originals: list[Path]) -> None:
    works = profile.works()
    by_orig: dict[str, list] = {}
    for w in works:
        by_orig.setdefault(w.record["original"]["sha256"], []).append(w.work_id)
    assert all(len(v) == 1 for v in by_orig.values()), f"an original registered twice: {by_orig}"
    marked_hashes = {w.record["marked"]["sha256"]: w for w in works}
    for f in out.rglob("*"):
        if f.is_file():
            assert not f.name.startswith("."), f"staged or partial file left: {f}"
            h = sha256_file(f)
            assert h in marked_hashes, f"output {f} is not registered"
    orig_hashes = {sha256_file(p) for p in originals if p.exists()}
    assert set(by_orig) <= orig_hashes, "a work was registered for a file not in the batch"
    audit = profile.audit()
    assert audit.ok, audit.problems


def _lines(capsys) -> tuple[list[dict], str]:
    cap = capsys.readouterr()
    return [json.loads(line) for line in cap.out.splitlines() if line.strip()], cap.err


# --------------------------------------------------------------------------- the runner

class _ThreadEngine(runner._Engine):
    """Threads stand in for processes: lets the test watch how many tasks are in flight."""

    name = "threads"

    def __init__(self, n):
        self.slots = n
        self.pool = ThreadPoolExecutor(n)

    def submit(self, fn, *args):
        return self.pool.submit(fn, *args)

    def wait_any(self, futures, timeout):
        import concurrent.futures as cf
        cf.wait(futures, timeout=timeout, return_when=cf.FIRST_COMPLETED)

    def close(self, *, cancel=False):
        self.pool.shutdown(wait=not cancel, cancel_futures=cancel)


def _slow_square(i: int) -> int:
    time.sleep(0.002 * ((i * 7) % 5))      # finish out of order
    return i * i


def test_runner_keeps_order_and_bounds_the_work_in_flight():
    eng = _ThreadEngine(3)
    submitted, handed = [0], []
    peak = [0]

    def items():
        for i in range(60):
            submitted[0] += 1
            peak[0] = max(peak[0], submitted[0] - len(handed))
            yield i, (i,)

    complete = runner.run_ordered(eng, _slow_square, items(),
                                  lambda o: handed.append((o.item, o.value)),
                                  guard=runner.StopGuard(), window=5)
    assert complete
    assert handed == [(i, i * i) for i in range(60)]
    # At most `window` submitted and not handed back, whatever the length of the batch.
    assert peak[0] <= 5


def test_runner_stop_request_finishes_what_is_in_flight():
    eng = _ThreadEngine(2)
    guard = runner.StopGuard()
    handed = []

    def on_result(o):
        handed.append(o.item)
        if o.item == 3:
            guard.request("test")

    complete = runner.run_ordered(eng, _slow_square, ((i, (i,)) for i in range(100)), on_result,
                                  guard=guard, window=4)
    assert not complete
    assert handed == list(range(len(handed)))       # nothing skipped in between
    assert 4 <= len(handed) <= 8                     # stopped within one window


# --------------------------------------------------------------------------- marking

def test_marks_a_tree_and_registers_every_file(profile, shoot, tmp_path, capsys):
    out = tmp_path / "marked"
    code = scale.mark_many(profile, [shoot], out, workers=1, json_lines=True)
    rows, err = _lines(capsys)
    assert code == 0, err
    originals = _originals(shoot)
    assert [r["file"] for r in rows] == [str(p) for p in originals]   # input order
    assert {r["status"] for r in rows} == {"marked"}
    for r in rows:
        rel = Path(r["file"]).relative_to(shoot)
        assert Path(r["output"]) == out / rel                               # tree kept
        assert sha256_file(out / rel) == r["sha256_marked"]
        assert r["psnr_db"] >= 40
    assert not (out / "notes.txt").exists()
    assert len(profile.works()) == len(originals)
    # The marks are real: a blind examination of an output names its work.
    rep, _ = workflow.examine_file(profile, out / "day1" / "coffee.jpg")
    assert rep["detected"] and rep["work_id"] == rows[1]["work_id"]
    assert_consistent(profile, out, originals)


def test_a_batch_worker_marks_exactly_as_mark_file(profile, shoot, tmp_path):
    """Same picture, same serial: the same bytes and the same recorded measures."""
    from claimkit.mark import payload

    src = shoot / "day1" / "coffee.jpg"
    single = workflow.mark_file(profile, src, tmp_path / "single.jpg")
    serial = single["serial"]
    bits = payload.pack(profile.owner_tag, serial, profile.payload_tag(serial))
    staged = tmp_path / ".staged.jpg"
    from claimkit.evidence.rights import load_rights

    meta = workflow.FileMetadata(rights=load_rights(profile.home, profile.owner),
                                 work_id=single["work_id"],
                                 registry=workflow.registry_name(profile))
    got = batch.mark_task(str(src), str(staged), profile.detection_seed,
                          [int(b) for b in bits], 1.0, 95, None, meta)
    assert got["sha256_marked"] == single["sha256_marked"] == sha256_file(staged)
    record = profile.work(single["work_id"]).record
    assert got["quality"] == record["quality"]
    assert got["fingerprint"] == record["fingerprint"]
    assert got["capture"] == record["capture"]


def test_second_run_marks_nothing_twice(profile, shoot, tmp_path, capsys):
    out = tmp_path / "marked"
    assert scale.mark_many(profile, [shoot], out, workers=1) == 0
    capsys.readouterr()
    before = len(profile.works())
    assert scale.mark_many(profile, [shoot], out, workers=1, json_lines=True) == 0
    rows, _ = _lines(capsys)
    assert {r["status"] for r in rows} == {"skipped"}
    assert len(profile.works()) == before
    # A marked copy given as input is recognised too, not marked again.
    assert scale.mark_many(profile, [out / "day1"], tmp_path / "again", workers=1,
                           json_lines=True) == 0
    rows, _ = _lines(capsys)
    assert [r["reason"] for r in rows] == ["is itself a marked copy"] * 2
    assert len(profile.works()) == before


def test_bad_files_are_listed_and_the_rest_is_marked(profile, shoot, tmp_path, capsys):
    good = (shoot / "day1" / "coffee.jpg").read_bytes()
    (shoot / "day1" / "truncated.jpg").write_bytes(good[: len(good) // 3])
    (shoot / "day1" / "letter.jpg").write_text("Dear Tidewater Home Goods, ...")
    _save(data.coffee()[:100, :100], shoot / "day1" / "tiny.png")
    out = tmp_path / "marked"
    code = scale.mark_many(profile, [shoot], out, workers=1, json_lines=True)
    rows, err = _lines(capsys)
    assert code == 1
    failed = {Path(r["file"]).name: r["error"]["message"] for r in rows
              if r["status"] == "failed"}
    assert set(failed) == {"truncated.jpg", "letter.jpg", "tiny.png"}
    assert "truncated" in failed["truncated.jpg"] or "damaged" in failed["truncated.jpg"]
    assert "not an image" in failed["letter.jpg"]
    assert "at least 128" in failed["tiny.png"]
    for name in failed:      # listed again at the end, one line each, naming the file
        assert any(line.startswith("claimkit: error: ") and name in line
                   for line in err.splitlines())
    assert sum(r["status"] == "marked" for r in rows) == 5
    assert_consistent(profile, out, _originals(shoot))


def test_every_input_bad_is_exit_2(profile, tmp_path, capsys):
    folder = tmp_path / "junk"
    folder.mkdir()
    (folder / "a.jpg").write_bytes(b"\xff\xd8\xff\xe0 not really")
    (folder / "b.png").write_text("text")
    assert scale.mark_many(profile, [folder], tmp_path / "out", workers=1) == 2
    assert scale.mark_many(profile, [tmp_path / "nowhere.jpg", folder], tmp_path / "out",
                           workers=1) == 2
    empty = tmp_path / "empty"
    empty.mkdir()
    assert scale.mark_many(profile, [empty], tmp_path / "out", workers=1) == 2
    assert profile.works() == []


def test_a_file_that_vanishes_mid_run(profile, shoot, tmp_path, monkeypatch, capsys):
    victim = shoot / "day2" / "rocket.jpg"
    real = batch.mark_task
    calls = []

    def task(*args):
        calls.append(args[0])
        if len(calls) == 1:
            victim.unlink()              # gone after the file list was made
        return real(*args)

    monkeypatch.setattr(batch, "mark_task", task)
    out = tmp_path / "marked"
    code = scale.mark_many(profile, [shoot], out, workers=1, json_lines=True)
    rows, _ = _lines(capsys)
    assert code == 1
    gone = [r for r in rows if r["file"] == str(victim)]
    assert gone[0]["status"] == "failed" and "no such file" in gone[0]["error"]["message"]
    assert sum(r["status"] == "marked" for r in rows) == 4
    assert_consistent(profile, out, _originals(shoot))


def test_full_disk_stops_keeps_what_was_done_and_resumes(profile, shoot, tmp_path,
                                                         monkeypatch, capsys):
    from claimkit import imageio

    real = imageio._atomic_write
    writes = []

    def writer(path, payload, *, force):
        writes.append(path)
        if len(writes) > 2:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC), str(path))
        return real(path, payload, force=force)

    monkeypatch.setattr(imageio, "_atomic_write", writer)
    out = tmp_path / "marked"
    code = scale.mark_many(profile, [shoot], out, workers=1, json_lines=True)
    rows, err = _lines(capsys)
    assert code == 1
    assert [r["status"] for r in rows] == ["marked", "marked", "failed"]
    assert rows[2]["kind"] == "disk-full"
    assert "stopped early: the disk is full" in err
    summary = json.loads(err.splitlines()[0])["summary"]
    assert summary["not_started"] == 2 and summary["marked"] == 2
    assert len(profile.works()) == 2
    assert_consistent(profile, out, _originals(shoot))

    monkeypatch.setattr(imageio, "_atomic_write", real)     # space freed
    assert scale.mark_many(profile, [shoot], out, workers=1, json_lines=True) == 0
    rows, _ = _lines(capsys)
    assert [r["status"] for r in rows] == ["skipped"] * 2 + ["marked"] * 3
    assert len(profile.works()) == 5
    assert_consistent(profile, out, _originals(shoot))


def test_full_registry_disk_registers_nothing_half_way(profile, shoot, tmp_path,
                                                      monkeypatch, capsys):
    import sqlite3

    real = profile.register_work
    calls = []

    def register(*a, **k):
        calls.append(a)
        if len(calls) == 2:
            # What SQLite raises (Python 3.11+ carries the result code, SQLITE_FULL = 13).
            exc = sqlite3.OperationalError("database or disk is full")
            exc.sqlite_errorcode = sqlite3.SQLITE_FULL
            raise exc
        return real(*a, **k)

    monkeypatch.setattr(profile, "register_work", register)
    out = tmp_path / "marked"
    code = scale.mark_many(profile, [shoot], out, workers=1, json_lines=True)
    rows, err = _lines(capsys)
    assert code == 1
    assert [r["status"] for r in rows] == ["marked", "failed"]
    assert rows[1]["kind"] == "disk-full" and "stopped early" in err
    assert not Path(rows[1]["output"]).exists()          # never in place unregistered
    assert len(profile.works()) == 1
    assert_consistent(profile, out, _originals(shoot))
    monkeypatch.setattr(profile, "register_work", real)
    assert scale.mark_many(profile, [shoot], out, workers=1) == 0
    assert len(profile.works()) == 5
    assert_consistent(profile, out, _originals(shoot))


def test_ctrl_c_in_process_finishes_the_current_file(profile, shoot, tmp_path,
                                                     monkeypatch, capsys):
    real = batch.mark_task
    calls = []

    def task(*args):
        calls.append(args[0])
        if len(calls) == 2:
            signal.raise_signal(signal.SIGINT)     # the user presses Ctrl-C once
        return real(*args)

    monkeypatch.setattr(batch, "mark_task", task)
    out = tmp_path / "marked"
    code = scale.mark_many(profile, [shoot], out, workers=1, json_lines=True)
    rows, err = _lines(capsys)
    assert code == 130
    assert [r["status"] for r in rows] == ["marked", "marked"]
    assert "interrupted" in err and "run the same command again" in err
    assert_consistent(profile, out, _originals(shoot))
    monkeypatch.setattr(batch, "mark_task", real)
    assert scale.mark_many(profile, [shoot], out, workers=1) == 0
    assert len(profile.works()) == 5
    assert_consistent(profile, out, _originals(shoot))


def test_a_registered_copy_is_moved_into_place_or_made_again(profile, shoot, tmp_path, capsys):
    out = tmp_path / "marked"
    assert scale.mark_many(profile, [shoot], out, workers=1) == 0
    coffee, rocket = out / "day1" / "coffee.jpg", out / "day2" / "rocket.jpg"
    coffee_sha, rocket_sha = sha256_file(coffee), sha256_file(rocket)
    # A run stopped after registering but before renaming leaves the staged copy.
    os.replace(coffee, batch.staged_path(coffee))
    # A marked copy deleted by the owner: made again, bit for bit, with its own serial.
    rocket.unlink()
    capsys.readouterr()
    assert scale.mark_many(profile, [shoot], out, workers=1, json_lines=True) == 0
    rows, _ = _lines(capsys)
    status = {Path(r["output"]).name: (r["status"], r.get("reason")) for r in rows}
    assert status["coffee.jpg"] == ("restored", "registered copy moved into place")
    assert status["rocket.jpg"] == ("restored", "registered copy re-made")
    assert sha256_file(coffee) == coffee_sha and sha256_file(rocket) == rocket_sha
    assert len(profile.works()) == 5
    assert_consistent(profile, out, _originals(shoot))


def test_a_copy_that_cannot_be_made_again_is_reported(profile, shoot, tmp_path, capsys):
    one = shoot / "day1" / "coffee.jpg"
    assert scale.mark_many(profile, [one], tmp_path / "first", workers=1) == 0
    capsys.readouterr()
    # Another JPEG quality gives other bytes: the registered copy cannot be re-made.
    code = scale.mark_many(profile, [one, shoot / "day2" / "brick.tif"], tmp_path / "second",
                           workers=1, jpeg_quality=90, json_lines=True)
    rows, _ = _lines(capsys)
    assert code == 1
    assert rows[0]["status"] == "failed" and "could not be re-made bit for bit" in rows[0]["error"]["message"]
    assert rows[1]["status"] == "marked"
    assert not (tmp_path / "second" / "coffee.jpg").exists()
    assert len(profile.works()) == 2
    assert_consistent(profile, tmp_path / "second", _originals(shoot))


def test_output_folder_rules(profile, shoot, tmp_path, capsys):
    # Inside an input folder: not walked into (nothing is marked twice).
    inside = shoot / "marked"
    assert scale.mark_many(profile, [shoot], inside, workers=1) == 0
    capsys.readouterr()
    assert scale.mark_many(profile, [shoot], inside, workers=1, json_lines=True) == 0
    rows, _ = _lines(capsys)
    assert all(not r["file"].startswith(str(inside)) for r in rows)
    from claimkit.errors import InputError
    with pytest.raises(InputError, match="input folder"):
        scale.mark_many(profile, [shoot], shoot, workers=1)
    (tmp_path / "a-file").write_text("x")
    with pytest.raises(InputError, match="must be a folder"):
        scale.mark_many(profile, [shoot], tmp_path / "a-file", workers=1)
    # Two inputs that would land on the same output name: the second is refused.
    other = tmp_path / "other"
    _save(data.coffee(), other / "coffee.jpg", quality=80)
    code = scale.mark_many(profile, [shoot / "day1" / "coffee.jpg", other / "coffee.jpg"],
                           tmp_path / "flat", workers=1, json_lines=True)
    assert code == 1
    assert "rename one of them" in capsys.readouterr().err


# --------------------------------------------------------------------------- a real pool, a real Ctrl-C




@pytest.mark.parametrize("presses", [1, 2])
def test_ctrl_c_with_worker_processes(profile_home, tmp_path, presses):
    shoot = tmp_path / "big-shoot"
    base = data.coffee()
    for i in range(8):
        # Eight different 800 x 1200 pictures: each takes a worker a moment.
        img = np.kron(np.roll(base, 37 * i, axis=1), np.ones((2, 2, 1), np.uint8))
        _save(img, shoot / f"frame{i:02d}.jpg", quality=90)
    out = tmp_path / "marked"
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]))
    # The real command line (CLAIMKIT_HOME and CLAIMKIT_PASSPHRASE come from the fixture).
    cmd = [sys.executable, "-m", "claimkit", "mark", str(shoot), "--out", str(out),
           "--workers", "2", "--json"]
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env,
                            text=True)
    lines: list[str] = []
    reader = threading.Thread(target=lambda: lines.extend(proc.stdout), daemon=True)
    reader.start()
    deadline = time.monotonic() + 60
    while not lines and time.monotonic() < deadline and proc.poll() is None:
        time.sleep(0.05)
    assert lines, "no file was marked within a minute"
    proc.send_signal(signal.SIGINT)
    if presses == 2:          # the second press abandons the files in progress
        time.sleep(0.05)
        proc.send_signal(signal.SIGINT)
    code = proc.wait(timeout=60)
    reader.join(timeout=5)
    err = proc.stderr.read()
    assert code == 130, err
    done = [json.loads(x) for x in lines]
    assert 1 <= len(done) < 8, "the run should stop early"
    assert all(r["status"] == "marked" for r in done)
    with Profile.open(profile_home, TEST_PASSPHRASE) as p:
        assert len(p.works()) == len(done)
        assert_consistent(p, out, _originals(shoot) + sorted(shoot.glob("*.jpg")))
    # Run again: it finishes the rest.
    again = subprocess.run(cmd, check=False, capture_output=True, text=True, env=env, timeout=120)
    assert again.returncode == 0, again.stderr
    rows = [json.loads(x) for x in again.stdout.splitlines()]
    assert sum(r["status"] == "skipped" for r in rows) == len(done)
    assert sum(r["status"] == "marked" for r in rows) == 8 - len(done)
    with Profile.open(profile_home, TEST_PASSPHRASE) as p:
        assert len(p.works()) == 8
        assert_consistent(p, out, sorted(shoot.glob("*.jpg")))
