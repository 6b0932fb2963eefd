"""Render the dossier: jinja2 text -> light markup -> PDF (reportlab) and HTML.

The text of every section lives in ``templates/`` as jinja2 templates that
write a small markup (see :func:`parse_markup`); tables and figures are
placed by markers in that text, so the PDF and the HTML page carry the same
words in the same order. The PDF embeds its fonts (Bitstream Vera, shipped
with reportlab) and is written with reportlab's invariant mode, so the same
data give the same bytes.
"""

from __future__ import annotations

import base64
import html
import math
import re
from pathlib import Path

import jinja2

from claimkit import words
from claimkit.case import layout
from claimkit.case.reference import describe
from claimkit.errors import InputError
from claimkit.evaluation.lr import verbal

__all__ = [
    "parse_markup",
    "render_html",
    "render_markup",
    "render_pdf",
    "tables",
    "template_dir",
]

PAGE_NOTE = "Technical evidence, not legal advice. Consult counsel; rules differ between jurisdictions."


def template_dir() -> Path:
    """``templates/`` beside the package (source tree), else inside it (installed)."""
    here = Path(__file__).resolve().parent.parent
    for cand in (here.parent / "templates", here / "templates"):
        if (cand / "dossier.md.j2").is_file():
            return cand
    raise InputError("claimkit's templates/ folder is missing from this installation; "
                     "reinstall claimkit from its source tree", path=here)


# ---------------------------------------------------------------- jinja2

def _day(iso: str) -> str:
    return (iso or "")[:10]


def _chance(log10p: float) -> str:
    """A probability in :func:`claimkit.words.probability`'s words, with a plain reading.

    The markup turns ``10^-12`` into a superscript in the PDF and the HTML; in
    plain text it stays ``10^-12``, so its minus sign survives copying.
    """
    said = words.probability(log10p)
    if not math.isfinite(log10p) or log10p < words.FLOOR_LOG10:
        return f"{said} (less than one in a million million)"
    if log10p <= -3:
        return f"{said} (less than 1 in a 1 followed by {math.floor(-log10p)} zeros)"
    return f"about {said}"


def _power(log10v: float | None) -> str:
    """10^x for a log10 value, with its sign and a plain reading ("10^2.4 (about 250)")."""
    if log10v is None:
        return "not computed"
    v = round(float(log10v), 1)
    plain = 10 ** abs(float(log10v))
    approx = f"{plain:,.0f}" if plain >= 10 else f"{plain:.2g}"
    return f"10^{v:g} (about {'1/' if v < 0 else ''}{approx})"


def _pct(v: float | None) -> str:
    return "not measured" if v is None else f"{100 * float(v):.0f} %"


def _cropdesc(box, r) -> str:
    al = r.get("alignment") or {}
    try:
        w = al["work_size"][0] / al["work_scale"]
        h = al["work_size"][1] / al["work_scale"]
        frac = (box[2] - box[0]) * (box[3] - box[1]) / (w * h)
    except (KeyError, TypeError, ZeroDivisionError, IndexError):
        return "a part"
    return f"about {100 * frac:.0f} % of the area"


def _alignwords(al: dict) -> str:
    """'turned 4.0 degrees counter-clockwise, scaled to 80 %' from the alignment's reading."""
    parts = []
    rot = al.get("rotation_deg", 0.0)
    if abs(rot) >= 0.05:
        way = "counter-clockwise" if rot > 0 else "clockwise"
        parts.append(f"turned {abs(rot):.1f} degrees {way}")
    if abs(al.get("scale", 1.0) - 1) >= 0.005:
        parts.append(f"scaled to {100 * al['scale']:.0f} %")
    if al.get("mirrored") or al.get("flipped"):
        parts.append("mirrored")
    return ", ".join(parts) if parts else "neither turned nor scaled"


def _env() -> jinja2.Environment:
    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(template_dir())),
                             autoescape=False, undefined=jinja2.StrictUndefined,
                             keep_trailing_newline=True, trim_blocks=False)
    env.filters.update(day=_day, chance=_chance, cropdesc=_cropdesc, alignwords=_alignwords,
                       power=_power, pct=_pct, label=layout.exhibit_label)
    return env


