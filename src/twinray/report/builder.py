"""The report builder: collect sections, write one self-contained HTML file.

A :class:`Report` gathers headings, paragraphs, tables, key-value lists and
figures (matplotlib figures turned into PNG and embedded as base64 data URIs),
then :meth:`Report.write` writes ``report.html`` atomically. The file needs
nothing else to be read: no scripts, no external style sheets, no image files.

The raw HTML never contains the letters "nan" in a row, so a reader or a
checker looking for NaN (a number that failed) finds none unless a number
really failed, and then it shows as "n/a":

* numbers go through :func:`format_value`, which writes non-finite values as
  "n/a";
* text is escaped and the "a" of any "nan" inside a word (a file name, a
  scanner label) is written as the character reference ``&#97;``, which a
  browser and ``html.parser`` show as the plain letter;
* base64 image data is wrapped at 76 characters, and a line break is put
  inside any "nan" the encoding happens to produce. Line breaks inside a URL
  are dropped by every browser (WHATWG URL standard, "remove all ASCII tab or
  newline from input"), and base64 decoders skip them (RFC 2045 section 6.8).
"""

from __future__ import annotations

import base64
import dataclasses
import datetime
import html
import io
import math
import numbers
import re
from pathlib import Path

import numpy as np

from ..accounting import FIELDS, REJECTION_REASONS
from ..atomic import atomic_path

_NAN_LETTERS = re.compile(r"([nN])([aA])(?=[nN])")

#: Resolution of the embedded figures, dots per inch.
FIGURE_DPI = 100


def escape_text(text) -> str:
    """HTML-escape ``text`` and hide any "nan" letter run behind a character reference."""
    escaped = html.escape(str(text), quote=True)
    return _NAN_LETTERS.sub(lambda m: m.group(1) + f"&#{ord(m.group(2))};", escaped)


def format_value(value) -> str:
    """A value as a short, human string (no "nan" or "inf" ever).

    Integers get thousands separators, floats four significant digits,
    non-finite floats "n/a", booleans "yes"/"no", sequences a comma list.
    """
    if value is None:
        return "—"
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, numbers.Integral):
        return f"{int(value):,}"
    if isinstance(value, numbers.Real):
        x = float(value)
        if not math.isfinite(x):
            return "n/a"
        if x == int(x) and abs(x) < 1e15:
            return f"{int(x):,}" if abs(x) >= 1e3 else f"{x:g}"
        if 1e3 <= abs(x) < 1e12:
            return f"{x:,.0f}"
        return f"{x:.4g}"
    if isinstance(value, np.ndarray):
        value = value.tolist()
    if isinstance(value, (list, tuple)):
        if len(value) > 12:
            shown = ", ".join(format_value(v) for v in value[:12])
            return f"{shown}, … ({len(value)} values)"
        return ", ".join(format_value(v) for v in value)
    if isinstance(value, dict):
        return "; ".join(f"{k} = {format_value(v)}" for k, v in value.items())
    return str(value)


