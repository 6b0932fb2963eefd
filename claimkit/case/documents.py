"""The evidence documents of a case and its bundle, typed and versioned, each with one reader
and one writer.

Every document is canonical JSON (RFC 8785) with a ``type`` of the form
``claimkit/KIND/vN``; ``N`` is its schema version (CHANGELOG.md lists them).
:meth:`Document.read` is the one reader: it refuses another kind, and a
version this claimkit does not read, with the precise reason
(:class:`SchemaError`). :meth:`Document.write` is the one writer: canonical
JSON and a newline, written atomically, the bytes returned so that the
custody log can name their hash.

Field names are the JSON names. Fields this claimkit does not know (added by
a later version, or by a module that stores more) are kept as read in
``extra`` and written back unchanged, so a document survives a round trip
through any version that reads its schema.

Documents also answer ``doc["field"]`` and ``doc.get("field")`` with their
JSON values, for code that works on the JSON form (templates, comparisons).
"""

from __future__ import annotations

import json
import re
from collections.abc import Iterator, Mapping
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any, ClassVar, TypeVar

from typing_extensions import Self

from claimkit.errors import InputError
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.storage import atomic_write

__all__ = [
    "CaseDoc",
    "Document",
    "DossierDataDoc",
    "ExhibitDoc",
    "FindingDoc",
    "ManifestDoc",
    "SchemaError",
    "WithdrawalDoc",
]

_TYPE = re.compile(r"claimkit/([a-z-]+)/v(\d+)\Z")
D = TypeVar("D", bound="Document")


class SchemaError(InputError):
    """A document of another kind, or of a schema version this claimkit does not read."""


@dataclass
class Document(Mapping):
    """Base of every evidence document (subclasses declare ``KIND``, ``VERSION`` and fields)."""

    KIND: ClassVar[str] = ""
    VERSION: ClassVar[int] = 1
    #: Older versions this claimkit still reads as they are (their fields are a subset).
    READS: ClassVar[tuple[int, ...]] = ()
    #: Optional fields left out of the JSON when they are None (as earlier versions wrote them).
    OMIT_NONE: ClassVar[tuple[str, ...]] = ()
    #: Whether the stored bytes end with a newline (a signed document's bytes are exactly
    #: its canonical JSON).
    NEWLINE: ClassVar[bool] = True

    extra: dict = field(default_factory=dict, kw_only=True)

    # ----------------------------------------------------------------- identity
    @classmethod
    def type_name(cls) -> str:
        """``claimkit/KIND/vVERSION``, the ``type`` this class writes."""
        return f"claimkit/{cls.KIND}/v{cls.VERSION}"

    @classmethod
    def _known(cls) -> list[str]:
        return [f.name for f in fields(cls) if f.name != "extra"]

    # ----------------------------------------------------------------- JSON form
    @classmethod
    def from_json(cls, doc: Any, *, path: object = None) -> Self:
        """The document from its JSON value, checking kind, version and required fields.

        Raises
        ------
        SchemaError
            Naming what is wrong: not an object, another kind, a version this
            claimkit does not read (newer or older), or a missing field.
        """
        if not isinstance(doc, dict):
            raise SchemaError(f"is not a claimkit {cls.KIND} (not a JSON object)", path=path)
        t = doc.get("type")
        m = _TYPE.match(t) if isinstance(t, str) else None
        if m is None or m.group(1) != cls.KIND:
            raise SchemaError(f"is not a claimkit {cls.KIND} (type {t!r}, expected "
                              f"{cls.type_name()})", path=path)
        version = int(m.group(2))
        if version > cls.VERSION:
            raise SchemaError(f"is {t}, written by a newer claimkit ({doc.get('software', '?')}); "
                              f"this claimkit reads {cls.KIND} up to v{cls.VERSION}", path=path)
        if version != cls.VERSION and version not in cls.READS:
            raise SchemaError(f"is {t}, an older schema ({doc.get('software', '?')}) that this "
                              f"claimkit no longer reads (it reads {cls.type_name()})", path=path)
        known = cls._known()
        required = [f.name for f in fields(cls) if f.name != "extra"
                    and f.default is f.default_factory]  # type: ignore[misc]
        missing = [k for k in required if k not in doc]
        if missing:
            raise SchemaError(f"{t} lacks {', '.join(missing)}", path=path)
        values = {k: doc[k] for k in known if k in doc}
        extra = {k: v for k, v in doc.items() if k not in known and k != "type"}
        return cls(**values, extra=extra)

    def to_json(self) -> dict:
        """The JSON value (``type`` first, then the fields, then ``extra``)."""
        out: dict = {"type": self.type_name()}
        for k in self._known():
            v = getattr(self, k)
            if v is None and k in self.OMIT_NONE:
                continue
            out[k] = v
        for k, v in self.extra.items():
            out.setdefault(k, v)
        return out

    # ----------------------------------------------------------------- files
    @classmethod
    def read(cls, path: str | Path) -> Self:
        """The one reader: the document stored at ``path``.

        Raises
        ------
        InputError
            When the file is missing or not JSON.
        SchemaError
            See :meth:`from_json`.
        """
        p = Path(path)
        try:
            raw = p.read_bytes()
        except FileNotFoundError:
            raise InputError("missing", path=p) from None
        try:
            doc = json.loads(raw)
        except ValueError:
            raise InputError("not JSON", path=p) from None
        return cls.from_json(doc, path=p)

    def encode(self) -> bytes:
        """The bytes :meth:`write` stores: canonical JSON (and a newline, see ``NEWLINE``)."""
        return canonical_json(self.to_json()) + (b"\n" if self.NEWLINE else b"")

    def write(self, path: str | Path, *, replace: bool = True) -> bytes:
        """The one writer: store atomically; returns the bytes written.

        With ``replace=False`` an existing file is never replaced (AlreadyExists).
        """
        data = self.encode()
        atomic_write(Path(path), data, replace=replace)
        return data

    # ----------------------------------------------------------------- the JSON view
    def __getitem__(self, key: str) -> Any:
        return self.to_json()[key]

    def __iter__(self) -> Iterator[str]:
        return iter(self.to_json())

    def __len__(self) -> int:
        return len(self.to_json())


