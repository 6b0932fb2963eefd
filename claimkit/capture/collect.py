"""``claimkit case capture``: take pages and their images into a case as a WARC file.

What happens, in order, and why:

1. every page URL is fetched (redirects followed within a limit); each
   exchange goes into a new WARC/1.1 file as it happens, with the address
   connected to, and for HTTPS the TLS facts and the certificate chain;
2. the images the page references are fetched the same way; their SHA-256
   is taken at download (``Exchange.body_sha256``);
3. a full-page snapshot is drawn by headless Chromium where installed and
   stored beside the WARC and in it (a ``resource`` record);
4. the WARC file is closed and hashed; with a timestamp authority its digest
   is stamped (RFC 3161) at once, which bounds the capture time by a clock
   that is not the owner's;
5. only then is anything put in the case: the WARC, the snapshots, the
   token and the capture record go to ``captures/``, the custody log records
   the capture, and every image becomes an exhibit whose intake record names
   its URL, its page, its WARC record and the capture time.

Any failure before step 5 (an unreachable host, a refused connection, a
timeout, a redirect loop, a page that is neither HTML nor an image, a
response over the size limit, an image URL that answers with HTML, a refused
timestamp) leaves the case and the custody log exactly as they were: the
work folder is hidden (``.cap-*.part``) and removed.
"""

from __future__ import annotations

import io
import os
import re
import shutil
from dataclasses import dataclass, field
from pathlib import Path
from urllib.parse import unquote, urlsplit

from claimkit import __version__
from claimkit.capture import fetch as _fetch
from claimkit.capture import snapshot as snap
from claimkit.capture.pagescan import MAX_STYLESHEETS, css_images, find_images
from claimkit.capture.warc import WarcWriter, exchange_facts, looks_like_image
from claimkit.case.layout import CAPTURES
from claimkit.case.store import add_exhibit
from claimkit.errors import InputError
from claimkit.evidence import timestamp
from claimkit.evidence.canonical import canonical_json
from claimkit.evidence.custodylog import utc_now
from claimkit.evidence.storage import atomic_write, fsync_dir, sha256_file, sha256_hex
from claimkit.workflow import MIN_EXAMINE_SIDE

__all__ = ["CaptureResult", "capture_pages", "tls_summary"]

CAPTURE_TYPE = "claimkit/capture/v1"
CLOCK = "system clock of the capturing machine (WARC-Date)"
_SAFE = re.compile(r"[^A-Za-z0-9._-]+")
_HTML_TYPES = ("text/html", "application/xhtml+xml")


@dataclass
class CaptureResult:
    capture_id: str
    warc: Path
    warc_sha256: str
    record: dict
    exhibit_ids: list[str] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)

    def as_dict(self) -> dict:
        tok = self.record.get("timestamp")
        return {"capture_id": self.capture_id, "warc": str(self.warc),
                "warc_sha256": self.warc_sha256,
                "token": None if tok is None else {
                    "file": tok["token_file"], "sha256": tok["token_sha256"],
                    "gen_time": tok["gen_time"], "tsa": tok["tsa"]},
                "exhibits": self.exhibit_ids,
                "snapshots": [p["snapshot"] for p in self.record["pages"]
                              if p.get("snapshot")],
                "notes": self.notes}


def tls_summary(tls) -> dict | None:
    """Subject, issuer and validity of the server certificate, and the chain's hashes."""
    if tls is None:
        return None
    import hashlib

    from cryptography import x509

    out = {"protocol": tls.protocol, "cipher": tls.cipher, "server_name": tls.server_name,
           "chain_verified": tls.verified, "verify_error": tls.verify_error,
           "trust_store": tls.trust_store,
           "chain_sha256": [hashlib.sha256(d).hexdigest() for d in tls.chain_der]}
    if tls.chain_der:
        try:
            leaf = x509.load_der_x509_certificate(tls.chain_der[0])
            out.update(subject=leaf.subject.rfc4514_string(),
                       issuer=leaf.issuer.rfc4514_string(),
                       not_before=leaf.not_valid_before_utc.strftime("%Y-%m-%dT%H:%M:%SZ"),
                       not_after=leaf.not_valid_after_utc.strftime("%Y-%m-%dT%H:%M:%SZ"),
                       serial=format(leaf.serial_number, "x"))
        except ValueError as exc:
            out["certificate_error"] = f"the server certificate does not parse ({exc})"
    return out


