"""The owner's profile: sealed keys, the registry of works, the custody log.

Layout of the profile folder (mode 0700; every file 0600)::

    owner.json        who owns the profile and the public-key fingerprint (not secret)
    public.pem        the Ed25519 public key (SubjectPublicKeyInfo PEM)
    secrets.sealed    signing key + marking secret, sealed under the passphrase
    registry.sqlite   works, serials, stamp requests, tokens (SQLite, WAL)
    custody.jsonl     the custody log (see :mod:`.custodylog`)

Writes to the registry are SQLite transactions. A custody-log entry is first
written to an outbox table in the same transaction as the change it records,
then appended to the log and removed from the outbox; if the process dies in
between, the next use of the profile appends what is left (and adopts lines
that reached the log before the crash), so the registry and the log never
disagree for long and never silently.
"""

from __future__ import annotations

import contextlib
import fcntl
import hashlib
import hmac
import json
import os
import re
import sqlite3
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

from cryptography.hazmat.primitives import hashes
from cryptography.hazmat.primitives.kdf.hkdf import HKDF

from claimkit import __version__
from claimkit.errors import CheckFailed, InputError, ProfileError
from claimkit.evidence import custodylog, signing
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.keystore import Secrets, seal, unseal
from claimkit.evidence.storage import atomic_write, fsync_dir, sha256_hex

__all__ = [
    "MAX_SERIAL",
    "Profile",
    "WorkRecord",
    "commitment_of",
    "derive_detection_seed",
    "derive_payload_tag",
]

OWNER_FILE = "owner.json"
PUBLIC_FILE = "public.pem"
SECRETS_FILE = "secrets.sealed"
REGISTRY_FILE = "registry.sqlite"
LOG_FILE = "custody.jsonl"
LOCK_FILE = ".custody.lock"

