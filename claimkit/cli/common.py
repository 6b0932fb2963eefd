"""Small helpers shared by the command modules: profile location, passphrase, JSON output."""

from __future__ import annotations

import getpass
import json
import os
import sys
from pathlib import Path

from claimkit.errors import ProfileError


def home_dir(args) -> Path:
    """The profile folder: ``--home``, else ``$CLAIMKIT_HOME``, else ``~/.claimkit``."""
    if getattr(args, "home", None):
        return Path(args.home).expanduser()
    env = os.environ.get("CLAIMKIT_HOME")
    return Path(env).expanduser() if env else Path.home() / ".claimkit"


def passphrase(*, confirm: bool = False) -> bytes:
    """The passphrase from ``$CLAIMKIT_PASSPHRASE``, else asked for at the terminal."""
    env = os.environ.get("CLAIMKIT_PASSPHRASE")
    if env is not None:
        return env.encode("utf-8")
    if not sys.stdin.isatty():
        raise ProfileError("no passphrase: set CLAIMKIT_PASSPHRASE or run at a terminal")
    first = getpass.getpass("claimkit passphrase: ")
    if confirm and getpass.getpass("again: ") != first:
        raise ProfileError("the two passphrases differ")
    return first.encode("utf-8")


SESSION_ENV = "CLAIMKIT_SESSION"   # claimkit.evidence.session.SESSION_ENV, without importing it


def open_profile(args):
    """The profile with its secrets: by the session in ``$CLAIMKIT_SESSION``, else the passphrase.

    A session, once set, is used alone: when it has ended the command is
    refused rather than falling back to ``$CLAIMKIT_PASSPHRASE``, so that the
    lifetime the user chose is the one that holds.
    """
    from claimkit.evidence import session
    from claimkit.evidence.profile import Profile

    token = os.environ.get(SESSION_ENV)
    if token:
        return Profile.open_session(home_dir(args), token)
    session.sweep()          # ended sessions' files go at the next command that opens the keys
    return Profile.open(home_dir(args), passphrase())


def print_json(obj) -> None:
    """One JSON object on one line (the contract for ``--json``)."""
    sys.stdout.write(json.dumps(obj, sort_keys=True, ensure_ascii=False, allow_nan=False) + "\n")
    sys.stdout.flush()