def render_markup(data: dict) -> str:
    """The dossier's text in markup, from ``templates/dossier.md.j2``."""
    exhibits = {e["exhibit_id"]: e for e in data["exhibits"]}
    return _env().get_template("dossier.md.j2").render(d=data, exhibit=lambda i: exhibits[i])


# ---------------------------------------------------------------- markup

_MARKER = re.compile(r"\[\[([a-z]+)(?::([^\]:]+))?(?::([^\]]+))?\]\]\Z")


def parse_markup(text: str) -> list[tuple]:
    """Blocks: ("h1"|"h2"|"p"|"li", text), ("marker", kind, arg1, arg2)."""
    blocks: list[tuple] = []
    para: list[str] = []

    def flush():
        if para:
            blocks.append(("p", " ".join(para)))
            para.clear()

    for raw in text.splitlines():
        line = raw.strip()
        if not line:
            flush()
            continue
        m = _MARKER.match(line)
        if m:
            flush()
            blocks.append(("marker", m.group(1), m.group(2), m.group(3)))
        elif line.startswith("# "):
            flush()
            blocks.append(("h1", line[2:]))
        elif line.startswith("## "):
            flush()
            blocks.append(("h2", line[3:]))
        elif line.startswith("- "):
            flush()
            blocks.append(("li", line[2:]))
        else:
            para.append(line)
    flush()
    return blocks


def _inline(text: str, *, sup: str) -> str:
    """Escape, then **bold** and 10^N; ``sup`` is the superscript tag (PDF or HTML)."""
    t = html.escape(text, quote=False)
    t = re.sub(r"\*\*(.+?)\*\*", r"<b>\1</b>", t)
    # Powers stay written as 10^-12 and exp(-z^2/2): a superscript loses its meaning when
    # the text is copied out of the PDF ("10-12", "106"), the caret does not.
    return t


# ---------------------------------------------------------------- tables

def tables(data: dict, name: str, arg: str | None) -> tuple[list[str], list[list[str]]]:
    """Header and rows of a named table (plain text cells)."""
    if name == "exhibits":
        rows = [[e["exhibit_id"], e["source"], (e.get("found") or {}).get("when", "not stated"),
                 f"{e['taken_in']['by']}, {e['taken_in']['time'][:19]}Z",
                 e["sha256"]] for e in data["exhibits"]]
        return ["Exhibit", "Found at", "Found (stated)", "Taken in by, at", "SHA-256"], rows
    if name == "parameters":
        eng = data["method"]["engine"]
        rows = [[k, str(v)] for k, v in sorted(eng.items())
                if k not in ("format_records", "examination", "current")]
        rows += [[f"examination: {k}", str(v)] for k, v in sorted(eng["examination"].items())]
        for f in eng["format_records"]:
            rows += [[f"{f['format']}: {k}", str(v)] for k, v in sorted(f.items())
                     if k != "format"]
        rows += [[f"mark: {k}", str(v)] for k, v in sorted(data["method"]["mark"].items())]
        rows += [[f"content line: {k.replace('_', ' ')}", str(v)]
                 for k, v in data["method"].get("content", {}).items()]
        return ["Parameter", "Value"], rows
    if name == "custody":
        rows = [[str(e["seq"]), e["time"][:19] + "Z", e["actor"], e["action"], e["what"],
                 ", ".join(f"{k} {v}" for k, v in e["items"].items())]
                for e in data["custody"]["entries"]]
        return ["#", "Time (system clock)", "By", "Action", "Concerns", "Items (SHA-256, first 16)"], rows
    if name == "warnings":
        rows = [[w["code"], _label_of(data, w.get("exhibit")), w["text"]] for w in data["warnings"]]
        return ["Warning", "Concerns", "What it means"], rows or [["none", "", "No warning."]]
    if name == "timeline":
        rows = [[e["day"] or "(no date)", e["what"], e["source"], str(e["time"] or "")]
                for e in data["timeline"]["events"]]
        return ["Day", "Event", "Source of the date", "As recorded"], rows
    if name == "lines":
        rows = []
        for r in data["results"]:
            ev = r.get("evaluation") or {}
            lg = ev.get("log10_lr") or {}
            if not ev:
                continue
            top = ev.get("cap_log10")

            def capped(v, top=top):
                # A value at the cap is the cap, not a measurement: say so beside it.
                return _power(v) + (" (the cap)" if v is not None and top and abs(v) >= top else "")
            withheld = ev.get("reported_log10_lr") is None and ev.get("propositions")
            rows.append([r["label"], capped(lg.get("mark")), capped(lg.get("content")),
                         capped(lg.get("combined")),
                         "none (no opinion given)" if withheld else capped(ev.get("reported_log10_lr")),
                         "no opinion given: the content line could not check the mark line's "
                         "assumption" if withheld else "not evaluated"
                         if ev.get("reported_log10_lr") is None
                         else verbal(ev["reported_log10_lr"], "Hp", "Hd")])
        return ["Exhibit", "LR, mark line", "LR, content line", "LR, combined", "LR reported",
                "Verbal equivalent (ENFSI 2015)"], rows or [["(none)", "", "", "", "", ""]]
    if name == "robustness":
        r = next(x for x in data["results"] if x["exhibit_id"] == arg)
        rows_in = (r.get("robustness") or {}).get("rows") or []
        head = ["Edit", "Found", "Same work", "False-alarm bound", "Message PSNR (dB)",
                "Geometry right"]
        rows = []
        for row in rows_in:
            lp = row.get("log10_false_alarm_probability")
            bound = "" if lp is None else words.probability(lp)
            rows.append([str(row.get("attack", "")), _cell(row.get("detected")),
                         _cell(row.get("same_payload")) or "n/a", bound,
                         _cell(row.get("message_psnr_db")) or "n/a",
                         _cell(row.get("geometry_ok"))])
        return head, rows or [["(no rows)", "", "", "", "", ""]]
    raise KeyError(f"no table {name}")


