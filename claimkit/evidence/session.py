"""An unlocked session: the profile's secrets for a limited time, without stretching again.

Opening a profile stretches the passphrase with scrypt at N = 2**17 (about a
third of a second and 128 MiB, on purpose: it is what makes guessing the
passphrase from a stolen ``secrets.sealed`` expensive). A user who runs many
one-shot commands can ask for that cost to be paid once:

1. ``claimkit unlock`` opens the profile with the passphrase as every command
   does, draws a fresh random 256-bit *session key*, and seals the two secrets
   again under it (AES-256-GCM) in a *session file* in the user's runtime
   folder (``$XDG_RUNTIME_DIR``, else ``/dev/shm``, else the temporary folder;
   a ``claimkit-UID`` folder of mode 0700 inside it, files 0600).
2. The session key is never written to disk. It is printed once, as the value
   of ``CLAIMKIT_SESSION`` for the shell to hold (``eval "$(claimkit unlock)"``);
   later commands in that shell open the profile with it instead of the
   passphrase.
3. The session ends at its stated expiry (``--for``; at most
   :data:`MAX_LIFETIME`) or at ``claimkit lock``. Any command that meets an
   expired session file deletes it and refuses.

Why this is never weaker at rest: ``secrets.sealed`` is unchanged, and a
session file alone is sealed under a uniformly random 256-bit key (no
passphrase to guess); the variable alone is a key to a file that is deleted
when the session ends. What a session does allow is the same as the passphrase
in ``CLAIMKIT_PASSPHRASE`` allows, only for a limited time: a process of the
same user that can read both the variable and the file during the session can
take the secrets. The lifetime is enforced by claimkit and the system clock,
not by the cipher: someone who copies the file and the key before the expiry
keeps them. The expiry and the profile are in the GCM associated data, so they
cannot be changed without the key.

The variable's value is ``claimkit-session-1:ID:KEY`` with ``ID`` the file's
random name (32 hex digits) and ``KEY`` the session key in URL-safe base64.
"""

from __future__ import annotations

import base64
import binascii
import contextlib
import json
import os
import re
import stat
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

from cryptography.exceptions import InvalidTag
from cryptography.hazmat.primitives.ciphers.aead import AESGCM

from claimkit.errors import ProfileError
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.keystore import Secrets, secrets_from_plaintext, secrets_plaintext

SESSION_ENV = "CLAIMKIT_SESSION"
FORMAT = "claimkit/session/v1"
TOKEN_PREFIX = "claimkit-session-1"
DEFAULT_LIFETIME = 3600           # seconds: an hour of work in one shell
MAX_LIFETIME = 12 * 3600          # a working day; longer than that, unlock again
CLOCK_SLACK = 60                  # seconds the clock may step back before a session is refused
_TOKEN = re.compile(rf"^{TOKEN_PREFIX}:([0-9a-f]{{32}}):([A-Za-z0-9_-]{{43}})$")
_DURATION = re.compile(r"^\s*(\d+)\s*([smhd]?)\s*$")
_UNITS = {"": 1, "s": 1, "m": 60, "h": 3600, "d": 86400}


@dataclass(frozen=True)
class Session:
    """An unlocked session as ``claimkit unlock`` reports it (``token`` is the secret part)."""

    token: str
    file: Path
    profile: str            # the profile's public-key SHA-256
    expires: float          # POSIX time

    def __repr__(self) -> str:
        return f"Session(file={str(self.file)!r}, profile={self.profile!r}, expires={self.expires})"


def parse_lifetime(text: str) -> int:
    """Seconds in ``90``, ``90s``, ``20m``, ``2h`` or ``1d``; between 1 s and :data:`MAX_LIFETIME`."""
    m = _DURATION.match(text or "")
    if not m:
        raise ProfileError(f"session lifetime {text!r} is not a number of s, m, h or d (say 20m)")
    seconds = int(m.group(1)) * _UNITS[m.group(2)]
    if not 0 < seconds <= MAX_LIFETIME:
        raise ProfileError(f"a session lasts between 1 s and {MAX_LIFETIME // 3600} h, "
                           f"not {text.strip()}")
    return seconds


def _folder_path() -> Path:
    base = os.environ.get("XDG_RUNTIME_DIR") or ""
    if not base or not os.path.isdir(base):
        base = "/dev/shm" if os.path.isdir("/dev/shm") and os.access("/dev/shm", os.W_OK) else \
            tempfile.gettempdir()
    return Path(base) / f"claimkit-{os.getuid()}"


def runtime_folder() -> Path:
    """The per-user folder for session files, made with mode 0700 if missing.

    ``$XDG_RUNTIME_DIR`` (the user's tmpfs, emptied at logout) where set, else
    ``/dev/shm`` (memory), else the temporary folder. A folder that exists but
    is not a real folder of this user with mode 0700 is refused: another user
    could read or plant session files there.
    """
    folder = _folder_path()
    try:
        folder.mkdir(mode=0o700)
    except FileExistsError:
        pass
    except OSError as exc:
        raise ProfileError(f"cannot make the session folder: {exc.strerror}", path=folder) from None
    st = os.lstat(folder)
    if not stat.S_ISDIR(st.st_mode) or st.st_uid != os.getuid() or stat.S_IMODE(st.st_mode) & 0o077:
        raise ProfileError("the session folder is not a private folder of this user (mode 0700)",
                           path=folder)
    return folder


def _b64(data: bytes) -> str:
    return base64.b64encode(data).decode("ascii")