def png_bytes(fig, dpi: int = FIGURE_DPI) -> bytes:
    """Render a matplotlib figure to PNG bytes (Agg, no pyplot state)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    if not isinstance(fig.canvas, FigureCanvasAgg):
        FigureCanvasAgg(fig)
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, metadata={"Software": None}, facecolor="white")
    return buf.getvalue()


def png_data_uri(png: bytes) -> str:
    """A ``data:image/png;base64,...`` URI, wrapped and free of "nan" runs."""
    b64 = base64.b64encode(png).decode("ascii")
    wrapped = "\n".join(b64[i:i + 76] for i in range(0, len(b64), 76))
    return "data:image/png;base64," + _NAN_LETTERS.sub(r"\1\n\2", wrapped)


def accounting_rows(accounting: dict) -> tuple:
    """Rows ``(counter, events, percent of read)`` of an accounting object.

    Parameters
    ----------
    accounting : dict
        Counters of data contract section 5 (missing ones count as 0).

    Returns
    -------
    rows : list of tuple
    balance : int
        ``read - prompts_binned - delayed_binned - sum(rejected_*)``; 0 when
        nothing was lost.
    """
    counts = {name: int(accounting.get(name, 0) or 0) for name in FIELDS}
    read = counts["read"]
    rows = []
    for name in FIELDS:
        share = 100.0 * counts[name] / read if read else float("nan")
        rows.append((name, counts[name], share))
    balance = read - counts["prompts_binned"] - counts["delayed_binned"] - sum(counts[r] for r in REJECTION_REASONS)
    return rows, balance


@dataclasses.dataclass
class _Block:
    kind: str
    payload: dict


class Report:
    """A report under construction.

    Parameters
    ----------
    title : str
        Shown at the top and in the browser tab.
    subtitle : str, optional
        One line under the title (e.g. what was run on what).

    Examples
    --------
    >>> rep = Report("Sinogram of phantom.parquet")
    >>> rep.heading("Counts")
    >>> rep.key_values({"prompts": 1200345, "delayed": 50123})
    >>> rep.write("report.html")  # doctest: +SKIP
    """

    def __init__(self, title: str, subtitle: str = ""):
        self.title = str(title)
        self.subtitle = str(subtitle)
        self.blocks: list = []
        self.created = datetime.datetime.now(datetime.timezone.utc)

    # -- content ---------------------------------------------------------
    def heading(self, text: str) -> None:
        """Start a new section (listed in the contents at the top)."""
        n = sum(1 for b in self.blocks if b.kind == "section") + 1
        self.blocks.append(_Block("section", {"text": str(text), "anchor": f"section-{n}"}))

    def subheading(self, text: str) -> None:
        """A smaller heading inside the current section."""
        self.blocks.append(_Block("subheading", {"text": str(text)}))

    def paragraph(self, text: str) -> None:
        """A paragraph of plain text."""
        self.blocks.append(_Block("paragraph", {"text": str(text)}))

    def note(self, text: str) -> None:
        """A highlighted caution or warning."""
        self.blocks.append(_Block("note", {"text": str(text)}))

    def key_values(self, mapping, caption: str = "") -> None:
        """A two-column table of named values (units belong in the names)."""
        items = list(mapping.items()) if isinstance(mapping, dict) else list(mapping)
        self.blocks.append(_Block("kv", {"items": items, "caption": caption}))

    def table(self, header, rows, caption: str = "") -> None:
        """A table; numbers are right-aligned and formatted by :func:`format_value`."""
        header = [str(h) for h in header]
        rows = [list(r) for r in rows]
        for r in rows:
            if len(r) != len(header):
                raise ValueError(f"table row has {len(r)} cells, header has {len(header)}")
        self.blocks.append(_Block("table", {"header": header, "rows": rows, "caption": caption}))

    def figure(self, fig, caption: str = "", alt: str = "") -> None:
        """Embed a matplotlib figure as a PNG (the figure may be discarded afterwards)."""
        png = png_bytes(fig)
        self.blocks.append(_Block("figure", {"png": png, "caption": caption, "alt": alt or caption}))

    def png(self, png: bytes, caption: str = "", alt: str = "") -> None:
        """Embed PNG bytes made elsewhere."""
        if not bytes(png[:8]) == b"\x89PNG\r\n\x1a\n":
            raise ValueError("not PNG data (signature missing)")
        self.blocks.append(_Block("figure", {"png": bytes(png), "caption": caption, "alt": alt or caption}))

    def accounting(self, accounting: dict, caption: str = "Where every event went") -> None:
        """The accounting table of data contract section 5, with a balance check."""
        rows, balance = accounting_rows(accounting)
        shown = [(name.replace("_", " "), count, f"{share:.3f} %" if math.isfinite(share) else "—")
                 for name, count, share in rows]
        self.table(["counter", "events", "of read"], shown, caption=caption)
        if balance == 0:
            self.paragraph("The counts balance: read = prompts binned + delayed binned + all rejections.")
        else:
            self.note(f"The counts do not balance: {balance:+,} events are not accounted for.")

    def provenance(self, facts: dict) -> None:
        """The provenance section (see :func:`twinray.report.provenance.provenance`)."""
        self.heading("Provenance")
        inputs = facts.get("inputs", [])
        general = {k: v for k, v in facts.items() if k not in ("inputs", "options")}
        self.key_values(general, caption="How this was made")
        options = facts.get("options") or {}
        if options:
            self.key_values(options, caption="Options")
        if inputs:
            self.table(["input", "bytes", "SHA-256"], [(i["path"], i["bytes"], i["sha256"]) for i in inputs],
                       caption="Input files and their SHA-256 checksums")

    # -- output ------------------------------------------------------------
    def figure_count(self) -> int:
        return sum(1 for b in self.blocks if b.kind == "figure")

    def to_html(self) -> str:
        """The whole report as one HTML document."""
        from .. import __version__

        parts = []
        sections = [b.payload for b in self.blocks if b.kind == "section"]
        contents = "".join(f'<li><a href="#{s["anchor"]}">{escape_text(s["text"])}</a></li>' for s in sections)
        open_section = False
        for block in self.blocks:
            p = block.payload
            if block.kind == "section":
                if open_section:
                    parts.append("</section>")
                parts.append(f'<section id="{p["anchor"]}"><h2>{escape_text(p["text"])}</h2>')
                open_section = True
            elif block.kind == "subheading":
                parts.append(f"<h3>{escape_text(p['text'])}</h3>")
            elif block.kind == "paragraph":
                parts.append(f"<p>{escape_text(p['text'])}</p>")
            elif block.kind == "note":
                parts.append(f'<p class="note">{escape_text(p["text"])}</p>')
            elif block.kind == "kv":
                parts.append(_kv_html(p["items"], p["caption"]))
            elif block.kind == "table":
                parts.append(_table_html(p["header"], p["rows"], p["caption"]))
            elif block.kind == "figure":
                parts.append(f'<figure><img src="{png_data_uri(p["png"])}" alt="{escape_text(p["alt"])}">'
                             f"<figcaption>{escape_text(p['caption'])}</figcaption></figure>")
        if open_section:
            parts.append("</section>")
        stamp = self.created.strftime("%Y-%m-%d %H:%M UTC")
        subtitle = f'<p class="subtitle">{escape_text(self.subtitle)}</p>' if self.subtitle else ""
        toc = f'<nav><h2>Contents</h2><ol>{contents}</ol></nav>' if len(sections) > 1 else ""
        return (
            "<!DOCTYPE html>\n"
            '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
            '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            f'<meta name="generator" content="twinray {escape_text(__version__)}">\n'
            f"<title>{escape_text(self.title)}</title>\n<style>{_STYLE}</style>\n</head>\n<body>\n"
            f'<header><p class="brand">twinray report</p><h1>{escape_text(self.title)}</h1>{subtitle}'
            f'<p class="stamp">written {stamp}</p></header>\n'
            f"{toc}\n<main>\n" + "\n".join(parts) + "\n</main>\n"
            f"<footer>Made by twinray {escape_text(__version__)}. Research software: not a medical device; "
            "clinical use and work with radioactive sources follow local regulations and licensed practice."
            "</footer>\n</body>\n</html>\n"
        )

    def write(self, path) -> Path:
        """Write the report atomically; returns the path."""
        path = Path(path)
        text = self.to_html()
        with atomic_path(path, suffix=".html") as tmp:
            tmp.write_text(text, encoding="utf-8")
        return path


def _cell(value) -> tuple:
    numeric = isinstance(value, numbers.Number) and not isinstance(value, (bool, np.bool_))
    return escape_text(format_value(value)), numeric


def _kv_html(items, caption: str) -> str:
    rows = []
    for key, value in items:
        text, numeric = _cell(value)
        cls = ' class="num"' if numeric else ""
        rows.append(f"<tr><th scope=\"row\">{escape_text(key)}</th><td{cls}>{text}</td></tr>")
    cap = f"<caption>{escape_text(caption)}</caption>" if caption else ""
    return f'<table class="kv">{cap}<tbody>{"".join(rows)}</tbody></table>'


def _table_html(header, rows, caption: str) -> str:
    head = "".join(f'<th scope="col">{escape_text(h)}</th>' for h in header)
    body = []
    for row in rows:
        cells = []
        for value in row:
            text, numeric = _cell(value)
            cells.append(f'<td class="num">{text}</td>' if numeric else f"<td>{text}</td>")
        body.append(f"<tr>{''.join(cells)}</tr>")
    cap = f"<caption>{escape_text(caption)}</caption>" if caption else ""
    return f'<table class="grid">{cap}<thead><tr>{head}</tr></thead><tbody>{"".join(body)}</tbody></table>'


# Our own look: ink on paper, a slate band on top, one blue accent.
_STYLE = """
:root { --ink: #1f2a33; --paper: #fcfbf8; --rule: #d9d4c7; --accent: #0072B2; --band: #2f3e4c; --soft: #f1eee6; }
* { box-sizing: border-box; }
body { margin: 0; background: var(--paper); color: var(--ink);
       font: 15px/1.5 "Helvetica Neue", Arial, sans-serif; }
header { background: var(--band); color: #f4f1ea; padding: 1.2rem 2rem 1rem; }
header h1 { margin: 0.1rem 0 0.2rem; font-size: 1.6rem; font-weight: 600; }
.brand { margin: 0; letter-spacing: 0.12em; text-transform: uppercase; font-size: 0.75rem; color: #b9c7d3; }
.subtitle { margin: 0; color: #dfe6ec; }
.stamp { margin: 0.3rem 0 0; font-size: 0.8rem; color: #b9c7d3; }
nav { padding: 0.6rem 2rem; border-bottom: 1px solid var(--rule); background: var(--soft); }
nav h2 { display: none; }
nav ol { margin: 0; padding: 0; list-style: none; display: flex; flex-wrap: wrap; gap: 0.3rem 1.2rem; }
nav a { color: var(--accent); text-decoration: none; font-size: 0.9rem; }
main { max-width: 1180px; padding: 0.5rem 2rem 2rem; }
section { border-top: 1px solid var(--rule); margin-top: 1.4rem; }
h2 { font-size: 1.25rem; margin: 1rem 0 0.6rem; padding-left: 0.6rem; border-left: 4px solid var(--accent); }
h3 { font-size: 1.05rem; margin: 1rem 0 0.4rem; }
p.note { background: #fff4e0; border-left: 4px solid #E69F00; padding: 0.4rem 0.8rem; }
table { border-collapse: collapse; margin: 0.6rem 0 1rem; font-size: 0.9rem; }
caption { text-align: left; font-weight: 600; padding-bottom: 0.3rem; }
table.kv th { text-align: left; font-weight: normal; color: #55616b; padding: 0.15rem 1.2rem 0.15rem 0; }
table.kv td { padding: 0.15rem 0; }
table.grid th { text-align: left; border-bottom: 2px solid var(--ink); padding: 0.2rem 0.8rem 0.2rem 0; }
table.grid td { border-bottom: 1px solid var(--rule); padding: 0.2rem 0.8rem 0.2rem 0; }
table.grid tbody tr:nth-child(even) { background: var(--soft); }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
td { overflow-wrap: anywhere; }
figure { margin: 0.8rem 0 1.4rem; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); background: white; }
figcaption { font-size: 0.88rem; color: #55616b; max-width: 60rem; }
footer { padding: 1rem 2rem 2rem; font-size: 0.8rem; color: #6b757d; border-top: 1px solid var(--rule); }
"""
