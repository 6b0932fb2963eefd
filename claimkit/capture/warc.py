"""WARC/1.1 files (ISO 28500): writing a capture, reading any crawler's file.

Writing goes through ``warcio`` (the maintained WARC library of the web
archiving community), with two choices of our own:

- the HTTP request and response are stored as the exact bytes sent and
  received; warcio would re-serialise the header fields, which an examiner
  comparing with a packet capture could not reconcile, so
  :class:`_WireHeaders` hands warcio the bytes as they were;
- block and payload digests are SHA-256 (base32, the form warcio's own
  checker and the WARC guidelines use), computed here at download.

Each fetch gives a ``response`` record (with ``WARC-IP-Address``), its
``request`` record and a ``metadata`` record (``application/warc-fields``)
holding the TLS protocol, cipher, the server's certificate chain as sent and
whether it verified, and how the page referenced the URL; a page snapshot is
a ``resource`` record. All are tied to the response by ``WARC-Concurrent-To``.

Reading uses warcio's ``ArchiveIterator`` with digest checking on: a record
whose digest fails, or a truncated or corrupt file, is refused with one line
naming the file.

References
----------
ISO 28500:2017, Information and documentation - WARC file format (WARC/1.1);
IIPC, "The WARC Format 1.1", iipc.github.io/warc-specifications.
"""

from __future__ import annotations

import base64
import hashlib
import io
import os
import platform
import ssl
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from warcio.statusandheaders import StatusAndHeaders, StatusAndHeadersParser
from warcio.warcwriter import WARCWriter

from claimkit import __version__
from claimkit.errors import InputError

__all__ = [
    "WARC_SUFFIXES",
    "WarcImage",
    "WarcWriter",
    "b32_sha256",
    "exchange_facts",
    "image_responses",
    "is_warc",
    "record_payload",
]

WARC_SUFFIXES = (".warc", ".warc.gz")
_IMAGE_MAGIC = (b"\xff\xd8\xff", b"\x89PNG\r\n\x1a\n", b"GIF87a", b"GIF89a", b"II*\x00",
                b"MM\x00*", b"BM")


def exchange_facts(status: int, header, ip: str | None) -> dict:
    """The server's statements that date the content, and where it was fetched from."""
    return {"http_status": status, "server_date": header("Date"),
            "last_modified": header("Last-Modified"), "etag": header("ETag"),
            "content_type": header("Content-Type"), "ip": ip}


def b32_sha256(data: bytes) -> str:
    """``sha256:BASE32`` digest as WARC headers carry it."""
    return "sha256:" + base64.b32encode(hashlib.sha256(data).digest()).decode("ascii")


def is_warc(path: Path) -> bool:
    name = path.name.lower()
    return any(name.endswith(s) for s in WARC_SUFFIXES)


def looks_like_image(data: bytes) -> bool:
    return data.startswith(_IMAGE_MAGIC) or (data[:4] == b"RIFF" and data[8:12] == b"WEBP")


class _WireHeaders(StatusAndHeaders):
    """warcio's header object, writing the header bytes exactly as they were received."""

    def __init__(self, head: bytes):
        parsed = StatusAndHeadersParser([], verify=False).parse(io.BytesIO(head))
        super().__init__(parsed.statusline, parsed.headers, protocol=parsed.protocol)
        self.wire = head
        self.headers_buff = head

    def compute_headers_buffer(self, header_filter=None):
        self.headers_buff = self.wire


def _head_and_body(raw: bytes) -> tuple[bytes, bytes]:
    end = raw.find(b"\r\n\r\n")
    if end < 0:
        return raw, b""
    return raw[:end + 4], raw[end + 4:]


@dataclass
class Written:
    record_id: str
    date: str


