"""The owner's secrets, sealed at rest under the passphrase.

A profile holds two secrets: the Ed25519 signing key (32-byte seed) and the
256-bit marking secret from which the engine's carrier and the payload tags
are derived. They are sealed together in one file:

- key derivation: scrypt (RFC 7914) from the passphrase and a random 16-byte
  salt, N = 2**17, r = 8, p = 1 (about 128 MiB and a third of a second);
- encryption: AES-256-GCM with a random 96-bit nonce; the file's header (format,
  KDF parameters, cipher) is the associated data, so that it cannot be changed
  without detection.

A wrong passphrase fails the GCM tag and is reported as such.

For the test suite only, ``CLAIMKIT_TEST_FAST_KDF=1`` lowers scrypt to
N = 2**10 for profiles created while it is set (the parameters are stored in
the file, so such a profile stays weak). Never set it for a real profile.
"""

from __future__ import annotations

import base64
import json
import os
from dataclasses import dataclass

from cryptography.exceptions import InvalidTag
from cryptography.hazmat.primitives.ciphers.aead import AESGCM
from cryptography.hazmat.primitives.kdf.scrypt import Scrypt

from claimkit.errors import ProfileError
from claimkit.evidence.canonical import canonical_json

FORMAT = "claimkit/sealed-secrets/v1"
PRODUCTION_SCRYPT = {"n": 2**17, "r": 8, "p": 1}
TEST_SCRYPT = {"n": 2**10, "r": 8, "p": 1}


@dataclass(frozen=True, repr=False)
class Secrets:
    """The two secrets of a profile. ``repr`` never shows them."""

    signing_seed: bytes
    marking_secret: bytes

    def __repr__(self) -> str:
        return "Secrets(<sealed>)"


def scrypt_params() -> dict:
    """Scrypt cost for new profiles (lowered only under ``CLAIMKIT_TEST_FAST_KDF=1``)."""
    if os.environ.get("CLAIMKIT_TEST_FAST_KDF") == "1":
        return dict(TEST_SCRYPT)
    return dict(PRODUCTION_SCRYPT)


def _b64(data: bytes) -> str:
    return base64.b64encode(data).decode("ascii")


def _kek(passphrase: bytes, salt: bytes, params: dict) -> bytes:
    return Scrypt(salt=salt, length=32, n=params["n"], r=params["r"], p=params["p"]).derive(
        passphrase)


def seal(secrets: Secrets, passphrase: bytes) -> bytes:
    """Encrypt the secrets under ``passphrase``; returns the file content (JSON)."""
    if not passphrase:
        raise ProfileError("the passphrase is empty")
    params = scrypt_params()
    salt = os.urandom(16)
    nonce = os.urandom(12)
    header = {
        "format": FORMAT,
        "kdf": {"name": "scrypt", **params, "salt": _b64(salt)},
        "cipher": {"name": "AES-256-GCM", "nonce": _b64(nonce)},
    }
    ciphertext = AESGCM(_kek(passphrase, salt, params)).encrypt(
        nonce, secrets_plaintext(secrets), canonical_json(header))
    return canonical_json({**header, "ciphertext": _b64(ciphertext)}) + b"\n"


def unseal(blob: bytes, passphrase: bytes, *, path: object = None) -> Secrets:
    """Decrypt a sealed-secrets file.

    Raises
    ------
    ProfileError
        ``wrong passphrase`` when the GCM tag fails; a damaged-file message
        when the file cannot be read as a sealed-secrets file.
    """
    try:
        doc = json.loads(blob.decode("utf-8"))
        header = {k: doc[k] for k in ("format", "kdf", "cipher")}
        if header["format"] != FORMAT or header["kdf"]["name"] != "scrypt":
            raise ValueError("unknown format")
        kdf, cipher = header["kdf"], header["cipher"]
        salt = base64.b64decode(kdf["salt"], validate=True)
        nonce = base64.b64decode(cipher["nonce"], validate=True)
        ciphertext = base64.b64decode(doc["ciphertext"], validate=True)
        params = {"n": int(kdf["n"]), "r": int(kdf["r"]), "p": int(kdf["p"])}
    except (ValueError, KeyError, TypeError, UnicodeDecodeError):
        raise ProfileError("key file is damaged or not a claimkit key file", path=path) from None
    try:
        plaintext = AESGCM(_kek(passphrase, salt, params)).decrypt(
            nonce, ciphertext, canonical_json(header))
    except InvalidTag:
        raise ProfileError("wrong passphrase (or the key file was altered)", path=path) from None
    return secrets_from_plaintext(plaintext)


def secrets_plaintext(secrets: Secrets) -> bytes:
    """The secrets as the bytes that are sealed (here and in a session, :mod:`.session`)."""
    return canonical_json({
        "signing_seed_ed25519": secrets.signing_seed.hex(),
        "marking_secret": secrets.marking_secret.hex(),
    })


def secrets_from_plaintext(plaintext: bytes) -> Secrets:
    """The inverse of :func:`secrets_plaintext` (after the cipher's tag has been checked)."""
    inner = json.loads(plaintext)
    return Secrets(bytes.fromhex(inner["signing_seed_ed25519"]),
                   bytes.fromhex(inner["marking_secret"]))