MAX_SERIAL = 2**24 - 1
RECORD_TYPE = "claimkit/work-record/v1"
COMMITMENT_SCHEME = "sha256-canonical-json/v1"
DETECTION_INFO = b"claimkit/detection/v1"
PAYLOAD_TAG_INFO = b"claimkit/payload-tag/v1"
_HEX64 = re.compile(r"[0-9a-f]{64}\Z")
_WORK_ID = re.compile(r"W-([0-9A-F]{4})-(\d{6,8})\Z")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS works (
    work_id TEXT PRIMARY KEY,
    serial INTEGER UNIQUE NOT NULL,
    sha256_original TEXT NOT NULL,
    sha256_marked TEXT NOT NULL,
    fingerprint TEXT NOT NULL,
    canonical BLOB NOT NULL,
    signature BLOB NOT NULL,
    commitment_nonce TEXT NOT NULL,
    registered_at TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS works_by_original ON works (sha256_original);
CREATE INDEX IF NOT EXISTS works_by_marked ON works (sha256_marked);
CREATE TABLE IF NOT EXISTS log_outbox (
    ord INTEGER PRIMARY KEY AUTOINCREMENT,
    entry_id TEXT UNIQUE NOT NULL,
    time TEXT NOT NULL, actor TEXT NOT NULL, action TEXT NOT NULL,
    items TEXT NOT NULL, details TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS stamp_requests (
    request_id TEXT PRIMARY KEY,
    created TEXT NOT NULL,
    nonce TEXT NOT NULL,
    root TEXT NOT NULL,
    work_ids TEXT NOT NULL,
    tsq BLOB NOT NULL,
    state TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS tokens (
    token_id TEXT PRIMARY KEY,
    request_id TEXT NOT NULL REFERENCES stamp_requests (request_id),
    token BLOB NOT NULL,
    token_sha256 TEXT NOT NULL,
    tsa_cert BLOB NOT NULL,
    gen_time TEXT NOT NULL,
    tsa_name TEXT,
    tsa_serial TEXT NOT NULL,
    attached_at TEXT NOT NULL
);
CREATE TABLE IF NOT EXISTS work_stamps (
    work_id TEXT NOT NULL REFERENCES works (work_id),
    token_id TEXT NOT NULL REFERENCES tokens (token_id),
    leaf_index INTEGER NOT NULL,
    tree_size INTEGER NOT NULL,
    proof TEXT NOT NULL,
    PRIMARY KEY (work_id, token_id)
);
"""


# --------------------------------------------------------------------------- derivations

def derive_detection_seed(marking_secret: bytes) -> bytes:
    """HKDF-SHA256(marking_secret, salt=None, info="claimkit/detection/v1"), 32 bytes (RFC 5869)."""
    return HKDF(algorithm=hashes.SHA256(), length=32, salt=None,
                info=DETECTION_INFO).derive(marking_secret)


def _payload_tag_key(marking_secret: bytes) -> bytes:
    return HKDF(algorithm=hashes.SHA256(), length=32, salt=None,
                info=PAYLOAD_TAG_INFO).derive(marking_secret)


def derive_payload_tag(tag_key: bytes, owner_tag: int, serial: int) -> int:
    """First 24 bits of HMAC-SHA256(tag_key, owner_tag (2 bytes) || serial (3 bytes))."""
    msg = owner_tag.to_bytes(2, "big") + serial.to_bytes(3, "big")
    return int.from_bytes(hmac.new(tag_key, msg, hashlib.sha256).digest()[:3], "big")


def commitment_of(opening: dict) -> str:
    """Hex SHA-256 of the canonical JSON of a commitment opening."""
    return sha256_hex(canonical_json(opening))


def owner_tag_of(raw_pub: bytes) -> int:
    """16-bit owner tag: the first two bytes of SHA-256 of the raw public key."""
    return int.from_bytes(hashlib.sha256(raw_pub).digest()[:2], "big")


def work_id_for(owner_tag: int, serial: int) -> str:
    return f"W-{owner_tag:04X}-{serial:06d}"


# --------------------------------------------------------------------------- records

@dataclass
class WorkRecord:
    """A registered work: the signed record as stored.

    Attributes
    ----------
    work_id : str
        ``W-TTTT-SSSSSS`` (owner tag in hex, serial in decimal).
    serial : int
        The work serial carried in the mark's payload.
    record : dict
        The record, decoded from ``canonical``.
    canonical : bytes
        The exact bytes that were signed (canonical JSON, RFC 8785).
    signature : bytes
        Ed25519 signature of ``canonical``.
    public_key : bytes
        Raw public key of the profile the record was read from (for :meth:`verify`).
    """

    work_id: str
    serial: int
    record: dict
    canonical: bytes
    signature: bytes
    public_key: bytes | None = field(default=None, repr=False)

    @property
    def record_sha256(self) -> str:
        """Hex SHA-256 of the canonical record (what the custody log names)."""
        return sha256_hex(self.canonical)

    def verify(self, public_key: bytes | signing.Ed25519PublicKey | None = None) -> bool:
        """True when the signature verifies and the record names the signing key.

        Parameters
        ----------
        public_key : bytes or Ed25519PublicKey, optional
            Default: the key of the profile the record came from.
        """
        key = self.public_key if public_key is None else public_key
        if key is None:
            raise ValueError("no public key to verify against")
        if isinstance(key, bytes):
            raw = key
            key = signing.public_from_raw(key)
        else:
            raw = signing.raw_public(key)
        if not signing.verify(key, self.canonical, self.signature):
            return False
        try:
            rec = json.loads(self.canonical)
        except ValueError:
            return False
        return (rec.get("owner", {}).get("public_key_sha256") == signing.fingerprint(raw)
                and rec.get("work_id") == self.work_id and rec.get("serial") == self.serial)


# --------------------------------------------------------------------------- profile

class Profile:
    """An owner's profile. Make one with :meth:`create`, use it with :meth:`open`.

    :meth:`open_public` gives the read-only view that needs no passphrase
    (listing and checking records, verifying the log); methods that sign or
    need the marking secret then raise :class:`ProfileError`.
    """

    def __init__(self, home: Path, owner_doc: dict, public_pem: bytes,
                 secrets: Secrets | None):
        self.home = Path(home)
        self.owner: str = owner_doc["owner"]
        self._owner_doc = owner_doc
        self._public_pem = public_pem
        self._pub = signing.load_public_pem(public_pem)
        self._raw_pub = signing.raw_public(self._pub)
        self.public_key_fingerprint: str = signing.fingerprint(self._raw_pub)
        self.owner_tag: int = owner_tag_of(self._raw_pub)
        self._secrets = secrets
        self._signer = None if secrets is None else signing.private_from_seed(secrets.signing_seed)
        self._tag_key = None if secrets is None else _payload_tag_key(secrets.marking_secret)
        self._db = _connect(self.home / REGISTRY_FILE)

    # ----------------------------------------------------------------- create / open
    @classmethod
    def create(cls, home: Path, owner: str, passphrase: bytes) -> Profile:
        """Make a new profile in ``home`` (created if needed, must hold no profile).

        Raises
        ------
        InputError
            When ``home`` already holds a profile (complete or not), or the owner
            name is empty.
        """
        home = Path(home)
        owner = (owner or "").strip()
        if not owner:
            raise InputError("the owner name is empty")
        if not passphrase:
            raise ProfileError("the passphrase is empty")
        present = [n for n in (OWNER_FILE, SECRETS_FILE, REGISTRY_FILE, LOG_FILE)
                   if (home / n).exists()]
        if present and OWNER_FILE not in present:
            raise InputError(f"an unfinished profile is here ({', '.join(present)}; no "
                             f"{OWNER_FILE}): move the folder aside, then run claimkit init "
                             "again", path=home)
        if present:
            raise InputError(f"a profile already exists here ({', '.join(present)}); "
                             "claimkit never overwrites one", path=home)
        try:
            home.mkdir(parents=True, exist_ok=True, mode=0o700)
            os.chmod(home, 0o700)
        except OSError as exc:
            raise InputError(f"cannot create the profile folder: {exc.strerror}",
                             path=home) from None
        secrets = Secrets(signing.generate_seed(), os.urandom(32))
        key = signing.private_from_seed(secrets.signing_seed)
        pub = key.public_key()
        raw = signing.raw_public(pub)
        # The owner file is written last: its presence marks a complete profile.
        atomic_write(home / SECRETS_FILE, seal(secrets, passphrase), mode=0o600)
        atomic_write(home / PUBLIC_FILE, signing.public_pem(pub), mode=0o600)
        fd = os.open(home / REGISTRY_FILE, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        os.close(fd)
        fd = os.open(home / LOG_FILE, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o600)
        os.close(fd)
        db = _connect(home / REGISTRY_FILE)
        with _transaction(db):
            for k, v in {"schema": "1", "next_serial": "1", "log_seq": "0",
                         "log_hash": custodylog.GENESIS, "log_size": "0"}.items():
                db.execute("INSERT INTO meta VALUES (?, ?)", (k, v))
        db.close()
        owner_doc = {
            "format": "claimkit/owner/v1", "owner": owner,
            "public_key_sha256": signing.fingerprint(raw),
            "owner_tag": f"{owner_tag_of(raw):04X}",
            "created": custodylog.utc_now(), "software": f"claimkit {__version__}",
        }
        atomic_write(home / OWNER_FILE, canonical_json(owner_doc) + b"\n", mode=0o600)
        fsync_dir(home)
        profile = cls(home, owner_doc, signing.public_pem(pub), secrets)
        profile.log_action("profile created", items={"public_key": sha256_hex(raw)},
                           details={"owner": owner, "owner_tag": owner_doc["owner_tag"]})
        return profile

    @classmethod
    def _load_public(cls, home: Path) -> tuple[dict, bytes]:
        home = Path(home)
        owner_path = home / OWNER_FILE
        if not owner_path.is_file():
            raise ProfileError(f"no profile at {home} (run claimkit init)")
        try:
            owner_doc = json.loads(owner_path.read_bytes())
            public_pem = (home / PUBLIC_FILE).read_bytes()
            pub = signing.load_public_pem(public_pem)
        except (OSError, ValueError) as exc:
            raise ProfileError(f"profile damaged: {exc}", path=home) from None
        if signing.fingerprint(signing.raw_public(pub)) != owner_doc.get("public_key_sha256"):
            raise ProfileError("public key does not match the owner file", path=home / PUBLIC_FILE)
        if not (home / REGISTRY_FILE).is_file():
            raise ProfileError("registry missing", path=home / REGISTRY_FILE)
        return owner_doc, public_pem

    @classmethod
    def open(cls, home: Path, passphrase: bytes) -> Profile:
        """Open the profile with its secrets.

        Raises
        ------
        ProfileError
            ``no profile at DIR (run claimkit init)``; ``wrong passphrase``; a damaged file.
        """
        home = Path(home)
        owner_doc, public_pem = cls._load_public(home)
        try:
            blob = (home / SECRETS_FILE).read_bytes()
        except OSError:
            raise ProfileError("sealed key file missing", path=home / SECRETS_FILE) from None
        secrets = unseal(blob, passphrase, path=home / SECRETS_FILE)
        derived = signing.raw_public(signing.private_from_seed(secrets.signing_seed).public_key())
        if signing.fingerprint(derived) != owner_doc["public_key_sha256"]:
            raise ProfileError("sealed key does not match the public key", path=home)
        profile = cls(home, owner_doc, public_pem, secrets)
        profile._flush_outbox()  # finish what an interrupted run left behind
        return profile

    @classmethod
    def open_public(cls, home: Path) -> Profile:
        """Open read-only, without the passphrase: records, tokens and the log can be checked."""
        owner_doc, public_pem = cls._load_public(home)
        return cls(Path(home), owner_doc, public_pem, None)

    def close(self) -> None:
        self._db.close()

    def __enter__(self) -> Profile:  # noqa: PYI034 - typing.Self needs Python 3.11
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ----------------------------------------------------------------- keys
    @property
    def has_secrets(self) -> bool:
        return self._secrets is not None

    def _need_secrets(self) -> Secrets:
        if self._secrets is None:
            raise ProfileError("this needs the passphrase (profile opened read-only)",
                               path=self.home)
        return self._secrets

    def public_key_pem(self) -> bytes:
        """The owner's Ed25519 public key, SubjectPublicKeyInfo PEM."""
        return self._public_pem

    @property
    def public_key(self) -> signing.Ed25519PublicKey:
        return self._pub

    @property
    def public_key_raw(self) -> bytes:
        return self._raw_pub

    @property
    def detection_seed(self) -> bytes:
        """32 bytes from which the engine derives carrier, pilot and positions."""
        return derive_detection_seed(self._need_secrets().marking_secret)

    def payload_tag(self, serial: int) -> int:
        """24-bit keyed tag of a serial: a payload cannot be forged without the marking secret."""
        self._need_secrets()
        _check_serial(serial)
        return derive_payload_tag(self._tag_key, self.owner_tag, serial)

    def payload_tag_key(self) -> bytes:
        """The key of payload tags, for examination workers in other processes.

        Secret: it is never written to disk, disclosed or logged.
        """
        self._need_secrets()
        return self._tag_key

    def sign(self, data: bytes) -> bytes:
        """Ed25519 signature of ``data`` with the owner's key."""
        self._need_secrets()
        return signing.sign(self._signer, data)

    def verify_signature(self, data: bytes, signature: bytes) -> bool:
        return signing.verify(self._pub, data, signature)

    # ----------------------------------------------------------------- serials
    def allocate_serials(self, n: int) -> list[int]:
        """Reserve ``n`` fresh serials (atomic; a serial is never handed out twice)."""
        if n < 1:
            raise ValueError("n must be at least 1")
        with _transaction(self._db):
            start = int(self._meta("next_serial"))
            if start + n - 1 > MAX_SERIAL:
                raise ProfileError(f"serials exhausted: only {MAX_SERIAL - start + 1} left",
                                   path=self.home)
            self._db.execute("UPDATE meta SET value = ? WHERE key = 'next_serial'",
                             (str(start + n),))
        return list(range(start, start + n))

    def release_serials(self, serials: list[int]) -> bool:
        """Give back serials of a mark that failed, if they are still the last handed out.

        Only the tail of the sequence is given back, and only while none of it
        is registered, so a serial that another process took meanwhile (or that
        names a registered work) is never handed out twice. True if given back.
        """
        if not serials:
            return False
        lo, hi = min(serials), max(serials)
        with _transaction(self._db):
            if int(self._meta("next_serial")) != hi + 1:
                return False
            if self._db.execute("SELECT 1 FROM works WHERE serial BETWEEN ? AND ?",
                                (lo, hi)).fetchone():
                return False
            self._db.execute("UPDATE meta SET value = ? WHERE key = 'next_serial'", (str(lo),))
        return True

    # ----------------------------------------------------------------- works
    def _build_record(self, serial: int, *, sha256_original: str, sha256_marked: str,
                      original_name: str, marked_name: str, fingerprint: str,
                      mark_params: dict, capture: dict, quality: dict,
                      registered_at: str) -> tuple[str, bytes, bytes, str]:
        secrets = self._need_secrets()
        _check_serial(serial)
        for label, value in (("sha256_original", sha256_original),
                             ("sha256_marked", sha256_marked)):
            if not isinstance(value, str) or not _HEX64.match(value):
                raise ValueError(f"{label} must be a lower-case hex SHA-256")
        work_id = work_id_for(self.owner_tag, serial)
        nonce = os.urandom(32).hex()
        opening = {
            "work_id": work_id,
            "detection_seed_sha256": sha256_hex(derive_detection_seed(secrets.marking_secret)),
            "payload_tag": self.payload_tag(serial),
            "nonce": nonce,
        }
        record = {
            "type": RECORD_TYPE,
            "work_id": work_id,
            "serial": serial,
            "owner": {"name": self.owner, "public_key_sha256": self.public_key_fingerprint,
                      "owner_tag": f"{self.owner_tag:04X}"},
            "original": {"name": original_name, "sha256": sha256_original},
            "marked": {"name": marked_name, "sha256": sha256_marked},
            "fingerprint": fingerprint,
            "mark_params": mark_params or {},
            "capture": capture or {},
            "quality": quality or {},
            "key_commitment": {"scheme": COMMITMENT_SCHEME, "value": commitment_of(opening)},
            "registered": {"time": registered_at, "time_source": "system clock"},
            "software": f"claimkit {__version__}",
        }
        try:
            canonical = canonical_json(record)
        except (TypeError, ValueError) as exc:
            raise ValueError(f"work record for serial {serial}: {exc}") from None
        return work_id, canonical, signing.sign(self._signer, canonical), nonce

    def _insert_work(self, serial: int, work_id: str, canonical: bytes, signature: bytes,
                     nonce: str, fields: dict, registered_at: str) -> None:
        if serial >= int(self._meta("next_serial")):
            raise InputError(f"serial {serial} was never allocated (use allocate_serials)")
        row = self._db.execute("SELECT work_id FROM works WHERE serial = ?", (serial,)).fetchone()
        if row:
            raise InputError(f"serial {serial} is already registered as {row[0]}")
        self._db.execute(
            "INSERT INTO works VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (work_id, serial, fields["sha256_original"], fields["sha256_marked"],
             fields["fingerprint"], canonical, signature, nonce, registered_at))
        self._queue_log("work registered",
                        items={"record": sha256_hex(canonical),
                               "original": fields["sha256_original"],
                               "marked": fields["sha256_marked"]},
                        details={"work_id": work_id, "original_name": fields["original_name"],
                                 "marked_name": fields["marked_name"]},
                        time=registered_at)

    def register_work(self, serial: int, *, sha256_original: str, sha256_marked: str,
                      original_name: str, marked_name: str, fingerprint: str,
                      mark_params: dict, capture: dict, quality: dict) -> WorkRecord:
        """Build, sign and store the record of a marked work; log "work registered".

        Parameters
        ----------
        serial : int
            A serial from :meth:`allocate_serials`, not yet registered.
        sha256_original, sha256_marked : str
            Hex SHA-256 of the original file and of the marked file.
        original_name, marked_name : str
            File names (no folders needed) as the owner knows them.
        fingerprint : str
            The perceptual fingerprint of the picture, hex.
        mark_params, capture, quality : dict
            Mark parameters, capture facts (EXIF), quality measures; any JSON values.

        Returns
        -------
        WorkRecord
        """
        return self.register_works([{
            "serial": serial, "sha256_original": sha256_original,
            "sha256_marked": sha256_marked, "original_name": original_name,
            "marked_name": marked_name, "fingerprint": fingerprint,
            "mark_params": mark_params, "capture": capture, "quality": quality}])[0]

    def register_works(self, works: list[dict]) -> list[WorkRecord]:
        """Register many works in one transaction (same fields as :meth:`register_work`)."""
        now = custodylog.utc_now()
        built = []
        for w in works:
            w = dict(w)
            serial = w.pop("serial")
            work_id, canonical, sig, nonce = self._build_record(serial, registered_at=now, **w)
            built.append((serial, work_id, canonical, sig, nonce, w))
        with _transaction(self._db):
            for serial, work_id, canonical, sig, nonce, w in built:
                self._insert_work(serial, work_id, canonical, sig, nonce, w, now)
        self._flush_outbox()
        return [WorkRecord(work_id, serial, json.loads(canonical), canonical, sig, self._raw_pub)
                for serial, work_id, canonical, sig, nonce, w in built]

    def _row_to_work(self, row) -> WorkRecord | None:
        if row is None:
            return None
        work_id, serial, canonical, signature = row
        canonical = bytes(canonical)
        try:
            record = json.loads(canonical)
        except ValueError:
            record = {}
        return WorkRecord(work_id, serial, record, canonical, bytes(signature), self._raw_pub)

    _WORK_COLS = "work_id, serial, canonical, signature"

    def work(self, work_id: str) -> WorkRecord | None:
        """The work with this ID, or None."""
        return self._row_to_work(self._db.execute(
            f"SELECT {self._WORK_COLS} FROM works WHERE work_id = ?", (work_id,)).fetchone())

    def work_by_payload(self, owner_tag: int, serial: int) -> WorkRecord | None:
        """The work a decoded payload names, or None (another owner's tag gives None)."""
        if owner_tag != self.owner_tag:
            return None
        return self._row_to_work(self._db.execute(
            f"SELECT {self._WORK_COLS} FROM works WHERE serial = ?", (serial,)).fetchone())

    def work_by_hash(self, sha256: str) -> WorkRecord | None:
        """The work whose original or marked file has this SHA-256, or None."""
        sha256 = sha256.lower()
        return self._row_to_work(self._db.execute(
            f"SELECT {self._WORK_COLS} FROM works WHERE sha256_original = ? "
            "OR sha256_marked = ? ORDER BY serial LIMIT 1", (sha256, sha256)).fetchone())

    def works(self) -> list[WorkRecord]:
        """All works, by serial."""
        return [self._row_to_work(r) for r in self._db.execute(
            f"SELECT {self._WORK_COLS} FROM works ORDER BY serial")]

    def works_by_fingerprint(self, fingerprint: str, max_distance: int
                             ) -> list[tuple[WorkRecord, int]]:
        """Works whose fingerprint is within ``max_distance`` bits (Hamming), nearest first."""
        try:
            want = int(fingerprint, 16)
        except ValueError:
            raise ValueError("fingerprint must be hex") from None
        hits = []
        for work_id, fp in self._db.execute("SELECT work_id, fingerprint FROM works"):
            if len(fp) != len(fingerprint):
                continue
            try:
                d = (int(fp, 16) ^ want).bit_count()
            except ValueError:
                continue
            if d <= max_distance:
                hits.append((d, work_id))
        hits.sort()
        return [(self.work(w), d) for d, w in hits]

    def commitment_opening(self, work_id: str) -> dict:
        """The opening of a work's key commitment (needs the passphrase)."""
        secrets = self._need_secrets()
        row = self._db.execute("SELECT serial, commitment_nonce FROM works WHERE work_id = ?",
                               (work_id,)).fetchone()
        if row is None:
            raise InputError(f"no work {work_id} in this profile")
        serial, nonce = row
        return {
            "work_id": work_id,
            "detection_seed_sha256": sha256_hex(derive_detection_seed(secrets.marking_secret)),
            "payload_tag": self.payload_tag(serial),
            "nonce": nonce,
        }

    # ----------------------------------------------------------------- custody log
    @property
    def log_path(self) -> Path:
        return self.home / LOG_FILE

    def log_action(self, action: str, *, items: dict[str, str], details: dict | None = None,
                   actor: str | None = None) -> dict:
        """Append a signed entry to the custody log and return it.

        Parameters
        ----------
        action : str
            What was done, e.g. ``"disputed file taken in"``.
        items : dict
            Name -> hex SHA-256 of every item the action touched.
        details : dict, optional
            Anything else worth keeping (JSON values).
        actor : str, optional
            Who did it; default the owner.
        """
        self._need_secrets()
        custodylog.check_items(items)
        canonical_json(details or {})  # refuse what cannot be encoded before queueing
        with _transaction(self._db):
            entry_id = self._queue_log(action, items=items, details=details, actor=actor)
        written = self._flush_outbox()
        if entry_id in written:
            return written[entry_id]
        # Another process holding this profile flushed our entry first: read it back.
        return self._entry_from_log(entry_id)

    def _entry_from_log(self, entry_id: str) -> dict:
        needle = f'"id":"{entry_id}"'.encode()
        for raw in reversed(self.log_path.read_bytes().splitlines()):
            if needle in raw:
                return json.loads(raw)
        raise CheckFailed(f"custody-log entry {entry_id} was queued but is not in the log",
                          path=self.log_path)

    def _queue_log(self, action: str, *, items: dict, details: dict | None,
                   actor: str | None = None, time: str | None = None) -> str:
        entry_id = os.urandom(16).hex()
        self._db.execute(
            "INSERT INTO log_outbox (entry_id, time, actor, action, items, details) "
            "VALUES (?, ?, ?, ?, ?, ?)",
            (entry_id, time or custodylog.utc_now(), actor or self.owner, action,
             canonical_json(items).decode(), canonical_json(details or {}).decode()))
        return entry_id

    @contextlib.contextmanager
    def _log_lock(self) -> Iterator[None]:
        fd = os.open(self.home / LOCK_FILE, os.O_RDWR | os.O_CREAT, 0o600)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX)
            yield
        finally:
            fcntl.flock(fd, fcntl.LOCK_UN)
            os.close(fd)

    def pending_log_entries(self) -> int:
        """Entries recorded in the registry but not yet in the log (after a crash)."""
        return self._db.execute("SELECT COUNT(*) FROM log_outbox").fetchone()[0]

    def log_head(self) -> tuple[int, str]:
        return int(self._meta("log_seq")), self._meta("log_hash")

    def _flush_outbox(self) -> dict[str, dict]:
        """Append queued entries to the log; returns entry id -> entry for those written."""
        if self._secrets is None:
            return {}
        written: dict[str, dict] = {}
        with self._db.lock, self._log_lock():
            seq, head = self.log_head()
            size = int(self._meta("log_size"))
            try:
                actual = self.log_path.stat().st_size
            except FileNotFoundError:
                raise ProfileError("custody log missing", path=self.log_path) from None
            if actual < size:
                raise CheckFailed(f"custody log is shorter than the registry recorded "
                                  f"({actual} < {size} bytes): run claimkit log verify",
                                  path=self.log_path)
            adopted: list[str] = []
            if actual > size:
                # Lines appended by a run that died before it could note them.
                parts = custodylog.read_tail(self.log_path, size)
                complete, torn = parts[:-1], parts[-1]
                if torn:  # a torn last line from a crash: ours, never confirmed
                    os.truncate(self.log_path, actual - len(torn))
                queued = {r[0] for r in self._db.execute("SELECT entry_id FROM log_outbox")}
                for raw in complete:
                    try:
                        entry = json.loads(raw)
                        entry_id, entry_seq = entry["id"], int(entry["seq"])
                    except (ValueError, KeyError, TypeError):
                        entry_id, entry_seq = None, 0
                    if entry_id not in queued or entry_seq != seq + 1:
                        raise CheckFailed(
                            f"custody log has lines after entry #{seq} that this registry did "
                            "not write: run claimkit log verify", path=self.log_path)
                    seq, head = entry_seq, custodylog.entry_hash(raw)
                    size += len(raw) + 1
                    adopted.append(entry_id)
            rows = self._db.execute(
                "SELECT entry_id, time, actor, action, items, details FROM log_outbox "
                "ORDER BY ord").fetchall()
            lines = []
            for entry_id, time, actor, action, items, details in rows:
                if entry_id in adopted:
                    continue
                seq += 1
                entry, line = custodylog.build_entry(
                    self._signer, self.public_key_fingerprint, seq=seq, prev=head,
                    entry_id=entry_id, time=time, action=action, actor=actor,
                    items=json.loads(items), details=json.loads(details))
                head = custodylog.entry_hash(line)
                lines.append(line)
                written[entry_id] = entry
            if lines:
                size = custodylog.append_lines(self.log_path, lines)
            if rows or adopted:
                with _transaction(self._db):
                    self._db.executemany("DELETE FROM log_outbox WHERE entry_id = ?",
                                         [(r[0],) for r in rows])
                    for k, v in (("log_seq", str(seq)), ("log_hash", head),
                                 ("log_size", str(size))):
                        self._db.execute("UPDATE meta SET value = ? WHERE key = ?", (v, k))
        return written

    # ----------------------------------------------------------------- stamps, checks
    def stamp_request(self, work_ids: list[str] | None = None):
        """Request a timestamp over the Merkle root of these works (default: unstamped ones).

        See :func:`claimkit.evidence.stamping.request_stamp`.
        """
        from claimkit.evidence.stamping import request_stamp
        return request_stamp(self, work_ids)

    def stamp_attach(self, tsr: bytes, tsa_cert_pem: bytes, **kw):
        """Check a timestamp response against its request and store it.

        See :func:`claimkit.evidence.stamping.attach_stamp`.
        """
        from claimkit.evidence.stamping import attach_stamp
        return attach_stamp(self, tsr, tsa_cert_pem, **kw)

    def check_work(self, work_id: str):
        """Re-check a work: signature, registry agreement, each token and inclusion proof."""
        from claimkit.evidence.checks import check_work
        work = self.work(work_id)
        if work is None:
            raise InputError(f"no work {work_id} in this profile")
        return check_work(self, work)

    def audit(self):
        """Verify the custody log and cross-check every record and token against it."""
        from claimkit.evidence.checks import audit_profile
        return audit_profile(self)

    def disclose(self, work_id: str, out: Path, *, keys: bool = True) -> Path:
        """Write the disclosure for one work, with key material or without
        (see :mod:`claimkit.evidence.disclose`)."""
        from claimkit.evidence.disclose import write_disclosure
        return write_disclosure(self, work_id, out, keys=keys)

    # ----------------------------------------------------------------- internals
    def _meta(self, key: str) -> str:
        row = self._db.execute("SELECT value FROM meta WHERE key = ?", (key,)).fetchone()
        if row is None:
            raise ProfileError(f"registry damaged: no {key}", path=self.home / REGISTRY_FILE)
        return row[0]

    @property
    def db(self) -> sqlite3.Connection:
        """The registry connection (for the modules of this package)."""
        return self._db

    def transaction(self):
        """A write transaction on the registry (``BEGIN IMMEDIATE`` ... ``COMMIT``)."""
        return _transaction(self._db)


def _check_serial(serial: int) -> None:
    if not isinstance(serial, int) or isinstance(serial, bool) or not 1 <= serial <= MAX_SERIAL:
        raise ValueError(f"serial must be an integer in 1..{MAX_SERIAL}")


def parse_work_id(work_id: str) -> tuple[int, int] | None:
    """(owner_tag, serial) from ``W-TTTT-SSSSSS``, or None when it is not one."""
    m = _WORK_ID.match(work_id or "")
    return (int(m.group(1), 16), int(m.group(2))) if m else None


class _Connection(sqlite3.Connection):
    """A registry connection that threads may share: transactions take ``lock`` in turn."""

    def __init__(self, *args, **kwargs):
        super().__init__(*args, **kwargs)
        self.lock = threading.RLock()


def _connect(path: Path) -> sqlite3.Connection:
    try:
        db = sqlite3.connect(str(path), isolation_level=None, timeout=30,
                             check_same_thread=False, factory=_Connection)
        db.execute("PRAGMA busy_timeout = 30000")
        db.execute("PRAGMA journal_mode = WAL")
        # FULL: a committed registry change survives a power cut, not just a crash.
        db.execute("PRAGMA synchronous = FULL")
        db.execute("PRAGMA foreign_keys = ON")
        db.executescript(_SCHEMA)
    except sqlite3.DatabaseError as exc:
        raise ProfileError(f"registry unreadable: {exc}", path=path) from None
    return db


@contextlib.contextmanager
def _transaction(db: sqlite3.Connection) -> Iterator[sqlite3.Connection]:
    with db.lock:
        db.execute("BEGIN IMMEDIATE")
        try:
            yield db
        except BaseException:
            db.execute("ROLLBACK")
            raise
        else:
            db.execute("COMMIT")