@dataclass
class CaseDoc(Document):
    """``case.json``: what the case is, when it was opened, whose it is."""

    KIND: ClassVar[str] = "case"
    OMIT_NONE: ClassVar[tuple[str, ...]] = ("owner",)
    title: str
    case_id: str
    opened: dict
    software: str
    owner: dict | None = None


@dataclass
class ExhibitDoc(Document):
    """``exhibits/ID.json``: the intake record of one disputed copy."""

    KIND: ClassVar[str] = "exhibit"
    exhibit_id: str
    case_id: str
    file: str
    original_name: str
    sha256: str
    size: int
    media_type: str
    width: int | None
    height: int | None
    source: str
    found: dict | None
    taken_in: dict
    note: str | None


@dataclass
class WithdrawalDoc(Document):
    """``exhibits/withdrawn/ID.json``: an exhibit taken out of the claims, who, when and why."""

    KIND: ClassVar[str] = "withdrawal"
    exhibit_id: str
    case_id: str
    exhibit_sha256: str
    reason: str
    by: str
    time: str
    time_source: str


@dataclass
class FindingDoc(Document):
    """``findings/ID.json``: one examination, its control, alignment and robustness."""

    KIND: ClassVar[str] = "finding"
    # Findings stored before the content line (claimkit 0.2) lack these three: they are
    # written back without them, so such a finding still round-trips to the byte.
    OMIT_NONE: ClassVar[tuple[str, ...]] = ("content", "content_mismatch", "evaluation",
                                            "message_arrays")
    exhibit_id: str
    exhibit_sha256: str
    examined: dict
    result: dict
    decoy_scores: list
    decoy_summary: dict
    arrays: dict
    match: dict | None = None
    reference: dict | None = None
    alignment: dict | None = None
    robustness: dict | None = None
    content: dict | None = None            # the content line (claimkit.content)
    content_mismatch: bool | None = None   # a mark in a picture that does not show its work
    evaluation: dict | None = None         # propositions, likelihood ratios, verbal scale
    message_arrays: dict | None = None     # recovered/prescribed message (keyed; older: in arrays)


@dataclass
class ManifestDoc(Document):
    """``manifest.json``: every file of the bundle with its SHA-256 and size, signed."""

    KIND: ClassVar[str] = "bundle-manifest"
    NEWLINE: ClassVar[bool] = False      # the signature covers exactly the canonical JSON
    case_id: str
    created: dict
    software: str
    signer: dict
    signature: dict
    files: list

    def listed(self) -> dict[str, dict]:
        """path -> entry of every listed file.

        Raises
        ------
        SchemaError
            When an entry is not an object with a path.
        """
        try:
            return {f["path"]: f for f in self.files}
        except (KeyError, TypeError):
            raise SchemaError("manifest.json lists an entry without a path") from None


@dataclass
class DossierDataDoc(Document):
    """``report/dossier.json``: every number and fact the dossier shows.

    v2: the method's parameters are explicit per-format records
    (``method.engine.format_records``, ``method.engine.examination``); v1 reflected
    the engine's module constants into ``method.engine.settings``.
    """

    KIND: ClassVar[str] = "dossier"
    VERSION: ClassVar[int] = 2
    software: str
    case: dict
    claimant: dict
    works: list
    exhibits: list
    results: list
    summary: dict
    method: dict
    custody: dict
    figures: dict
