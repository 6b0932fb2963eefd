"""Ed25519 signatures behind a narrow API (RFC 8032).

claimkit signs raw bytes (the canonical JSON of a record or log entry) with
pure Ed25519, so any party can check a signature with
``openssl pkeyutl -verify -pubin -inkey public.pem -rawin -in DATA -sigfile SIG``.
"""

from __future__ import annotations

import hashlib

from cryptography.exceptions import InvalidSignature
from cryptography.hazmat.primitives import serialization
from cryptography.hazmat.primitives.asymmetric.ed25519 import (
    Ed25519PrivateKey,
    Ed25519PublicKey,
)

__all__ = [
    "Ed25519PrivateKey",
    "Ed25519PublicKey",
    "fingerprint",
    "generate_seed",
    "load_public_pem",
    "private_from_seed",
    "public_from_raw",
    "public_pem",
    "raw_public",
    "sign",
    "verify",
]


def generate_seed() -> bytes:
    """A fresh 32-byte Ed25519 private key (the RFC 8032 seed)."""
    return Ed25519PrivateKey.generate().private_bytes(
        serialization.Encoding.Raw, serialization.PrivateFormat.Raw,
        serialization.NoEncryption())


def private_from_seed(seed: bytes) -> Ed25519PrivateKey:
    return Ed25519PrivateKey.from_private_bytes(seed)


def raw_public(key: Ed25519PublicKey) -> bytes:
    """The 32-byte encoded public key (RFC 8032 section 5.1.5)."""
    return key.public_bytes(serialization.Encoding.Raw, serialization.PublicFormat.Raw)


def public_from_raw(raw: bytes) -> Ed25519PublicKey:
    return Ed25519PublicKey.from_public_bytes(raw)


def fingerprint(raw_pub: bytes) -> str:
    """Hex SHA-256 of the raw 32-byte public key."""
    return hashlib.sha256(raw_pub).hexdigest()


def public_pem(key: Ed25519PublicKey) -> bytes:
    """SubjectPublicKeyInfo PEM (RFC 8410), the form OpenSSL reads."""
    return key.public_bytes(serialization.Encoding.PEM,
                            serialization.PublicFormat.SubjectPublicKeyInfo)


def load_public_pem(data: bytes) -> Ed25519PublicKey:
    """Read an Ed25519 public key from PEM; ValueError for anything else."""
    key = serialization.load_pem_public_key(data)
    if not isinstance(key, Ed25519PublicKey):
        raise ValueError("not an Ed25519 public key")  # noqa: TRY004 - callers catch ValueError
    return key


def sign(key: Ed25519PrivateKey, data: bytes) -> bytes:
    """The 64-byte Ed25519 signature of ``data``."""
    return key.sign(data)


def verify(key: Ed25519PublicKey, data: bytes, signature: bytes) -> bool:
    """True when ``signature`` is a valid Ed25519 signature of ``data`` by ``key``."""
    try:
        key.verify(signature, data)
    except (InvalidSignature, ValueError):
        return False
    return True
