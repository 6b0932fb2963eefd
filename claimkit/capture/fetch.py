"""One HTTP exchange at a time, with everything an examiner asks about it kept.

Why not ``urllib``: it hides the socket, so the address actually connected
to, the TLS protocol and the certificate chain the server presented are
lost, and it re-frames what was sent and received. Here the socket is ours:
the request is written as bytes we composed (and keep), and every byte read
back passes through :class:`_Tee`, so the WARC record holds the response as
it came over the wire (RFC 9112 framing, chunked encoding included) while
:mod:`http.client` does the parsing.

A certificate that does not verify against the trust store does not stop a
capture (an infringing shop may well run a self-signed certificate); the
exchange records that it did not verify, and why, and the chain as sent.

References
----------
R. Fielding, M. Nottingham, J. Reschke, "HTTP/1.1", RFC 9112, 2022.
doi:10.17487/RFC9112
E. Rescorla, "The Transport Layer Security (TLS) Protocol Version 1.3", RFC 8446, 2018.
"""

from __future__ import annotations

import gzip
import hashlib
import http.client
import importlib
import io
import re
import socket
import ssl
import time
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import quote, urljoin, urlsplit

from claimkit import __version__
from claimkit.errors import InputError
from claimkit.evidence.custodylog import utc_now

__all__ = [
    "DEFAULT_MAX_BYTES",
    "DEFAULT_MAX_REDIRECTS",
    "DEFAULT_TIMEOUT",
    "Exchange",
    "FetchOptions",
    "TlsFacts",
    "check_url",
    "fetch",
    "fetch_following",
]

DEFAULT_TIMEOUT = 30.0
DEFAULT_MAX_BYTES = 50 << 20
DEFAULT_MAX_REDIRECTS = 10
USER_AGENT = f"claimkit/{__version__} (evidence capture of a single page)"
_REDIRECTS = (301, 302, 303, 307, 308)


@dataclass
class FetchOptions:
    """Limits and trust for a capture."""

    timeout: float = DEFAULT_TIMEOUT
    max_bytes: int = DEFAULT_MAX_BYTES
    max_redirects: int = DEFAULT_MAX_REDIRECTS
    ca_file: str | None = None
    user_agent: str = USER_AGENT


@dataclass
class TlsFacts:
    """What the TLS handshake showed: protocol, cipher, the chain as sent, and trust."""

    protocol: str
    cipher: str
    chain_der: list[bytes]
    verified: bool
    verify_error: str | None
    server_name: str
    trust_store: str


@dataclass
class Exchange:
    """One request and its response, as sent and as received."""

    url: str
    started: str                 # UTC, ISO 8601 with microseconds (system clock)
    request: bytes               # the request bytes written to the socket
    response_head: bytes         # status line and header fields, as received
    body_wire: bytes             # the message body as received (framing included)
    body: bytes                  # the content after removing transfer/content codings
    status: int
    reason: str
    version: str
    headers: list[tuple[str, str]]
    ip: str
    port: int
    seconds: float
    tls: TlsFacts | None = None
    body_sha256: str = field(init=False)

    def __post_init__(self) -> None:
        # Taken at download, before anything else touches the bytes.
        self.body_sha256 = hashlib.sha256(self.body).hexdigest()

    def header(self, name: str) -> str | None:
        name = name.lower()
        for k, v in self.headers:
            if k.lower() == name:
                return v
        return None

    @property
    def media_type(self) -> str:
        return (self.header("Content-Type") or "").split(";")[0].strip().lower()

    @property
    def is_redirect(self) -> bool:
        return self.status in _REDIRECTS and bool(self.header("Location"))


class _TooLarge(Exception):
    pass


class _Tee(io.RawIOBase):
    """Reads from the socket file, keeps every byte, enforces a size limit and a deadline."""

    def __init__(self, raw, limit: int, deadline: float):
        self.raw = raw
        self.kept = bytearray()
        self.limit = limit
        self.deadline = deadline

    def readable(self) -> bool:
        return True

    def readinto(self, b) -> int:
        if time.monotonic() > self.deadline:
            raise TimeoutError("the whole exchange took longer than the time limit")
        n = self.raw.readinto(b)
        if n:
            self.kept += memoryview(b)[:n]
            if len(self.kept) > self.limit:
                raise _TooLarge()
        return n or 0


class _SockShim:
    """What :class:`http.client.HTTPResponse` needs of a socket: a file to read from."""

    def __init__(self, fp):
        self.fp = fp

    def makefile(self, mode: str, *args, **kw):
        return self.fp