def _is_html(ex: _fetch.Exchange) -> bool:
    if ex.media_type in _HTML_TYPES:
        return True
    head = ex.body[:512].lstrip().lower()
    return not ex.media_type and head.startswith((b"<!doctype html", b"<html"))


def _is_image(ex: _fetch.Exchange) -> bool:
    return ex.media_type.startswith("image/") or looks_like_image(ex.body)


def _decode_html(ex: _fetch.Exchange) -> str:
    m = re.search(r"charset=([\w.:-]+)", ex.header("Content-Type") or "", re.IGNORECASE)
    if m is not None:
        charset = m.group(1)
    else:
        mb = re.search(rb"<meta[^>]+charset=[\"']?([\w.:-]+)", ex.body[:2048], re.IGNORECASE)
        charset = mb.group(1).decode("ascii", "replace") if mb else "utf-8"
    try:
        return ex.body.decode(charset, "replace")
    except LookupError:
        return ex.body.decode("utf-8", "replace")


def _unusable(data: bytes) -> str | None:
    """None when the bytes are a picture claimkit can examine, else why not."""
    from PIL import Image, UnidentifiedImageError


    try:
        with Image.open(io.BytesIO(data)) as im:
            w, h = im.size
    except (UnidentifiedImageError, OSError, ValueError) as exc:
        return f"not an image claimkit can read: {str(exc) or type(exc).__name__}"
    if min(w, h) < MIN_EXAMINE_SIDE:
        # Icons, spacers and thumbnails this small cannot carry a readable mark.
        return f"{w} x {h} pixels, below the {MIN_EXAMINE_SIDE} pixels an examination needs"
    return None


def _file_name(url: str, index: int, media: str) -> str:
    name = unquote(Path(urlsplit(url).path).name) or "image"
    name = _SAFE.sub("_", name)[-60:].strip("._") or "image"
    if "." not in name:
        ext = {"image/jpeg": ".jpg", "image/png": ".png", "image/gif": ".gif",
               "image/webp": ".webp", "image/tiff": ".tif", "image/bmp": ".bmp"}.get(media, "")
        name += ext
    return f"{index:03d}-{name}"


@dataclass
class _Found:
    url: str
    page: str
    page_final: str
    how: list[str]
    chain: list[_fetch.Exchange]
    record_id: str
    record_date: str


