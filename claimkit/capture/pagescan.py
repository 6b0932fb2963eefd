"""Which images a page shows: every image URL an HTML document references, and how.

Read with the standard library's tolerant HTML tokenizer; each reference keeps
the way it was found (``img src``, ``img srcset``, ``picture source srcset``,
``og:image`` ...), which the WARC's metadata record and the dossier repeat, so
an examiner can see why a file was fetched. ``srcset`` is split as the HTML
standard's "parse a srcset attribute" algorithm does (a URL is a run of
non-space characters; trailing commas end a candidate; descriptors run to
the next comma outside parentheses).

References
----------
WHATWG, HTML Living Standard, 4.8.4.3 "Parsing a srcset attribute" and
4.2.3 "The base element"; The Open Graph protocol, ogp.me ("og:image").
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field
from html.parser import HTMLParser
from urllib.parse import urljoin, urlsplit

__all__ = ["MAX_STYLESHEETS", "ImageRef", "css_images", "find_images", "parse_srcset"]

#: Linked stylesheets read for background images, per page (a bound on what one page costs).
MAX_STYLESHEETS = 10

_META_IMAGES = {"og:image", "og:image:url", "og:image:secure_url", "twitter:image",
                "twitter:image:src"}
_LAZY = ("data-src", "data-original", "data-lazy-src")
_BACKGROUND = re.compile(r"background(?:-image)?\s*:([^;}]*)", re.IGNORECASE)
_CSS_URL = re.compile(r"""url\(\s*(?:"([^"]*)"|'([^']*)'|([^)\s]*))\s*\)""", re.IGNORECASE)


@dataclass
class ImageRef:
    """One image URL (absolute, no fragment) and every way the page referenced it."""

    url: str
    how: list[str] = field(default_factory=list)


def parse_srcset(value: str) -> list[str]:
    """The URLs of a ``srcset`` attribute, in order (descriptors dropped)."""
    out: list[str] = []
    i, n = 0, len(value)
    while i < n:
        while i < n and (value[i].isspace() or value[i] == ","):
            i += 1
        start = i
        while i < n and not value[i].isspace():
            i += 1
        url = value[start:i]
        if not url:
            break
        if url.endswith(","):
            out.append(url.rstrip(","))
            continue
        out.append(url)
        depth = 0
        while i < n:          # skip descriptors up to a comma outside parentheses
            c = value[i]
            if c == "(":
                depth += 1
            elif c == ")":
                depth = max(0, depth - 1)
            elif c == "," and depth == 0:
                i += 1
                break
            i += 1
    return out


def _css_urls(css: str) -> list[str]:
    urls = []
    for decl in _BACKGROUND.findall(css):
        for m in _CSS_URL.finditer(decl):
            u = next(g for g in m.groups() if g is not None)
            if u:
                urls.append(u)
    return urls


class _Collector(HTMLParser):
    def __init__(self, base: str):
        super().__init__(convert_charrefs=True)
        self.base = base
        self.base_set = False
        self.found: list[tuple[str, str]] = []
        self.picture = 0
        self.in_style = False
        self.sheets: list[str] = []

    def _add(self, raw: str | None, how: str) -> None:
        if raw and raw.strip():
            self.found.append((raw.strip(), how))

    def handle_starttag(self, tag, attrs):
        a = {k.lower(): (v or "") for k, v in attrs}
        if tag == "base" and a.get("href") and not self.base_set:
            self.base = urljoin(self.base, a["href"].strip())
            self.base_set = True
        elif tag == "img":
            self._add(a.get("src"), "img src")
            for u in parse_srcset(a.get("srcset", "")):
                self._add(u, "img srcset")
            for name in _LAZY:
                self._add(a.get(name), f"img {name}")
            for u in parse_srcset(a.get("data-srcset", "")):
                self._add(u, "img data-srcset")
        elif tag == "picture":
            self.picture += 1
        elif tag == "source" and self.picture:
            for u in parse_srcset(a.get("srcset", "")):
                self._add(u, "picture source srcset")
        elif tag == "meta":
            key = (a.get("property") or a.get("name") or "").lower()
            if key in _META_IMAGES:
                self._add(a.get("content"), f"meta {key}")
        elif tag == "link" and "image_src" in a.get("rel", "").lower().split():
            self._add(a.get("href"), "link image_src")
        elif tag == "link" and "stylesheet" in a.get("rel", "").lower().split() \
                and a.get("href", "").strip():
            self.sheets.append(urljoin(self.base, a["href"].strip()).split("#", 1)[0])
        elif tag == "input" and a.get("type", "").lower() == "image":
            self._add(a.get("src"), "input image")
        elif tag == "style":
            self.in_style = True
        if "style" in a:
            for u in _css_urls(a["style"]):
                self._add(u, f"{tag} style background")

    def handle_startendtag(self, tag, attrs):
        self.handle_starttag(tag, attrs)

    def handle_endtag(self, tag):
        if tag == "picture" and self.picture:
            self.picture -= 1
        elif tag == "style":
            self.in_style = False

    def handle_data(self, data):
        if self.in_style:
            for u in _css_urls(data):
                self._add(u, "style block background")


def css_images(css: str, sheet_url: str) -> list[ImageRef]:
    """Background images of a stylesheet, resolved against the stylesheet's own URL."""
    refs: dict[str, ImageRef] = {}
    for raw in _css_urls(css):
        if raw.lower().startswith(("data:", "blob:")):
            continue
        url = urljoin(sheet_url, raw).split("#", 1)[0]
        if urlsplit(url).scheme.lower() in ("http", "https"):
            refs.setdefault(url, ImageRef(url, [f"stylesheet {sheet_url} background"]))
    return list(refs.values())


def find_images(html: str, page_url: str,
                sheets: list[str] | None = None) -> tuple[list[ImageRef], list[str]]:
    """Image references of a page, in document order, each URL once.

    ``sheets`` (optional) receives the URLs of the linked stylesheets, whose
    background images :func:`css_images` reads.

    Returns
    -------
    (list of ImageRef, list of str)
        The references to fetch (http and https only), and notes on those
        passed over (``data:`` URLs, other schemes).
    """
    c = _Collector(page_url)
    c.feed(html)
    c.close()
    if sheets is not None:
        sheets.extend(u for u in dict.fromkeys(c.sheets)
                      if urlsplit(u).scheme.lower() in ("http", "https"))
    refs: dict[str, ImageRef] = {}
    notes: list[str] = []
    for raw, how in c.found:
        if raw.lower().startswith(("data:", "blob:", "javascript:", "about:")):
            notes.append(f"{how}: an inline {raw.split(':', 1)[0]}: URL is not fetched "
                         "(its bytes are in the page itself)")
            continue
        url = urljoin(c.base, raw).split("#", 1)[0]
        if urlsplit(url).scheme.lower() not in ("http", "https"):
            notes.append(f"{url}: {how} uses a scheme other than http or https; not fetched")
            continue
        ref = refs.setdefault(url, ImageRef(url))
        if how not in ref.how:
            ref.how.append(how)
    return list(refs.values()), notes