def check_url(url: str) -> tuple[str, str, int, str]:
    """(scheme, host, port, request target) of an http(s) URL, or InputError naming the URL."""
    try:
        parts = urlsplit(url)
        port = parts.port
    except ValueError as exc:
        raise InputError(f"not a valid URL ({exc})", path=url) from None
    scheme = parts.scheme.lower()
    if scheme not in ("http", "https"):
        raise InputError(f"scheme {scheme or '(none)'!r} is not captured: only http and https",
                         path=url)
    host = parts.hostname
    if not host:
        raise InputError("the URL names no host", path=url)
    if port is None:
        port = 443 if scheme == "https" else 80
    target = parts.path or "/"
    if parts.query:
        target += "?" + parts.query
    # As a browser does (WHATWG URL): tabs and line breaks dropped, spaces and non-ASCII
    # percent-encoded (UTF-8), escapes already present kept; the request line stays ASCII.
    target = quote(re.sub(r"[\t\r\n]", "", target), safe="/%?=&;:@!$'()*+,~-._[]")
    try:
        host.encode("idna")
    except UnicodeError:
        raise InputError(f"host name {host!r} is not valid", path=url) from None
    return scheme, host, port, target


def _connect(host: str, port: int, timeout: float, url: str) -> tuple[socket.socket, str]:
    try:
        infos = socket.getaddrinfo(host, port, type=socket.SOCK_STREAM)
    except (socket.gaierror, UnicodeError) as exc:
        raise InputError(f"cannot resolve host {host!r} ({exc})", path=url) from None
    last: Exception | None = None
    for family, kind, proto, _name, addr in infos:
        sock = socket.socket(family, kind, proto)
        sock.settimeout(timeout)
        try:
            sock.connect(addr)
            return sock, str(addr[0])
        except OSError as exc:
            sock.close()
            last = exc
    if isinstance(last, ConnectionRefusedError):
        raise InputError(f"connection refused by {host} port {port}", path=url)
    if isinstance(last, (TimeoutError, socket.timeout)):
        raise InputError(f"no connection to {host} port {port} within {timeout:g} s "
                         "(timed out)", path=url)
    raise InputError(f"host {host} port {port} unreachable ({last})", path=url)


def _chain(ssock: ssl.SSLSocket) -> list[bytes]:
    obj: Any = getattr(ssock, "_sslobj", None)
    try:
        # Python 3.10-3.12 keep the chain as sent behind _sslobj; 3.13 made it public.
        getter = getattr(ssock, "get_unverified_chain", None) or obj.get_unverified_chain
        certs = getter() or []
        der = importlib.import_module("_ssl").ENCODING_DER   # no public name for it
        return [c if isinstance(c, bytes) else c.public_bytes(der) for c in certs]
    except (AttributeError, ValueError):
        leaf = ssock.getpeercert(binary_form=True)
        return [leaf] if leaf else []


def _tls(sock_factory, host: str, opts: FetchOptions, url: str):
    """Handshake with verification; if the chain does not verify, again without, saying so."""
    ctx = ssl.create_default_context(cafile=opts.ca_file)
    sock, ip = sock_factory()
    try:
        ssock = ctx.wrap_socket(sock, server_hostname=host)
        verified, why = True, None
    except ssl.SSLCertVerificationError as exc:
        sock.close()
        why = exc.verify_message or str(exc)
        loose = ssl.create_default_context()
        loose.check_hostname = False
        loose.verify_mode = ssl.CERT_NONE
        sock, ip = sock_factory()
        try:
            ssock = loose.wrap_socket(sock, server_hostname=host)
        except (ssl.SSLError, OSError) as exc2:
            sock.close()
            raise InputError(f"TLS handshake with {host} failed ({exc2})", path=url) from None
        verified = False
    except (ssl.SSLError, OSError) as exc:
        sock.close()
        if isinstance(exc, (TimeoutError, socket.timeout)):
            raise InputError(f"TLS handshake with {host} timed out", path=url) from None
        raise InputError(f"TLS handshake with {host} failed ({exc})", path=url) from None
    cipher = ssock.cipher()
    store = (f"the CA file {Path(opts.ca_file).name} (SHA-256 "
             f"{hashlib.sha256(Path(opts.ca_file).read_bytes()).hexdigest()[:16]}...)"
             if opts.ca_file else f"the system's trust store ({ssl.OPENSSL_VERSION})")
    facts = TlsFacts(protocol=ssock.version() or "unknown", cipher=cipher[0] if cipher else "",
                     chain_der=_chain(ssock), verified=verified, verify_error=why,
                     server_name=host, trust_store=store)
    return ssock, ip, facts