class _Session:
    def __init__(self, work: Path, capture_id: str, opts: _fetch.FetchOptions, operator: str,
                 urls: list[str], notice):
        self.work = work
        self.opts = opts
        self.notice = notice
        self.notes: list[str] = []
        self.warc_name = f"{capture_id}.warc.gz"
        self.warc = WarcWriter(work / self.warc_name, operator=operator,
                               description="claimkit case capture of " + " ".join(urls))
        self.written: dict[int, tuple[str, str]] = {}
        self.images: dict[str, _Found] = {}
        self.pages: list[dict] = []
        self.exchanges: list[dict] = []

    def note(self, text: str) -> None:
        self.notes.append(text)
        self.notice(f"claimkit: note: {text}")

    def _record(self, ex: _fetch.Exchange, notes: list[str] | None = None) -> None:
        w = self.warc.exchange(ex, notes=notes)
        self.written[id(ex)] = (w.record_id, w.date)
        self.exchanges.append({"url": ex.url, "record_id": w.record_id, "date": w.date,
                               **exchange_facts(ex.status, ex.header, ex.ip),
                               "content_sha256": ex.body_sha256, "bytes": len(ex.body),
                               "tls": tls_summary(ex.tls)})

    def get(self, url: str) -> list[_fetch.Exchange]:
        return _fetch.fetch_following(url, self.opts, record=self._record)

    def page(self, url: str, snapshot: bool) -> None:
        chain = self.get(url)
        final = chain[-1]
        rid, date = self.written[id(final)]
        page = {"url": url, "final_url": final.url, "record_id": rid, "date": date,
                "redirects": [e.url for e in chain[:-1]], "images": [],
                **exchange_facts(final.status, final.header, final.ip),
                "tls": tls_summary(final.tls), "snapshot": None}
        self.pages.append(page)
        if not 200 <= final.status < 300:
            raise InputError(f"the page answered HTTP {final.status} {final.reason}", path=url)
        if _is_image(final) and not _is_html(final):
            # A direct image URL: the image is its own page.
            self._take_image(url, url, final.url, ["direct URL"], chain)
            page["images"].append(url)
            return
        if not _is_html(final):
            raise InputError(f"not an HTML page or an image (Content-Type "
                             f"{final.media_type or 'missing'})", path=url)
        sheets: list[str] = []
        refs, skipped = find_images(_decode_html(final), final.url, sheets)
        for n in skipped:
            self.note(f"{url}: {n}")
        refs += self._stylesheet_images(url, sheets, {r.url for r in refs})
        fields = [("page", final.url)]
        fields += [("image-reference", f"{r.url} ({'; '.join(r.how)})") for r in refs]
        self.warc.page_notes(final.url, final.started, fields, concurrent=rid)
        for ref in refs:
            page["images"].append(ref.url)
            if ref.url in self.images:
                continue
            self._take_image(ref.url, url, final.url, ref.how, self.get(ref.url))
        if snapshot:
            self._snapshot(page, final.url, rid)

    def _stylesheet_images(self, page: str, sheets: list[str], known: set[str]) -> list:
        """Background images named in the page's linked stylesheets (fetched and kept too)."""

        if len(sheets) > MAX_STYLESHEETS:
            self.note(f"{page}: {len(sheets)} stylesheets; the first {MAX_STYLESHEETS} are "
                      "read for background images")
        out = []
        for sheet in sheets[:MAX_STYLESHEETS]:
            final = self.get(sheet)[-1]
            if not 200 <= final.status < 300:
                self.note(f"{sheet}: stylesheet answered HTTP {final.status}; kept in the WARC")
                continue
            css = final.body.decode("utf-8", "replace")
            for ref in css_images(css, final.url):
                if ref.url not in known:
                    known.add(ref.url)
                    out.append(ref)
        return out

    def _take_image(self, url: str, page: str, page_final: str, how: list[str],
                    chain: list[_fetch.Exchange]) -> None:
        final = chain[-1]
        if not 200 <= final.status < 300:
            self.note(f"{url}: HTTP {final.status} {final.reason}; kept in the WARC, "
                      "not taken in as an exhibit")
            return
        if _is_html(final):
            raise InputError(f"the image URL answers with an HTML page (Content-Type "
                             f"{final.media_type or 'missing'}), not an image; referenced by "
                             f"{page} as {', '.join(how)}", path=url)
        why = _unusable(final.body)
        if why is not None:
            self.note(f"{url}: not taken in ({why}; Content-Type "
                      f"{final.media_type or 'missing'}); kept in the WARC only")
            return
        rid, date = self.written[id(final)]
        self.images[url] = _Found(url, page, page_final, how, chain, rid, date)

    def _snapshot(self, page: dict, url: str, rid: str) -> None:

        if snap.chromium_path() is None:
            if not getattr(self, "_said_no_chromium", False):
                self.note("no page snapshot: Chromium is not installed "
                          "(Debian: apt-get install chromium)")
                self._said_no_chromium = True
            page["snapshot_note"] = "Chromium not installed"
            return
        try:
            shot = snap.take_snapshot(url, timeout=max(30.0, 2 * self.opts.timeout))
        except snap.SnapshotFailed as exc:
            self.note(f"{url}: no page snapshot ({exc})")
            page["snapshot_note"] = str(exc)
            return
        name = f"{self.warc_name.split('.')[0]}-page{len(self.pages)}.png"
        (self.work / name).write_bytes(shot.png)
        desc = (f"full-page rendering of {url} by {shot.browser} (headless), {shot.width} x "
                f"{shot.height} CSS px, loaded at {shot.taken} (system clock); a second load "
                "of the page, whose requests are not in this file"
                + ("; the page was longer and is cut" if shot.cut else ""))
        w = self.warc.resource(f"urn:claimkit:page-snapshot:{url}", shot.taken, shot.png,
                               "image/png", concurrent=rid, description=desc)
        import hashlib

        page["snapshot"] = {"file": f"{CAPTURES}/{name}",
                            "sha256": hashlib.sha256(shot.png).hexdigest(),
                            "record_id": w.record_id, "browser": shot.browser,
                            "taken": shot.taken, "time_source": "system clock",
                            "width": shot.width, "height": shot.height,
                            "page_height": shot.page_height, "cut": shot.cut}