def start(secrets: Secrets, *, profile: str, lifetime: int = DEFAULT_LIFETIME,
          now: float | None = None) -> Session:
    """Seal ``secrets`` under a new session key; returns the session (its token is the key).

    ``profile`` is the profile's public-key SHA-256: the session opens that
    profile only.
    """
    lifetime = int(lifetime)
    if not 0 < lifetime <= MAX_LIFETIME:
        raise ProfileError(f"a session lasts between 1 s and {MAX_LIFETIME} s, not {lifetime} s")
    now = time.time() if now is None else float(now)
    key = AESGCM.generate_key(bit_length=256)
    sid = os.urandom(16).hex()
    nonce = os.urandom(12)
    expires = round(now + lifetime, 3)
    header = {"format": FORMAT, "profile": profile, "created": round(now, 3), "expires": expires,
              "cipher": {"name": "AES-256-GCM", "nonce": _b64(nonce)}}
    ciphertext = AESGCM(key).encrypt(nonce, secrets_plaintext(secrets), canonical_json(header))
    folder = runtime_folder()
    sweep(folder, now)
    path = folder / f"{sid}.session"
    # O_EXCL: a fresh random name, never an existing file or a planted link.
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_NOFOLLOW", 0), 0o600)
    with os.fdopen(fd, "wb") as f:
        f.write(canonical_json({**header, "ciphertext": _b64(ciphertext)}) + b"\n")
    token = f"{TOKEN_PREFIX}:{sid}:{base64.urlsafe_b64encode(key).decode('ascii').rstrip('=')}"
    return Session(token=token, file=path, profile=profile, expires=expires)


def _parse(token: str) -> tuple[Path, bytes]:
    m = _TOKEN.match(token.strip())
    if not m:
        raise ProfileError(f"{SESSION_ENV} is not a claimkit session (run claimkit unlock)")
    key = base64.urlsafe_b64decode(m.group(2) + "=")
    return runtime_folder() / f"{m.group(1)}.session", key


def unlock(token: str, *, profile: str, now: float | None = None) -> Secrets:
    """The secrets a live session of ``profile`` holds.

    Raises
    ------
    ProfileError
        The session ended (expired: its file is deleted; or locked), it is for
        another profile, the key does not open the file (wrong key, or the
        file was altered), or the file is damaged.
    """
    path, key = _parse(token)
    now = time.time() if now is None else float(now)
    sweep(path.parent, now, keep=path)    # this one is judged below, with its own message
    try:
        fd = os.open(path, os.O_RDONLY | getattr(os, "O_NOFOLLOW", 0))
        with os.fdopen(fd, "rb") as f:
            doc = json.loads(f.read().decode("utf-8"))
        header = {k: doc[k] for k in ("format", "profile", "created", "expires", "cipher")}
        nonce = base64.b64decode(header["cipher"]["nonce"], validate=True)
        ciphertext = base64.b64decode(doc["ciphertext"], validate=True)
        expires, created = float(header["expires"]), float(header["created"])
        if header["format"] != FORMAT:
            raise ValueError("unknown format")
    except FileNotFoundError:
        raise ProfileError("the session has ended (locked, expired or never started here); "
                           "run claimkit unlock again, or unset " + SESSION_ENV) from None
    except (OSError, ValueError, KeyError, TypeError, UnicodeDecodeError, binascii.Error):
        raise ProfileError("the session file is damaged", path=path) from None
    if now >= expires or now < created - CLOCK_SLACK:
        end(token)
        raise ProfileError(
            f"the session ended at {time.strftime('%Y-%m-%dT%H:%M:%SZ', time.gmtime(expires))}"
            if now >= expires else "the system clock is before the session's start",
            hint="run claimkit unlock again, or unset " + SESSION_ENV)
    if header["profile"] != profile:
        raise ProfileError("this session unlocks another profile (its public key differs)")
    try:
        plaintext = AESGCM(key).decrypt(nonce, ciphertext, canonical_json(header))
    except InvalidTag:
        raise ProfileError("the session key does not open the session file (a wrong key, "
                           "or the file was altered)", path=path) from None
    return secrets_from_plaintext(plaintext)


def end(token: str) -> bool:
    """Delete the session's file (``claimkit lock``); True when there was one."""
    path, _ = _parse(token)
    try:
        path.unlink()
    except FileNotFoundError:
        return False
    return True


def sweep(folder: Path | None = None, now: float | None = None, *,
          keep: Path | None = None) -> int:
    """Delete every session file in the user's folder whose session has ended; how many.

    The expiry is read from the file's header without the key (it is not
    secret; the cipher authenticates it). Run by ``unlock``, by every use of a
    session and by :func:`claimkit.cli.common.open_profile`, so that a file
    outlives its session only until the next such command (or the logout that
    empties a tmpfs runtime folder). A file that cannot be read is left alone.
    """
    if folder is None:
        if not os.path.lexists(_folder_path()):   # sessions never used here: nothing to make
            return 0
        try:
            folder = runtime_folder()    # the ownership and mode checks
        except ProfileError:             # not ours to clean; a session would be refused there
            return 0
    now = time.time() if now is None else float(now)
    n = 0
    for p in folder.glob("*.session"):
        if p == keep:
            continue
        try:
            expires = float(json.loads(p.read_bytes())["expires"])
        except (OSError, ValueError, KeyError, TypeError, UnicodeDecodeError):
            continue
        if now >= expires:
            with contextlib.suppress(FileNotFoundError):
                p.unlink()
                n += 1
    return n


def end_all() -> int:
    """Delete every session file of this user (``claimkit lock --all``); how many there were."""
    n = 0
    for p in runtime_folder().glob("*.session"):
        with contextlib.suppress(FileNotFoundError):   # another process deleted it first
            p.unlink()
            n += 1
    return n