def _label_of(data: dict, exhibit_id: str | None) -> str:
    if not exhibit_id:
        return "the case"
    return next((r["label"] for r in data["results"] if r["exhibit_id"] == exhibit_id), exhibit_id)


def _cell(v) -> str:
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, float):
        return f"{v:.4g}"
    return "" if v is None else str(v)


def _pair(data: dict, exhibit_id: str) -> list[tuple[str, str]]:
    """The page-1 pair: (figure kind, caption) for the registered picture and the exhibit."""
    r = next(x for x in data["results"] if x["exhibit_id"] == exhibit_id)
    wid = (r.get("match") or {}).get("work_id") or r.get("work_id")
    if r.get("reference"):
        left = f"Registered work {wid}: the {describe(r['reference'])}"
    elif wid:
        left = f"Registered work {wid}: its file was not at hand, so it is not shown"
    else:
        left = "No registered work is named by a mark or matched by appearance"
    return [("registered", left), ("thumbnail", f"{r['label']} as found")]


# ---------------------------------------------------------------- PDF

_FONTS_DONE = False


def _register_fonts() -> None:
    global _FONTS_DONE
    if _FONTS_DONE:
        return
    import reportlab
    from reportlab.lib.fonts import addMapping
    from reportlab.pdfbase import pdfmetrics
    from reportlab.pdfbase.ttfonts import TTFont

    folder = Path(reportlab.__file__).parent / "fonts"
    for name, file in (("Vera", "Vera.ttf"), ("Vera-Bold", "VeraBd.ttf"),
                       ("Vera-Italic", "VeraIt.ttf"), ("Vera-BoldItalic", "VeraBI.ttf")):
        pdfmetrics.registerFont(TTFont(name, str(folder / file)))
    addMapping("Vera", 0, 0, "Vera")
    addMapping("Vera", 1, 0, "Vera-Bold")
    addMapping("Vera", 0, 1, "Vera-Italic")
    addMapping("Vera", 1, 1, "Vera-BoldItalic")
    _FONTS_DONE = True