def _stamp(warc_sha: str, tsa_url: str, tsa_cert: Path, work: Path, capture_id: str) -> dict:

    try:
        pem = Path(tsa_cert).read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read ({exc.strerror or exc})", path=tsa_cert) from None
    trusted = timestamp.load_certificates(pem, path=tsa_cert)
    digest = bytes.fromhex(warc_sha)
    tsq, nonce = timestamp.build_request(digest)
    tsr = timestamp.send_request(tsa_url, tsq)
    info = timestamp.check_response(tsr, digest=digest, nonce=nonce, trusted=trusted,
                                    path=tsa_url)
    names = {"token": f"{capture_id}.tst", "request": f"{capture_id}.tsq",
             "certs": f"{capture_id}.tsa.pem"}
    (work / names["token"]).write_bytes(info.token_der)
    (work / names["request"]).write_bytes(tsq)
    (work / names["certs"]).write_bytes(pem)
    return {"standard": "RFC 3161", "covers": "SHA-256 of the WARC file",
            "token_file": f"{CAPTURES}/{names['token']}",
            "token_sha256": sha256_hex(info.token_der),
            "request_file": f"{CAPTURES}/{names['request']}", "nonce": str(nonce),
            "tsa_certificates_file": f"{CAPTURES}/{names['certs']}",
            "gen_time": info.gen_time_iso, "tsa": info.tsa_name or info.signer_subject,
            "tsa_url": tsa_url, "serial": str(info.serial_number), "policy": info.policy}