class WarcWriter:
    """A WARC/1.1 file being written (gzip per record when the name ends ``.gz``)."""

    def __init__(self, path: Path, *, operator: str | None, description: str):
        self.path = Path(path)
        self.fh = open(self.path, "xb")  # noqa: SIM115 - open until close(); "x": never replace
        self.writer = WARCWriter(self.fh, gzip=self.path.name.endswith(".gz"),
                                 warc_version="1.1")
        info = {
            "software": f"claimkit {__version__} (warcio; Python {platform.python_version()}; "
                        f"{ssl.OPENSSL_VERSION})",
            "format": "WARC File Format 1.1",
            "conformsTo": "https://iipc.github.io/warc-specifications/specifications/"
                          "warc-format/warc-1.1/",
            "operator": operator or "",
            "description": description,
            "robots": "not consulted: a single page is captured as evidence",
            "http-header-user-agent": "",
        }
        rec = self.writer.create_warcinfo_record(self.path.name, info)
        self.warcinfo_id = rec.rec_headers.get_header("WARC-Record-ID")
        self.writer.write_record(rec)

    def _common(self, uri: str, date: str) -> dict:
        return {"WARC-Target-URI": uri, "WARC-Date": _warc_date(date),
                "WARC-Warcinfo-ID": self.warcinfo_id}

    def exchange(self, ex, *, notes: list[str] | None = None) -> Written:
        """Write the response, request and metadata records of one exchange."""
        head, body = ex.response_head, ex.body_wire
        headers = {**self._common(ex.url, ex.started), "WARC-IP-Address": ex.ip,
                   "WARC-Block-Digest": b32_sha256(head + body),
                   "WARC-Payload-Digest": b32_sha256(body)}
        resp = self.writer.create_warc_record(
            ex.url, "response", payload=io.BytesIO(body), length=len(body),
            warc_headers_dict=headers, http_headers=_WireHeaders(head))
        self.writer.write_record(resp)
        rid = resp.rec_headers.get_header("WARC-Record-ID")
        rhead, rbody = _head_and_body(ex.request)
        req = self.writer.create_warc_record(
            ex.url, "request", payload=io.BytesIO(rbody), length=len(rbody),
            warc_headers_dict={**self._common(ex.url, ex.started), "WARC-Concurrent-To": rid,
                               "WARC-Block-Digest": b32_sha256(ex.request),
                               "WARC-Payload-Digest": b32_sha256(rbody)},
            http_headers=_WireHeaders(rhead))
        self.writer.write_record(req)
        fields = [("fetch-seconds", f"{ex.seconds:.6f}"),
                  ("clock", "system clock of the capturing machine"),
                  ("content-sha256", ex.body_sha256)]
        if ex.tls is not None:
            t = ex.tls
            fields += [("tls-protocol", t.protocol), ("tls-cipher", t.cipher),
                       ("tls-server-name", t.server_name),
                       ("tls-chain-verified",
                        (f"{'yes' if t.verified else f'no ({t.verify_error})'}, "
                        f"against {t.trust_store}"))]
            fields += [("tls-certificate", base64.b64encode(der).decode("ascii"))
                       for der in t.chain_der]
        fields += [("note", n) for n in notes or []]
        self._fields(ex.url, ex.started, fields, concurrent=rid)
        return Written(rid, _warc_date(ex.started))

    def _fields(self, uri: str, date: str, fields: list[tuple[str, str]], *,
                concurrent: str | None) -> None:
        data = "".join(f"{k}: {_one_line(v)}\r\n" for k, v in fields).encode("utf-8")
        headers = {**self._common(uri, date), "WARC-Block-Digest": b32_sha256(data)}
        if concurrent:
            headers["WARC-Concurrent-To"] = concurrent
        rec = self.writer.create_warc_record(uri, "metadata", payload=io.BytesIO(data),
                                             length=len(data), warc_headers_dict=headers,
                                             warc_content_type="application/warc-fields")
        self.writer.write_record(rec)

    def page_notes(self, url: str, date: str, fields: list[tuple[str, str]],
                   concurrent: str) -> None:
        """A metadata record for a page: how each image URL was referenced."""
        self._fields(url, date, fields, concurrent=concurrent)

    def resource(self, uri: str, date: str, data: bytes, media_type: str, *,
                 concurrent: str | None, description: str) -> Written:
        """A ``resource`` record (the page snapshot), tied to the page's response."""
        headers = {**self._common(uri, date), "WARC-Block-Digest": b32_sha256(data),
                   "WARC-Payload-Digest": b32_sha256(data)}
        if concurrent:
            headers["WARC-Concurrent-To"] = concurrent
        rec = self.writer.create_warc_record(uri, "resource", payload=io.BytesIO(data),
                                             length=len(data), warc_headers_dict=headers,
                                             warc_content_type=media_type)
        self.writer.write_record(rec)
        rid = rec.rec_headers.get_header("WARC-Record-ID")
        self._fields(uri, date, [("description", description)], concurrent=rid)
        return Written(rid, _warc_date(date))

    def close(self) -> None:
        self.fh.flush()
        os.fsync(self.fh.fileno())
        self.fh.close()


def _one_line(v: str) -> str:
    return " ".join(str(v).split())


