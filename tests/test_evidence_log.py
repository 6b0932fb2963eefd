"""Tampering with the custody log: every edit, deletion, reordering and insertion is named by line."""

from __future__ import annotations

import json
import random

import pytest

from claimkit.evidence.custodylog import verify_log


@pytest.fixture
def logged(profile):
    for i in range(7):
        profile.log_action("disputed file taken in", items={"exhibit": f"{i:02x}" * 32},
                           details={"source": f"tidewater-home-goods/listing-{i}", "n": i * 0.5})
    return profile  # 8 entries: "profile created" + 7


def lines_of(p):
    return p.log_path.read_bytes().splitlines(keepends=True)


def write(p, lines):
    p.log_path.write_bytes(b"".join(lines))


def check(p):
    return verify_log(p.log_path, p.public_key, expected_head=p.log_head())


def test_intact_log_verifies(logged):
    r = check(logged)
    assert r.ok and r.lines == 8 and len(r.entries) == 8


def test_every_single_byte_change_is_found_at_its_line(logged):
    original = lines_of(logged)
    rng = random.Random(20260504)
    for number, line in enumerate(original, start=1):
        positions = {0, len(line) - 2, len(line) // 2} | {rng.randrange(len(line) - 1)
                                                           for _ in range(6)}
        for pos in positions:
            for mask in (0x01, 0x20):
                tampered = bytearray(line)
                tampered[pos] ^= mask
                write(logged, original[:number - 1] + [bytes(tampered)] + original[number:])
                r = check(logged)
                assert not r.ok, (number, pos, mask)
                assert r.problems[0].line == number, (number, pos, [str(x) for x in r.problems])
                # Only this line and, through the chain, the next one are named.
                assert {p.line for p in r.problems} <= {number, number + 1}, \
                    (number, pos, [str(x) for x in r.problems])
    write(logged, original)
    assert check(logged).ok


def test_changed_newline_is_found(logged):
    original = lines_of(logged)
    merged = original[:2] + [original[2][:-1] + b" " + original[3]] + original[4:]
    write(logged, merged)
    r = check(logged)
    assert not r.ok and r.problems[0].line == 3


@pytest.mark.parametrize("k", [1, 4, 7])
def test_deleted_line_is_named(logged, k):
    original = lines_of(logged)
    write(logged, original[:k - 1] + original[k:])
    r = check(logged)
    assert not r.ok
    assert r.problems[0].line == k and "missing" in r.problems[0].problem


def test_deleted_last_lines_are_found_against_the_registry(logged):
    original = lines_of(logged)
    write(logged, original[:-2])
    r = check(logged)
    assert not r.ok
    assert r.problems[0].line == 7 and "deleted from the end" in r.problems[0].problem
    assert "#6" in r.problems[0].problem and "#8" in r.problems[0].problem


@pytest.mark.parametrize("k", [1, 3, 7])
def test_reordered_lines_are_named(logged, k):
    original = lines_of(logged)
    swapped = list(original)
    swapped[k - 1], swapped[k] = swapped[k], swapped[k - 1]
    write(logged, swapped)
    r = check(logged)
    named = {p.line for p in r.problems}
    assert not r.ok and {k, k + 1} <= named


def test_inserted_copy_is_named(logged):
    original = lines_of(logged)
    write(logged, original[:5] + [original[2]] + original[5:])
    r = check(logged)
    assert not r.ok and r.problems[0].line == 6 and "again" in r.problems[0].problem


def test_inserted_forgery_is_named(logged):
    # A well-formed entry with the right seq and prev, but without the owner's key.
    original = lines_of(logged)
    fake = json.loads(original[3])
    fake["action"] = "work registered"
    fake["sig"] = fake["sig"][::-1]
    forged = json.dumps(fake, sort_keys=True, separators=(",", ":")).encode() + b"\n"
    write(logged, original[:3] + [forged] + original[3:])
    r = check(logged)
    assert not r.ok and r.problems[0].line == 4
    assert "signature" in r.problems[0].problem


def test_missing_log(logged):
    logged.log_path.unlink()
    r = check(logged)
    assert not r.ok and "missing" in str(r.problems[0])


def test_appending_refuses_a_truncated_log(logged):
    from claimkit.errors import CheckFailed

    original = lines_of(logged)
    write(logged, original[:-1])
    with pytest.raises(CheckFailed, match="shorter"):
        logged.log_action("examined", items={"exhibit": "aa" * 32})