def capture_pages(case, urls: list[str], profile, *, tsa_url: str | None = None,
                  tsa_cert: str | os.PathLike | None = None,
                  options: _fetch.FetchOptions | None = None, snapshot: bool = True,
                  notice=None) -> CaptureResult:
    """Capture ``urls`` and their images into ``case`` (module notes give the steps).

    Parameters
    ----------
    case : Case
    urls : list of str
        Pages (or direct image URLs), http or https.
    profile : Profile
        Opened with the passphrase (the capture and each intake are logged).
    tsa_url, tsa_cert : optional
        A timestamp authority and the certificate(s) to trust for it; both or neither.
    options : FetchOptions, optional
        Time limit, size limit, redirect limit, extra trusted CA file.
    snapshot : bool
        Draw a full-page snapshot with Chromium where installed.
    notice : callable, optional
        Receives one-line notes (default: print to stderr).

    Raises
    ------
    InputError
        Naming the URL or file and the cause; nothing is written to the case.
    """
    import sys


    if not urls:
        raise InputError("no URL to capture")
    if (tsa_url is None) != (tsa_cert is None):
        raise InputError("--tsa-url and --tsa-cert go together")
    for u in urls:
        _fetch.check_url(u)
    opts = options or _fetch.FetchOptions()
    notice = notice or (lambda line: print(line, file=sys.stderr, flush=True))
    started = utc_now()
    capture_id = f"cap-{started[:19].replace('-', '').replace(':', '')}Z-{os.urandom(3).hex()}"
    work = case.root / f".{capture_id}.part"
    work.mkdir()
    try:
        s = _Session(work, capture_id, opts, profile.owner, urls, notice)
        try:
            for u in urls:
                s.page(u, snapshot)
        finally:
            s.warc.close()
        finished = utc_now()
        warc_sha = sha256_file(work / s.warc_name)
        stamp = (_stamp(warc_sha, tsa_url, Path(tsa_cert), work, capture_id)
                 if tsa_url and tsa_cert is not None else None)
        record = {
            "type": CAPTURE_TYPE, "capture_id": capture_id, "case_id": case.case_id,
            "software": f"claimkit {__version__}", "operator": profile.owner,
            "started": started, "finished": finished, "time_source": "system clock",
            "urls": urls,
            "warc": {"file": f"{CAPTURES}/{s.warc_name}", "sha256": warc_sha,
                     "size": (work / s.warc_name).stat().st_size, "format": "WARC/1.1",
                     "written_with": "warcio"},
            "timestamp": stamp, "pages": s.pages, "exchanges": s.exchanges,
            "limits": {"timeout_s": opts.timeout, "max_bytes": opts.max_bytes,
                       "max_redirects": opts.max_redirects},
            "notes": s.notes,
        }
        data = canonical_json(record) + b"\n"
        dest = case.root / CAPTURES
        dest.mkdir(exist_ok=True)
        # Commit: from here on the case changes (the files first, then the log).
        for f in sorted(work.iterdir()):
            if f.is_file():
                os.chmod(f, 0o444)
                os.replace(f, dest / f.name)
        atomic_write(dest / f"{capture_id}.json", data)
        fsync_dir(dest)
        items = {"warc": warc_sha, "capture_record": sha256_hex(data)}
        if stamp:
            items["timestamp_token"] = stamp["token_sha256"]
        for i, p in enumerate(s.pages, 1):
            if p.get("snapshot"):
                items[f"snapshot_{i}"] = p["snapshot"]["sha256"]
        profile.log_action("web pages captured", items=items, details={
            "case_id": case.case_id, "capture_id": capture_id, "urls": urls,
            "images": len(s.images), "warc": record["warc"]["file"],
            "time_source": "system clock", "timestamp": stamp["gen_time"] if stamp else None})
        result = CaptureResult(capture_id, dest / s.warc_name, warc_sha, record,
                               notes=s.notes)
        known = {ex.sha256: ex.exhibit_id for ex in case.exhibits()}
        for n, img in enumerate(s.images.values(), 1):
            final = img.chain[-1]
            if final.body_sha256 in known:
                s.note(f"{img.url}: same bytes as exhibit {known[final.body_sha256]}; "
                       "not taken in twice (the WARC holds this capture too)")
                continue
            folder = work / f"{n:03d}"
            folder.mkdir()
            tmp = folder / _file_name(final.url, n, final.media_type)[4:]
            tmp.write_bytes(final.body)
            acq = {
                "method": "claimkit web capture", "capture_id": capture_id,
                "capture_record": f"{CAPTURES}/{capture_id}.json",
                "url": img.url, "final_url": final.url,
                "redirects": [e.url for e in img.chain[:-1]],
                "page": img.page, "page_final": img.page_final, "referenced_as": img.how,
                "warc": record["warc"]["file"], "warc_sha256": warc_sha,
                "warc_record_id": img.record_id, "captured": img.record_date,
                "time_source": CLOCK, "payload_sha256": final.body_sha256,
                **exchange_facts(final.status, final.header, final.ip),
                "tls": tls_summary(final.tls),
                "timestamp": None if stamp is None else {
                    "gen_time": stamp["gen_time"], "tsa": stamp["tsa"],
                    "token_file": stamp["token_file"]},
            }
            ex = add_exhibit(case, tmp, source=f"{img.url} (image on the page {img.page})",
                             note=f"captured by claimkit {capture_id}", profile=profile,
                             acquisition=acq)
            if ex.sha256 != final.body_sha256:    # the bytes changed between download and intake
                raise InputError(f"exhibit {ex.exhibit_id} differs from the bytes downloaded",
                                 path=img.url)
            known[ex.sha256] = ex.exhibit_id
            result.exhibit_ids.append(ex.exhibit_id)
        return result
    finally:
        shutil.rmtree(work, ignore_errors=True)
