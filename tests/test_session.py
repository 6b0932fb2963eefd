"""Unlocked sessions: the passphrase stretched once, the secrets for a limited time.

What must hold (claimkit/evidence/session.py): a live session opens its own
profile and no other; it ends at its expiry (the file is deleted) or at
``lock``; a wrong key or an altered file is refused; the session key is never
on disk and the passphrase-sealed key file is unchanged.
"""

from __future__ import annotations

import json
import os
import stat

import numpy as np
import pytest
from PIL import Image

from claimkit.cli import main
from claimkit.errors import ProfileError
from claimkit.evidence import session
from claimkit.evidence.profile import SECRETS_FILE, Profile


@pytest.fixture(autouse=True)
def runtime(tmp_path, monkeypatch):
    """Session files go to a runtime folder of this test, not the user's."""
    folder = tmp_path / "run"
    folder.mkdir()
    monkeypatch.setenv("XDG_RUNTIME_DIR", str(folder))
    monkeypatch.delenv(session.SESSION_ENV, raising=False)
    return folder


def _flip(token: str) -> str:
    """The token with one character of its key changed (a middle one: every bit counts)."""
    head, key = token.rsplit(":", 1)
    i = len(key) // 2
    return f"{head}:{key[:i]}{'A' if key[i] != 'A' else 'B'}{key[i + 1:]}"


def test_a_session_opens_the_profile_with_the_same_secrets(profile, profile_home):
    sealed = (profile_home / SECRETS_FILE).read_bytes()
    s = profile.unlock(600)
    with Profile.open_session(profile_home, s.token) as again:
        assert again.public_key_fingerprint == profile.public_key_fingerprint
        assert again.detection_seed == profile.detection_seed
        # Signing works: the signing key came through too.
        assert again.sign(b"probe") == profile.sign(b"probe")
    assert (profile_home / SECRETS_FILE).read_bytes() == sealed     # untouched at rest


def test_the_session_key_is_never_on_disk_and_the_file_is_private(profile, runtime):
    s = profile.unlock(600)
    key = s.token.rsplit(":", 1)[1]
    assert s.file.parent.parent == runtime
    assert stat.S_IMODE(s.file.parent.stat().st_mode) == 0o700
    assert stat.S_IMODE(s.file.stat().st_mode) == 0o600
    blob = s.file.read_bytes()
    assert key.encode() not in blob
    doc = json.loads(blob)
    assert doc["format"] == session.FORMAT and doc["profile"] == profile.public_key_fingerprint
    assert profile.detection_seed.hex().encode() not in blob
    assert "Session(" in repr(s) and key not in repr(s)


def test_expiry_refuses_and_deletes_the_file(profile, profile_home):
    fp = profile.public_key_fingerprint
    s = session.start(profile._need_secrets(), profile=fp, lifetime=30, now=1_000_000.0)
    assert session.unlock(s.token, profile=fp, now=1_000_029.0)          # still live
    with pytest.raises(ProfileError, match="session ended at 1970-01-12T13:47:10Z"):
        session.unlock(s.token, profile=fp, now=1_000_030.0)
    assert not s.file.exists()
    with pytest.raises(ProfileError, match="has ended"):
        session.unlock(s.token, profile=fp, now=1_000_000.0)


def test_a_clock_set_back_before_the_start_is_refused(profile):
    fp = profile.public_key_fingerprint
    s = session.start(profile._need_secrets(), profile=fp, lifetime=600, now=2_000_000.0)
    with pytest.raises(ProfileError, match="clock is before"):
        session.unlock(s.token, profile=fp, now=2_000_000.0 - session.CLOCK_SLACK - 1)


def test_wrong_key_altered_file_and_other_profile_are_refused(profile, tmp_path):
    fp = profile.public_key_fingerprint
    s = profile.unlock(600)
    with pytest.raises(ProfileError, match="does not open the session file"):
        session.unlock(_flip(s.token), profile=fp)
    assert s.file.exists()          # a wrong guess does not end the owner's session
    # The expiry is in the associated data: extending it without the key breaks the tag.
    doc = json.loads(s.file.read_bytes())
    doc["expires"] += 3600
    s.file.write_text(json.dumps(doc))
    with pytest.raises(ProfileError, match="does not open the session file"):
        session.unlock(s.token, profile=fp)
    other = Profile.create(tmp_path / "other", "Odo Fenwick", b"another passphrase")
    t = other.unlock(600)
    other.close()
    with pytest.raises(ProfileError, match="another profile"):
        session.unlock(t.token, profile=fp)
    for bad in ("", "claimkit-session-1:zz:abc", s.token.replace("session-1", "session-9")):
        with pytest.raises(ProfileError, match="not a claimkit session"):
            session.unlock(bad, profile=fp)