def render_pdf(data: dict, root: Path, out: Path) -> bytes:
    """Build the PDF (A4) from the data and the figures under ``root``; returns its bytes."""
    import io

    from reportlab import rl_config
    from reportlab.lib import colors
    from reportlab.lib.pagesizes import A4
    from reportlab.lib.styles import ParagraphStyle
    from reportlab.lib.units import cm
    from reportlab.platypus import (
        Image,
        KeepTogether,
        PageBreak,
        Paragraph,
        SimpleDocTemplate,
        Spacer,
        Table,
        TableStyle,
    )

    _register_fonts()
    rl_config.invariant = 1   # no time or random ID in the file: same data, same bytes
    rl_config.canvas_basefontname = "Vera"   # else every page starts in (unembedded) Helvetica
    base = ParagraphStyle("body", fontName="Vera", bulletFontName="Vera", fontSize=9.5, leading=13,
                          spaceAfter=5)
    st = {
        "p": base,
        "h1": ParagraphStyle("h1", parent=base, fontName="Vera-Bold", fontSize=15, leading=19,
                             spaceBefore=10, spaceAfter=7, textColor=colors.HexColor("#1b2a44"),
                             keepWithNext=1),
        "h2": ParagraphStyle("h2", parent=base, fontName="Vera-Bold", fontSize=11.5, leading=15,
                             spaceBefore=8, spaceAfter=4, textColor=colors.HexColor("#1b2a44"),
                             keepWithNext=1),
        "li": ParagraphStyle("li", parent=base, leftIndent=12, bulletIndent=2),
        "title": ParagraphStyle("title", parent=base, fontName="Vera-Bold", fontSize=20,
                                leading=25, spaceAfter=10, textColor=colors.HexColor("#1b2a44")),
        "cell": ParagraphStyle("cell", parent=base, fontSize=7.2, leading=9, spaceAfter=0,
                               wordWrap="CJK"),
    }
    width = A4[0] - 4 * cm
    story = []
    for block in parse_markup(render_markup(data)):
        kind = block[0]
        if kind in ("h1", "h2", "p"):
            story.append(Paragraph(_inline(block[1], sup="super"), st[kind]))
        elif kind == "li":
            story.append(Paragraph(_inline(block[1], sup="super"), st["li"], bulletText="\u2022"))
        elif block[1] == "pagebreak":
            story.append(PageBreak())
        elif block[1] == "title":
            story.append(Paragraph(_inline(f"Evidence dossier: {data['case']['title']}",
                                           sup="super"), st["title"]))
        elif block[1] == "table":
            head, rows = tables(data, block[2], block[3])
            cells = [[Paragraph(_inline(c, sup="super"), st["cell"]) for c in head]]
            cells += [[Paragraph(_inline(c, sup="super"), st["cell"]) for c in row] for row in rows]
            t = Table(cells, repeatRows=1, colWidths=_col_widths(block[2], len(head), width))
            t.setStyle(TableStyle([
                ("BACKGROUND", (0, 0), (-1, 0), colors.HexColor("#e4e8ef")),
                ("GRID", (0, 0), (-1, -1), 0.3, colors.HexColor("#9aa3b0")),
                ("VALIGN", (0, 0), (-1, -1), "TOP"),
                ("FONTNAME", (0, 0), (-1, -1), "Vera"),
            ]))
            story.append(t)
            story.append(Spacer(1, 6))
        elif block[1] == "pair":
            cells = []
            for kind, caption in _pair(data, block[2]):
                rel = data["figures"].get(block[2], {}).get(kind)
                if rel and (root / rel).is_file():
                    from PIL import Image as PILImage
                    with PILImage.open(root / rel) as im:
                        w, h = im.size
                    sc = min(7.6 * cm / w, 6.2 * cm / h)
                    cells.append([Image(str(root / rel), width=w * sc, height=h * sc),
                                  Paragraph(_inline(caption, sup="super"), st["cell"])])
                else:
                    cells.append([Paragraph(_inline(caption, sup="super"), st["cell"])])
            t = Table([cells], colWidths=[width / 2, width / 2])
            t.setStyle(TableStyle([("VALIGN", (0, 0), (-1, -1), "TOP"),
                                   ("FONTNAME", (0, 0), (-1, -1), "Vera")]))
            story.append(KeepTogether([t, Spacer(1, 4)]))
        elif block[1] == "figure":
            rel = data["figures"].get(block[3], {}).get(block[2])
            if rel and (root / rel).is_file():
                from PIL import Image as PILImage
                with PILImage.open(root / rel) as im:
                    w, h = im.size
                maxw = {"thumbnail": 6 * cm, "surface": 11 * cm, "message": 13 * cm,
                        "decoys": 14 * cm, "registered": 6 * cm}.get(block[2], width)
                scale = min(maxw / w, 9 * cm / h)
                story.append(KeepTogether([Image(str(root / rel), width=w * scale,
                                                 height=h * scale, hAlign="LEFT"),
                                           Spacer(1, 4)]))

    def footer(canvas, doc):
        canvas.saveState()
        canvas.setFont("Vera", 7)
        canvas.setFillColor(colors.HexColor("#555555"))
        canvas.drawString(2 * cm, 1.2 * cm, f"{data['case']['case_id']}  |  {PAGE_NOTE}")
        canvas.drawRightString(A4[0] - 2 * cm, 1.2 * cm, f"page {doc.page}")
        canvas.restoreState()

    buf = io.BytesIO()
    doc = SimpleDocTemplate(buf, pagesize=A4, leftMargin=2 * cm, rightMargin=2 * cm,
                            topMargin=1.8 * cm, bottomMargin=2 * cm,
                            title=f"Evidence dossier: {data['case']['title']}",
                            author=data["claimant"]["name"] or "", subject=data["case"]["case_id"],
                            creator=data["software"])
    doc.build(story, onFirstPage=footer, onLaterPages=footer)
    return buf.getvalue()


