"""The owner's profile: opening and creating it, and the API over its parts.

Layout of the profile folder (mode 0700; every file 0600)::

    owner.json        who owns the profile and the public-key fingerprint (not secret)
    public.pem        the Ed25519 public key (SubjectPublicKeyInfo PEM)
    secrets.sealed    signing key + marking secret, sealed under the passphrase
    registry.sqlite   works, serials, stamp requests, tokens (SQLite, WAL)
    custody.jsonl     the custody log (see :mod:`.custodylog`)

The parts live in their own modules: key derivations in :mod:`.keys`, work
records in :mod:`.records`, the registry and all its SQL in :mod:`.registry`,
the custody-log outbox in :mod:`.outbox`. A change to the registry and the
custody-log entry that records it commit together (:meth:`Profile.change`).
"""

from __future__ import annotations

import contextlib
import json
import os
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

from claimkit import __version__
from claimkit.errors import InputError, ProfileError
from claimkit.evidence import custodylog, outbox, session, signing
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.checks import AuditReport, WorkStatus, audit_profile, check_work
from claimkit.evidence.disclose import write_disclosure
from claimkit.evidence.keys import (
    MAX_SERIAL,
    check_serial,
    commitment_of,
    derive_detection_seed,
    derive_payload_tag,
    owner_tag_of,
    payload_tag_key,
    work_id_for,
)
from claimkit.evidence.keystore import Secrets, seal, unseal
from claimkit.evidence.records import WorkRecord, build_record
from claimkit.evidence.registry import Registry
from claimkit.evidence.stamping import StampRequest, StampResult, attach_stamp, request_stamp
from claimkit.evidence.storage import atomic_write, fsync_dir, sha256_hex