def test_lock_ends_one_session_or_all(profile):
    a, b = profile.unlock(600), profile.unlock(600)
    assert session.end(a.token) is True and session.end(a.token) is False
    assert not a.file.exists() and b.file.exists()
    assert session.end_all() == 1 and not b.file.exists()


def test_ended_sessions_are_swept_by_the_next_command(profile, runtime, monkeypatch):
    fp = profile.public_key_fingerprint
    short = session.start(profile._need_secrets(), profile=fp, lifetime=30, now=3_000_000.0)
    long = session.start(profile._need_secrets(), profile=fp, lifetime=600, now=3_000_000.0)
    assert session.sweep(now=3_000_029.0) == 0 and short.file.exists()
    assert session.unlock(long.token, profile=fp, now=3_000_031.0)   # a use sweeps the rest
    assert not short.file.exists() and long.file.exists()
    # A passphrase command sweeps too (the variable is not set): the long one has ended by now.
    doc = json.loads(long.file.read_bytes())
    doc["expires"] = 1.0          # unreadable by the key now, but its expiry is what is swept on
    long.file.write_text(json.dumps(doc))
    assert main(["works", "show", "W-0000-000001"]) == 2        # opens the public part only
    assert long.file.exists()
    assert main(["disclose", "W-0000-000001", "--out", str(runtime / "d")]) == 2
    assert not long.file.exists()
    # Someone else's folder in its place is refused for sessions, and ignored by the sweep.
    folder = runtime / f"claimkit-{os.getuid()}"
    folder.chmod(0o755)
    assert session.sweep() == 0
    with pytest.raises(ProfileError, match="not a private folder"):
        profile.unlock(60)


def test_lifetimes(profile):
    assert [session.parse_lifetime(t) for t in ("90", "90s", "20m", "2h", " 12h ")] == \
        [90, 90, 1200, 7200, 43200]
    for bad in ("0", "13h", "1d", "soon", "-5m", ""):
        with pytest.raises(ProfileError):
            session.parse_lifetime(bad)
    with pytest.raises(ProfileError):
        profile.unlock(session.MAX_LIFETIME + 1)


def test_a_shared_runtime_folder_is_refused(runtime):
    folder = runtime / f"claimkit-{os.getuid()}"
    folder.mkdir(mode=0o755)
    folder.chmod(0o755)
    with pytest.raises(ProfileError, match="not a private folder"):
        session.runtime_folder()


def test_command_line_unlock_use_and_lock(profile_home, tmp_path, monkeypatch, capsys):
    rng = np.random.default_rng(5)
    pic = tmp_path / "copy.png"
    Image.fromarray(rng.integers(0, 256, (160, 200, 3), dtype=np.uint8)).save(pic)

    assert main(["unlock", "--for", "10m"]) == 0
    out, err = capsys.readouterr()
    assert out.startswith(f"export {session.SESSION_ENV}=") and "until" in err
    token = out.strip().split("=", 1)[1].strip("'")
    # From now on no passphrase is at hand: only the session opens the profile.
    monkeypatch.delenv("CLAIMKIT_PASSPHRASE")
    monkeypatch.setenv(session.SESSION_ENV, token)
    assert main(["examine", "--json", str(pic)]) == 0
    assert json.loads(capsys.readouterr().out)["detected"] is False

    monkeypatch.setenv(session.SESSION_ENV, _flip(token))
    assert main(["examine", str(pic)]) == 2
    assert "does not open the session file" in capsys.readouterr().err

    monkeypatch.setenv(session.SESSION_ENV, token)
    assert main(["lock"]) == 0
    out, err = capsys.readouterr()
    assert out.strip() == f"unset {session.SESSION_ENV}" and "1 session ended" in err
    assert main(["examine", str(pic)]) == 2            # refused, no fall-back to a passphrase
    err = capsys.readouterr().err
    assert err.startswith("claimkit: error: the session has ended") and "Traceback" not in err


def test_command_line_json_and_wrong_passphrase(profile_home, monkeypatch, capsys):
    assert main(["unlock", "--for", "90s", "--json"]) == 0
    doc = json.loads(capsys.readouterr().out)
    assert doc["variable"] == session.SESSION_ENV and doc["expires"].endswith("Z")
    assert doc["public_key_sha256"] == Profile.open_public(profile_home).public_key_fingerprint
    monkeypatch.setenv("CLAIMKIT_PASSPHRASE", "not the passphrase")
    assert main(["unlock"]) == 2
    assert "wrong passphrase" in capsys.readouterr().err
    assert main(["unlock", "--for", "2d"]) == 2
    assert "between 1 s and 12 h" in capsys.readouterr().err