def _decode_content(body: bytes, coding: str | None, url: str) -> bytes:
    coding = (coding or "").strip().lower()
    try:
        if coding in ("", "identity"):
            return body
        if coding in ("gzip", "x-gzip"):
            return gzip.decompress(body)
        if coding == "deflate":
            try:
                return zlib.decompress(body)
            except zlib.error:
                return zlib.decompress(body, -zlib.MAX_WBITS)
    except (OSError, EOFError, zlib.error) as exc:
        raise InputError(f"the {coding} content coding is damaged ({exc})", path=url) from None
    raise InputError(f"the server used content coding {coding!r}, which claimkit does not "
                     "decode", path=url)


def fetch(url: str, opts: FetchOptions | None = None) -> Exchange:
    """GET ``url`` once (no redirect followed).

    Raises
    ------
    InputError
        Naming the URL and the cause: bad scheme, unresolvable or unreachable
        host, refused connection, timeout, TLS failure, a response over the
        size limit or not HTTP.
    """

    opts = opts or FetchOptions()
    scheme, host, port, target = check_url(url)
    host_ascii = host.encode("idna").decode("ascii") if not host.isascii() else host
    hostport = host_ascii if port == (443 if scheme == "https" else 80) else f"{host_ascii}:{port}"
    if ":" in host and not hostport.startswith("["):
        hostport = f"[{host}]" if port in (80, 443) else f"[{host}]:{port}"
    request = (f"GET {target} HTTP/1.1\r\nHost: {hostport}\r\n"
               f"User-Agent: {opts.user_agent}\r\nAccept: */*\r\n"
               "Accept-Encoding: identity\r\nConnection: close\r\n\r\n").encode("ascii", "strict")
    started = utc_now()
    t0 = time.monotonic()

    def plain():
        return _connect(host, port, opts.timeout, url)

    tls = None
    if scheme == "https":
        sock, ip, tls = _tls(plain, host, opts, url)
    else:
        sock, ip = plain()
    try:
        sock.sendall(request)
        tee = _Tee(sock.makefile("rb", buffering=0), opts.max_bytes + (64 << 10),
                   t0 + 4 * opts.timeout)
        shim: Any = _SockShim(io.BufferedReader(tee, 1 << 16))
        resp = http.client.HTTPResponse(shim, method="GET")
        resp.begin()
        # The buffered reader may have read past the head; find its end in what was kept.
        end = bytes(tee.kept).find(b"\r\n\r\n")
        end = end + 4 if end >= 0 else bytes(tee.kept).find(b"\n\n") + 2
        body = resp.read()
        raw = bytes(tee.kept)
    except _TooLarge:
        raise InputError(f"the response is larger than the limit of {opts.max_bytes} bytes "
                         "(raise it with --max-bytes)", path=url) from None
    except TimeoutError:
        raise InputError(f"no complete answer within the time limit ({opts.timeout:g} s per "
                         "read)", path=url) from None
    except (http.client.HTTPException, ValueError) as exc:
        raise InputError(f"the server's answer is not valid HTTP ({type(exc).__name__}: "
                         f"{exc})", path=url) from None
    except OSError as exc:
        raise InputError(f"the connection failed during the exchange ({exc})", path=url) from None
    finally:
        sock.close()
    if len(body) > opts.max_bytes:
        raise InputError(f"the response is larger than the limit of {opts.max_bytes} bytes "
                         "(raise it with --max-bytes)", path=url)
    headers = [(k, v) for k, v in resp.msg.items()]
    content = _decode_content(body, resp.msg.get("Content-Encoding"), url)
    return Exchange(url=url, started=started, request=request, response_head=raw[:end],
                    body_wire=raw[end:], body=content, status=resp.status,
                    reason=resp.reason or "", version="HTTP/1.1" if resp.version == 11
                    else "HTTP/1.0", headers=headers, ip=ip, port=port,
                    seconds=time.monotonic() - t0, tls=tls)


def fetch_following(url: str, opts: FetchOptions | None = None,
                    record=None) -> list[Exchange]:
    """GET ``url`` and follow redirects within ``opts.max_redirects``.

    ``record`` (optional) is called with each exchange as soon as it is made,
    so the WARC holds the redirects even when a later step fails.

    Returns
    -------
    list of Exchange
        Every exchange in order; the last is the final answer.
    """
    opts = opts or FetchOptions()
    seen = [url]
    out: list[Exchange] = []
    current = url
    while True:
        ex = fetch(current, opts)
        out.append(ex)
        if record is not None:
            record(ex)
        if not ex.is_redirect:
            return out
        nxt = urljoin(current, (ex.header("Location") or "").strip()).split("#", 1)[0]
        if nxt in seen:
            hops = " -> ".join([*seen[seen.index(nxt):], nxt])
            raise InputError(f"redirect loop ({hops})", path=url)
        if len(seen) > opts.max_redirects:
            raise InputError(f"more than {opts.max_redirects} redirects", path=url)
        check_url(nxt)
        seen.append(nxt)
        current = nxt