__all__ = [
    "MAX_SERIAL",
    "Change",
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


@dataclass
class Change:
    """An open registry transaction and the custody-log entries queued with it."""

    registry: Registry
    _profile: Profile

    def log(self, action: str, *, items: dict, details: dict | None = None,
            actor: str | None = None, time: str | None = None) -> str:
        """Queue a custody-log entry that commits with this change; returns its id."""
        return outbox.queue(self.registry, action, items=items, details=details,
                            actor=actor or self._profile.owner, time=time)


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
        self._tag_key = None if secrets is None else payload_tag_key(secrets.marking_secret)
        self.registry = Registry(self.home / REGISTRY_FILE)

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
        registry = Registry(home / REGISTRY_FILE)
        with registry.transaction():
            registry.init_meta({"next_serial": "1", "log_seq": "0",
                                "log_hash": custodylog.GENESIS, "log_size": "0"})
        registry.close()
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
        return cls._with_secrets(home, owner_doc, public_pem, secrets)

    @classmethod
    def open_session(cls, home: Path, token: str) -> Profile:
        """Open the profile with the secrets of a live session (:mod:`.session`), no passphrase.

        Raises
        ------
        ProfileError
            No profile; the session ended (expired or locked), is for another
            profile, or its key does not open its file.
        """
        home = Path(home)
        owner_doc, public_pem = cls._load_public(home)
        secrets = session.unlock(token, profile=owner_doc["public_key_sha256"])
        return cls._with_secrets(home, owner_doc, public_pem, secrets)

    @classmethod
    def _with_secrets(cls, home: Path, owner_doc: dict, public_pem: bytes,
                      secrets: Secrets) -> Profile:
        derived = signing.raw_public(signing.private_from_seed(secrets.signing_seed).public_key())
        if signing.fingerprint(derived) != owner_doc["public_key_sha256"]:
            raise ProfileError("sealed key does not match the public key", path=home)
        profile = cls(home, owner_doc, public_pem, secrets)
        profile.flush_log()  # finish what an interrupted run left behind
        return profile

    def unlock(self, lifetime: int = session.DEFAULT_LIFETIME) -> session.Session:
        """Start a session that opens this profile for ``lifetime`` seconds without the passphrase.

        The secrets are sealed again under a new random key that only the
        returned :class:`~claimkit.evidence.session.Session` holds (its
        ``token``); ``secrets.sealed`` is not touched.
        """
        return session.start(self._need_secrets(), profile=self.public_key_fingerprint,
                             lifetime=lifetime)

    @classmethod
    def open_public(cls, home: Path) -> Profile:
        """Open read-only, without the passphrase: records, tokens and the log can be checked."""
        owner_doc, public_pem = cls._load_public(home)
        return cls(Path(home), owner_doc, public_pem, None)

    def close(self) -> None:
        self.registry.close()

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
        check_serial(serial)
        assert self._tag_key is not None
        return derive_payload_tag(self._tag_key, self.owner_tag, serial)

    def payload_tag_key(self) -> bytes:
        """The key of payload tags, for examination workers in other processes.

        Secret: it is never written to disk, disclosed or logged.
        """
        self._need_secrets()
        assert self._tag_key is not None
        return self._tag_key

    def sign(self, data: bytes) -> bytes:
        """Ed25519 signature of ``data`` with the owner's key."""
        self._need_secrets()
        assert self._signer is not None     # set whenever the secrets are
        return signing.sign(self._signer, data)

    def verify_signature(self, data: bytes, signature: bytes) -> bool:
        return signing.verify(self._pub, data, signature)

    # ----------------------------------------------------------------- serials
    def allocate_serials(self, n: int) -> list[int]:
        """Reserve ``n`` fresh serials (atomic; a serial is never handed out twice)."""
        if n < 1:
            raise ValueError("n must be at least 1")
        with self.registry.transaction() as reg:
            start = int(reg.meta("next_serial"))
            if start + n - 1 > MAX_SERIAL:
                raise ProfileError(f"serials exhausted: only {MAX_SERIAL - start + 1} left",
                                   path=self.home)
            reg.set_meta("next_serial", str(start + n))
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
        with self.registry.transaction() as reg:
            if int(reg.meta("next_serial")) != hi + 1 or reg.any_serial_between(lo, hi):
                return False
            reg.set_meta("next_serial", str(lo))
        return True

    # ----------------------------------------------------------------- works
    def _opening(self, work_id: str, serial: int, nonce: str) -> dict:
        secrets = self._need_secrets()
        return {
            "work_id": work_id,
            "detection_seed_sha256": sha256_hex(derive_detection_seed(secrets.marking_secret)),
            "payload_tag": self.payload_tag(serial),
            "nonce": nonce,
        }

    def _build_record(self, serial: int, *, sha256_original: str, sha256_marked: str,
                      original_name: str, marked_name: str, fingerprint: str,
                      mark_params: dict, capture: dict, quality: dict,
                      registered_at: str) -> tuple[str, bytes, bytes, str]:
        self._need_secrets()
        check_serial(serial)
        work_id = work_id_for(self.owner_tag, serial)
        nonce = os.urandom(32).hex()
        canonical = build_record(
            work_id=work_id, serial=serial,
            owner={"name": self.owner, "public_key_sha256": self.public_key_fingerprint,
                   "owner_tag": f"{self.owner_tag:04X}"},
            opening=self._opening(work_id, serial, nonce),
            sha256_original=sha256_original, sha256_marked=sha256_marked,
            original_name=original_name, marked_name=marked_name, fingerprint=fingerprint,
            mark_params=mark_params, capture=capture, quality=quality,
            registered_at=registered_at)
        return work_id, canonical, self.sign(canonical), nonce

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
        with self.change() as ch:
            for serial, work_id, canonical, sig, nonce, w in built:
                ch.registry.insert_work(
                    work_id=work_id, serial=serial, sha256_original=w["sha256_original"],
                    sha256_marked=w["sha256_marked"], fingerprint=w["fingerprint"],
                    canonical=canonical, signature=sig, nonce=nonce, registered_at=now)
                ch.log("work registered",
                       items={"record": sha256_hex(canonical),
                              "original": w["sha256_original"], "marked": w["sha256_marked"]},
                       details={"work_id": work_id, "original_name": w["original_name"],
                                "marked_name": w["marked_name"]},
                       time=now)
        return [WorkRecord(work_id, serial, json.loads(canonical), canonical, sig, self._raw_pub)
                for serial, work_id, canonical, sig, nonce, w in built]

    def _record(self, row) -> WorkRecord | None:
        return None if row is None else WorkRecord.from_row(row, self._raw_pub)

    def work(self, work_id: str) -> WorkRecord | None:
        """The work with this ID, or None."""
        return self._record(self.registry.work(work_id))

    def work_by_payload(self, owner_tag: int, serial: int) -> WorkRecord | None:
        """The work a decoded payload names, or None (another owner's tag gives None)."""
        if owner_tag != self.owner_tag:
            return None
        return self._record(self.registry.work_by_serial(serial))

    def work_by_hash(self, sha256: str) -> WorkRecord | None:
        """The work whose original or marked file has this SHA-256, or None."""
        return self._record(self.registry.work_by_hash(sha256.lower()))

    def works(self) -> list[WorkRecord]:
        """All works, by serial."""
        return [WorkRecord.from_row(r, self._raw_pub) for r in self.registry.works()]

    def works_by_fingerprint(self, fingerprint: str, max_distance: int
                             ) -> list[tuple[WorkRecord, int]]:
        """Works whose fingerprint is within ``max_distance`` bits (Hamming), nearest first."""
        try:
            want = int(fingerprint, 16)
        except ValueError:
            raise ValueError("fingerprint must be hex") from None
        hits = []
        for work_id, fp in self.registry.fingerprints():
            if len(fp) != len(fingerprint):
                continue
            try:
                d = (int(fp, 16) ^ want).bit_count()
            except ValueError:
                continue
            if d <= max_distance:
                hits.append((d, work_id))
        hits.sort()
        out = []
        for d, w in hits:
            work = self.work(w)
            if work is not None:
                out.append((work, d))
        return out

    def commitment_opening(self, work_id: str) -> dict:
        """The opening of a work's key commitment (needs the passphrase)."""
        self._need_secrets()
        row = self.registry.commitment_nonce(work_id)
        if row is None:
            raise InputError(f"no work {work_id} in this profile")
        serial, nonce = row
        return self._opening(work_id, serial, nonce)

    # ----------------------------------------------------------------- custody log
    @property
    def log_path(self) -> Path:
        return self.home / LOG_FILE

    @contextlib.contextmanager
    def change(self) -> Iterator[Change]:
        """A registry transaction whose queued log entries are appended once it commits."""
        self._need_secrets()
        with self.registry.transaction():
            yield Change(self.registry, self)
        self.flush_log()

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
        with self.registry.transaction():
            entry_id = outbox.queue(self.registry, action, items=items, details=details,
                                    actor=actor or self.owner)
        written = self.flush_log()
        if entry_id in written:
            return written[entry_id]
        # Another process holding this profile flushed our entry first: read it back.
        return outbox.entry_from_log(self.log_path, entry_id)

    def pending_log_entries(self) -> int:
        """Entries recorded in the registry but not yet in the log (after a crash)."""
        return self.registry.queued_count()

    def log_head(self) -> tuple[int, str]:
        return int(self.registry.meta("log_seq")), self.registry.meta("log_hash")

    def flush_log(self) -> dict[str, dict]:
        """Append queued entries to the log; returns entry id -> entry for those written."""
        if self._secrets is None:
            return {}
        return outbox.flush(self.registry, self.log_path, self.home / LOCK_FILE, self._signer,
                            self.public_key_fingerprint)

    # ----------------------------------------------------------------- stamps, checks
    def stamp_request(self, work_ids: list[str] | None = None) -> StampRequest:
        """Request a timestamp over the Merkle root of these works (default: unstamped ones).

        See :func:`claimkit.evidence.stamping.request_stamp`.
        """
        return request_stamp(self, work_ids)

    def stamp_attach(self, tsr: bytes, tsa_cert_pem: bytes, **kw) -> StampResult:
        """Check a timestamp response against its request and store it.

        See :func:`claimkit.evidence.stamping.attach_stamp`.
        """
        return attach_stamp(self, tsr, tsa_cert_pem, **kw)

    def check_work(self, work_id: str) -> WorkStatus:
        """Re-check a work: signature, registry agreement, each token and inclusion proof."""
        work = self.work(work_id)
        if work is None:
            raise InputError(f"no work {work_id} in this profile")
        return check_work(self, work)

    def audit(self) -> AuditReport:
        """Verify the custody log and cross-check every record and token against it."""
        return audit_profile(self)

    def disclose(self, work_id: str, out: Path, *, keys: bool = True) -> Path:
        """Write the disclosure for one work, with key material or without
        (see :mod:`claimkit.evidence.disclose`)."""
        return write_disclosure(self, work_id, out, keys=keys)

    @property
    def db(self):
        """The registry's SQLite connection (for tests that damage a registry on purpose)."""
        return self.registry.db