def _warc_date(iso: str) -> str:
    """WARC-Date (W3C-DTF, UTC); WARC/1.1 allows the microseconds utc_now gives."""
    return iso if iso.endswith("Z") else iso + "Z"


# ---------------------------------------------------------------------- reading

@dataclass
class WarcImage:
    """An image response found in a WARC file."""

    warc: str
    record_id: str
    target_uri: str
    date: str
    ip: str | None
    status: int
    media_type: str
    payload: bytes
    facts: dict


def _damaged(path: Path, exc: BaseException) -> InputError:
    return InputError(f"damaged or truncated WARC file ({type(exc).__name__}: "
                      f"{str(exc).strip() or 'no detail'})", path=path)


def _damage_types() -> tuple[type[BaseException], ...]:
    """What warcio raises on damage: a bad gzip member, a short read, a header line it cannot
    parse, a failed digest, an assertion on lengths. All mean "damaged" here."""
    from warcio.exceptions import ArchiveLoadFailed
    from warcio.statusandheaders import StatusAndHeadersParserException

    return (ArchiveLoadFailed, StatusAndHeadersParserException, EOFError, OSError, ValueError,
            IndexError, KeyError, TypeError, AttributeError, AssertionError, zlib.error)


def _content(rec, path: Path) -> bytes:
    """A record's content (de-chunked, decompressed), its digests checked as it is read."""
    try:
        return rec.content_stream().read()
    except _damage_types() as exc:
        raise _damaged(path, exc) from None


def _records(path: Path) -> Iterator[Any]:
    """Every record, every digest checked; InputError on damage."""
    try:
        fh = open(path, "rb")  # noqa: SIM115 - closed by the with below, kept open across yields
    except OSError as exc:
        raise InputError(f"cannot read ({exc.strerror or exc})", path=path) from None
    with fh:
        from warcio.archiveiterator import ArchiveIterator

        it = ArchiveIterator(fh, check_digests="raise")
        count = 0
        try:
            for rec in it:
                if rec.format != "warc":
                    raise InputError("not a WARC file (an ARC file or unknown format)",
                                     path=path)
                # Digests are checked as the record's bytes are read (here, or by the
                # caller); a record cut short is not, so its length is checked too.
                yield rec
                while rec.raw_stream.read(1 << 16):
                    pass
                if getattr(rec.raw_stream, "limit", 0) > 0:
                    raise InputError(
                        f"damaged or truncated WARC file (record "
                        f"{rec.rec_headers.get_header('WARC-Record-ID')} ends "
                        f"{rec.raw_stream.limit} bytes short of its Content-Length)", path=path)
                count += 1
        except InputError:
            raise
        except _damage_types() as exc:
            raise _damaged(path, exc) from None
        if count == 0:
            raise InputError("no WARC record in the file", path=path)


def image_responses(path: str | os.PathLike) -> Iterator[WarcImage]:
    """Every successful image response of a WARC file (plain or gzip), in file order.

    An image is a 2xx response whose Content-Type is ``image/*`` or whose
    content starts like a JPEG, PNG, GIF, TIFF, BMP or WebP file. The content
    is the payload after removing chunked transfer coding and gzip/deflate
    content coding (warcio's ``content_stream``).
    """
    path = Path(path)
    for rec in _records(path):
        if rec.rec_type != "response" or rec.http_headers is None:
            continue
        try:
            status = int(rec.http_headers.get_statuscode() or 0)
        except ValueError:
            status = 0
        data = _content(rec, path)
        if not 200 <= status < 300:
            continue
        media = (rec.http_headers.get_header("Content-Type") or "").split(";")[0].strip().lower()
        if not (media.startswith("image/") or looks_like_image(data)):
            continue
        h = rec.rec_headers
        yield WarcImage(warc=str(path), record_id=h.get_header("WARC-Record-ID"),
                        target_uri=h.get_header("WARC-Target-URI") or "",
                        date=h.get_header("WARC-Date") or "",
                        ip=h.get_header("WARC-IP-Address"), status=status,
                        media_type=media, payload=data,
                        facts=exchange_facts(status, rec.http_headers.get_header,
                                             h.get_header("WARC-IP-Address")))


def record_payload(path: str | os.PathLike, record_id: str) -> tuple[dict, bytes]:
    """The WARC headers and content of the record with ``record_id`` (digests checked)."""
    path = Path(path)
    for rec in _records(path):
        if rec.rec_headers.get_header("WARC-Record-ID") == record_id:
            return dict(rec.rec_headers.headers), _content(rec, path)
    raise InputError(f"no record {record_id} in the WARC file", path=path)