def _col_widths(name: str, n: int, width: float) -> list[float]:
    shares = {"exhibits": [0.08, 0.27, 0.15, 0.2, 0.3],
              "lines": [0.1, 0.14, 0.14, 0.14, 0.14, 0.34],
              "warnings": [0.25, 0.12, 0.63],
              "timeline": [0.12, 0.4, 0.2, 0.28],
              "custody": [0.05, 0.17, 0.12, 0.17, 0.12, 0.37],
              "parameters": [0.4, 0.6]}.get(name)
    if shares is None or len(shares) != n:
        shares = [1.0 / n] * n
    return [s * width for s in shares]


# ---------------------------------------------------------------- HTML

def render_html(data: dict, root: Path) -> str:
    """A self-contained HTML page (figures inline as data: URIs) with the PDF's content."""
    parts = []
    open_list = False
    for block in parse_markup(render_markup(data)):
        if block[0] == "li":
            if not open_list:
                parts.append("<ul>")
                open_list = True
            parts.append(f"<li>{_inline(block[1], sup='sup')}</li>")
            continue
        if open_list:
            parts.append("</ul>")
            open_list = False
        kind = block[0]
        if kind == "h1":
            parts.append(f"<h2>{_inline(block[1], sup='sup')}</h2>")
        elif kind == "h2":
            parts.append(f"<h3>{_inline(block[1], sup='sup')}</h3>")
        elif kind == "p":
            parts.append(f"<p>{_inline(block[1], sup='sup')}</p>")
        elif block[1] == "title":
            parts.append(f"<h1>{_inline('Evidence dossier: ' + data['case']['title'], sup='sup')}</h1>")
        elif block[1] == "pagebreak":
            parts.append('<hr class="page">')
        elif block[1] == "table":
            head, rows = tables(data, block[2], block[3])
            t = ["<table><thead><tr>"] + [f"<th>{html.escape(h)}</th>" for h in head]
            t.append("</tr></thead><tbody>")
            for row in rows:
                t.append("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in row) + "</tr>")
            t.append("</tbody></table>")
            parts.append("".join(t))
        elif block[1] == "pair":
            cells = []
            for kind, caption in _pair(data, block[2]):
                rel = data["figures"].get(block[2], {}).get(kind)
                img = ""
                if rel and (root / rel).is_file():
                    b64 = base64.b64encode((root / rel).read_bytes()).decode("ascii")
                    img = f'<img alt="{html.escape(caption)}" src="data:image/png;base64,{b64}">'
                cells.append(f"<figure>{img}<figcaption>{_inline(caption, sup='sup')}"
                             "</figcaption></figure>")
            parts.append('<div class="pair">' + "".join(cells) + "</div>")
        elif block[1] == "figure":
            rel = data["figures"].get(block[3], {}).get(block[2])
            if rel and (root / rel).is_file():
                b64 = base64.b64encode((root / rel).read_bytes()).decode("ascii")
                parts.append(f'<figure class="{block[2]}"><img alt="{block[2]} of '
                             f'{block[3]}" src="data:image/png;base64,{b64}"></figure>')
    if open_list:
        parts.append("</ul>")
    tpl = _env().get_template("dossier.html.j2")
    return tpl.render(d=data, body="\n".join(parts), page_note=PAGE_NOTE)
