"""One self-contained HTML report of a run, with its tables also written as CSV.

The report is a single ``report.html`` that opens anywhere without network access:
figures are embedded as base64 data URIs (PNG, or SVG given as a file), styles are
inline, there are no scripts, web fonts or outside links. Every string that comes from
data (unit ids, labels, file names, the caller's words) is HTML-escaped, so a unit
called ``<script>`` appears as text. The page carries no timestamp: the same inputs
give the same bytes.

The caller (``pipeline.py``) supplies the words and numbers; this module supplies the
layout:

* ``summary``: a flat or nested dict of headline numbers, shown as cards at the top;
* ``verdicts``: one :class:`Verdict` per test: the verdict, its p-value, the plain
  words and, beside them, the assumptions it rests on (bin size, how the number of
  states was chosen, which null); each verdict also says that it is statistical
  evidence about a model, not proof about a brain;
* ``sections``: :class:`Section` objects holding paragraphs (plain ``str``),
  :class:`FigureBlock`, :class:`TableBlock` and :class:`Verdict` blocks;
* ``methods`` (text generated from the resolved configuration; blank lines separate
  paragraphs), ``cautions`` (a list of sentences; the model-not-brain caution is
  added when missing), ``versions`` and ``input_hash`` (provenance);
* ``tables``: extra tables ``{name: (header, rows)}``.

Every table (in ``tables`` or as a :class:`TableBlock`) is written to
``tables_dir/<name>.csv`` with :func:`attractorfit._output.write_csv` (10 significant
digits) and shown in the page (at most ``max_rows`` rows, 4 significant digits).
"""

from __future__ import annotations

import base64
import html
import io
import math
import os
import re
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np

from attractorfit._output import atomic_write, write_csv
from attractorfit.errors import InputError

__all__ = ["Verdict", "FigureBlock", "TableBlock", "Section", "ReportFiles", "build_report",
           "MODEL_NOT_BRAIN"]

#: The caution every report and every verdict carries (project rule 5).
MODEL_NOT_BRAIN = ("These results are statistical evidence about a model of the recorded "
                   "data, not proof about how the brain works.")

_TABLE_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$")


@dataclass
class Verdict:
    """The outcome of one test, in plain words, with its assumptions.

    Attributes
    ----------
    name : str
        The test, e.g. "Discreteness of delay activity".
    verdict : str
        Short outcome, e.g. ``discrete``, ``not_discrete``, ``inconclusive``,
        ``consistent`` (underscores are shown as spaces).
    p_value : float or None
    plain_words : str
        What the verdict means, for a reader who skips the methods.
    assumptions : dict
        What the verdict rests on, e.g. ``{"bin size": "20 ms", "number of states":
        "4, by held-out likelihood", "null": "continuous latent + item PSTHs + drift"}``.
    numbers : dict
        Optional statistics beside it, e.g. ``{"occupancy TVD": 0.04,
        "model-vs-model 95th percentile": 0.07}``.
    """

    name: str
    verdict: str
    p_value: float | None
    plain_words: str
    assumptions: dict = field(default_factory=dict)
    numbers: dict = field(default_factory=dict)


@dataclass
class FigureBlock:
    """A figure with a caption.

    Attributes
    ----------
    figure : matplotlib Figure, bytes, or path
        A Figure (rendered to PNG at ``dpi``), PNG or SVG bytes, or the path of a PNG or
        SVG file (e.g. one written by :func:`attractorfit.plots.save_figure`).
    caption : str
    name : str
        Short name, used as the image's alternative text.
    dpi : float
        Resolution when ``figure`` is a matplotlib Figure.
    """

    figure: object
    caption: str = ""
    name: str = ""
    dpi: float = 150.0


@dataclass
class TableBlock:
    """A table shown in a section and written to ``tables/<name>.csv``.

    Attributes
    ----------
    name : str
        File stem of the CSV (letters, digits, ``_ . -``).
    header : sequence of str
    rows : sequence of sequences
        Each row as long as the header.
    caption : str
    max_rows : int
        Rows shown in the page (the CSV has them all).
    """

    name: str
    header: list
    rows: list
    caption: str = ""
    max_rows: int = 50


@dataclass
class Section:
    """A titled part of the report: blocks in order (str paragraphs or block objects)."""

    title: str
    blocks: list = field(default_factory=list)


@dataclass
class ReportFiles:
    """What :func:`build_report` wrote: the HTML file and the CSV tables (paths)."""

    html: str
    tables: list


# --------------------------------------------------------------------------- formatting
def _esc(x) -> str:
    return html.escape("" if x is None else str(x), quote=True)


def _fmt(v) -> str:
    """A value as short display text (4 significant digits for floats)."""
    if v is None:
        return "n/a"
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        x = float(v)
        if not math.isfinite(x):
            return "n/a"
        return format(x, ".4g")
    if isinstance(v, np.ndarray):
        v = v.tolist()
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_fmt(x) for x in v) + "]"
    return str(v)


def _is_num(v) -> bool:
    return isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, bool)


def _flatten(d: Mapping, prefix: str = "") -> list:
    out = []
    for k, v in d.items():
        key = f"{prefix}{k}"
        if isinstance(v, Mapping):
            out.extend(_flatten(v, key + " \u00b7 "))
        else:
            out.append((key, v))
    return out


def _paragraphs(text) -> str:
    if text is None:
        return ""
    parts = [p.strip() for p in re.split(r"\n\s*\n", str(text)) if p.strip()]
    return "".join(f"<p>{_esc(p)}</p>\n" for p in parts)


def _slug(text: str, used: set) -> str:
    base = re.sub(r"[^a-z0-9]+", "-", str(text).lower()).strip("-") or "section"
    slug, k = base, 2
    while slug in used:
        slug, k = f"{base}-{k}", k + 1
    used.add(slug)
    return slug


# --------------------------------------------------------------------------- figures
_COLUMN_INCHES = 7.0  # a figure this wide (plots.FULL_WIDTH) fills the text column


def _width_inches(data: bytes, mime: str):
    """Physical width of a PNG (pHYs chunk) or SVG (width in pt/in/px), or None."""
    import struct
    if mime == "image/png":
        width_px = struct.unpack(">I", data[16:20])[0]
        i = data.find(b"pHYs", 0, 4096)
        if i > 0:
            ppu_x, _, unit = struct.unpack(">IIB", data[i + 4:i + 13])
            if unit == 1 and ppu_x > 0:
                return width_px / (ppu_x * 0.0254)
        return None
    m = re.search(rb'<svg[^>]*?\swidth="([0-9.]+)(pt|in|px)?"', data[:4096])
    if m:
        value = float(m.group(1))
        return value / {b"pt": 72.0, b"in": 1.0, b"px": 96.0, None: 96.0}[m.group(2)]
    return None


def _figure_uri(fig: FigureBlock) -> tuple:
    obj = fig.figure
    if hasattr(obj, "savefig"):
        buf = io.BytesIO()
        obj.savefig(buf, format="png", dpi=fig.dpi, metadata={"Software": None})
        data, mime = buf.getvalue(), "image/png"
    elif isinstance(obj, (bytes, bytearray)):
        data = bytes(obj)
        mime = _sniff(data)
        if mime is None:
            raise InputError(f"figure {fig.name!r}: bytes are neither PNG nor SVG")
    elif isinstance(obj, (str, os.PathLike)):
        path = os.fspath(obj)
        try:
            with open(path, "rb") as fh:
                data = fh.read()
        except OSError as exc:
            raise InputError(f"figure file {path!r}: cannot be read ({exc.strerror})") from None
        mime = _sniff(data)
        if mime is None:
            raise InputError(f"figure file {path!r}: expected a PNG or SVG image")
    else:
        raise InputError(f"figure {fig.name!r}: expected a matplotlib Figure, PNG/SVG bytes "
                         f"or a file path, got {type(obj).__name__}")
    return (f"data:{mime};base64," + base64.b64encode(data).decode("ascii"),
            _width_inches(data, mime))


def _sniff(data: bytes):
    if data.startswith(b"\x89PNG\r\n\x1a\n"):
        return "image/png"
    head = data[:512].lstrip()
    if head.startswith(b"<?xml") or head.startswith(b"<svg") or b"<svg" in head:
        return "image/svg+xml"
    return None


# --------------------------------------------------------------------------- tables
def _check_table(name, header, rows) -> tuple:
    name = "" if name is None else str(name)
    if not _TABLE_NAME.match(name) or name in (".", ".."):
        raise InputError(f"table name: expected letters, digits, '_', '.' or '-' (a file "
                         f"name without folders), got {name!r}")
    header = [str(h) for h in header]
    rows = [list(r) for r in rows]
    for i, r in enumerate(rows):
        if len(r) != len(header):
            raise InputError(f"table {name!r} row {i}: expected {len(header)} values like "
                             f"the header, got {len(r)}")
    return name, header, rows


def _table_html(name, header, rows, *, caption="", max_rows=50) -> str:
    shown = rows[:max_rows]
    numeric = [bool(rows) and all(_is_num(r[j]) or r[j] is None for r in rows)
               for j in range(len(header))]
    out = ['<div class="table-wrap">']
    out.append("<table>")
    if caption:
        out.append(f"<caption>{_esc(caption)}</caption>")
    out.append("<thead><tr>" + "".join(
        f'<th scope="col"{" class=num" if numeric[j] else ""}>{_esc(h)}</th>'
        for j, h in enumerate(header)) + "</tr></thead>")
    out.append("<tbody>")
    for r in shown:
        out.append("<tr>" + "".join(
            f'<td{" class=num" if numeric[j] else ""}>{_esc(_fmt(v))}</td>'
            for j, v in enumerate(r)) + "</tr>")
    out.append("</tbody></table>")
    more = (f"showing {len(shown)} of {len(rows)} rows; " if len(rows) > len(shown) else "")
    out.append(f'<p class="table-note">{_esc(more)}full table: '
               f"<code>tables/{_esc(name)}.csv</code></p></div>")
    return "\n".join(out)


# --------------------------------------------------------------------------- blocks
_POSITIVE = {"discrete", "consistent", "pass", "passed", "yes", "reproduced", "stable"}
_NEGATIVE = {"not_discrete", "not discrete", "inconsistent", "fail", "failed", "no",
             "not_reproduced", "not reproduced", "unstable"}


def _verdict_html(v: Verdict, slug: str) -> str:
    if not isinstance(v, Verdict):
        raise InputError(f"verdicts: expected Verdict objects, got {type(v).__name__}")
    key = str(v.verdict).strip().lower()
    kind = "pos" if key in _POSITIVE else "neg" if key in _NEGATIVE else "neutral"
    shown = str(v.verdict).replace("_", " ")
    p = v.p_value
    ptxt = ("" if p is None else
            f'<span class="pval">p = {_esc(_fmt(float(p)))}</span>')
    out = [f'<article class="verdict verdict-{kind}" id="{slug}">',
           f'<header><h3>{_esc(v.name)}</h3>'
           f'<span class="badge badge-{kind}">{_esc(shown)}</span>{ptxt}</header>',
           '<div class="verdict-body"><div class="words">',
           _paragraphs(v.plain_words)]
    if v.numbers:
        out.append('<dl class="numbers">' + "".join(
            f"<dt>{_esc(k)}</dt><dd>{_esc(_fmt(val))}</dd>" for k, val in
            _flatten(v.numbers)) + "</dl>")
    out.append(f'<p class="caveat">{_esc(MODEL_NOT_BRAIN)}</p></div>')
    out.append('<aside class="assumptions"><h4>Assumptions</h4>')
    if v.assumptions:
        out.append("<dl>" + "".join(f"<dt>{_esc(k)}</dt><dd>{_esc(_fmt(val))}</dd>"
                                    for k, val in _flatten(v.assumptions)) + "</dl>")
    else:
        out.append("<p>none stated</p>")
    out.append("</aside></div></article>")
    return "\n".join(out)


def _block_html(block, ctx) -> str:
    if isinstance(block, str):
        return _paragraphs(block)
    if isinstance(block, Verdict):
        return _verdict_html(block, _slug("verdict-" + block.name, ctx["ids"]))
    if isinstance(block, FigureBlock):
        ctx["n_fig"] += 1
        k = ctx["n_fig"]
        uri, inches = _figure_uri(block)
        size = (f' style="width:{min(100.0, 100.0 * inches / _COLUMN_INCHES):.1f}%"'
                if inches else "")
        alt = block.name or block.caption or f"figure {k}"
        cap = (f"<figcaption><b>Figure {k}.</b> {_esc(block.caption)}</figcaption>"
               if block.caption else f"<figcaption><b>Figure {k}.</b></figcaption>")
        return (f'<figure id="{_slug("figure-" + str(k), ctx["ids"])}">'
                f'<img src="{uri}" alt="{_esc(alt)}"{size}>{cap}</figure>')
    if isinstance(block, TableBlock):
        name, header, rows = _check_table(block.name, block.header, block.rows)
        ctx["tables"].append((name, header, rows))
        return _table_html(name, header, rows, caption=block.caption,
                           max_rows=int(block.max_rows))
    raise InputError(f"section block: expected text, Verdict, FigureBlock or TableBlock, got "
                     f"{type(block).__name__}")


# --------------------------------------------------------------------------- page
_CSS = """
:root { --ink:#1b1b1b; --muted:#5a5a5a; --line:#d6d6d6; --soft:#f5f6f8; --blue:#0072B2;
  --verm:#D55E00; }
* { box-sizing: border-box; }
html { font-size: 16px; }
body { margin: 0; color: var(--ink); background: #fff;
  font-family: system-ui, -apple-system, "Segoe UI", "DejaVu Sans", "Liberation Sans",
  Arial, sans-serif; line-height: 1.5; }
main { max-width: 1040px; margin: 0 auto; padding: 28px 28px 60px; }
h1 { font-size: 1.9rem; margin: 0 0 4px; line-height: 1.2; }
h2 { font-size: 1.35rem; margin: 2.2rem 0 0.8rem; padding-bottom: 4px;
  border-bottom: 2px solid var(--ink); }
h3 { font-size: 1.1rem; margin: 0; }
h4 { font-size: 0.95rem; margin: 0 0 6px; color: var(--muted); text-transform: uppercase;
  letter-spacing: 0.04em; }
p { margin: 0.5rem 0; }
code { font-family: "DejaVu Sans Mono", Menlo, Consolas, monospace; font-size: 0.88em;
  word-break: break-all; }
.subtitle { color: var(--muted); margin: 0 0 18px; }
nav.toc { background: var(--soft); border: 1px solid var(--line); border-radius: 6px;
  padding: 10px 18px; margin: 14px 0 8px; }
nav.toc ol { margin: 4px 0; padding-left: 22px; columns: 2; column-gap: 36px; }
nav.toc a { color: var(--blue); text-decoration: none; }
nav.toc a:hover { text-decoration: underline; }
.cards { display: grid; grid-template-columns: repeat(auto-fill, minmax(170px, 1fr));
  gap: 10px; }
.card { border: 1px solid var(--line); border-radius: 6px; padding: 8px 12px;
  background: #fff; }
.card .label { font-size: 0.8rem; color: var(--muted); overflow-wrap: anywhere; }
.card .value { font-size: 1.25rem; font-weight: 600; overflow-wrap: anywhere; }
.verdict { border: 1px solid var(--line); border-left: 6px solid var(--muted);
  border-radius: 6px; padding: 12px 16px; margin: 12px 0; background: #fff; }
.verdict-pos { border-left-color: var(--blue); }
.verdict-neg { border-left-color: var(--verm); }
.verdict-neutral { border-left-style: double; }
.verdict header { display: flex; flex-wrap: wrap; align-items: baseline; gap: 12px;
  margin-bottom: 6px; }
.badge { display: inline-block; padding: 1px 10px; border-radius: 999px; font-weight: 700;
  font-size: 0.9rem; border: 2px solid; }
.badge-pos { color: var(--blue); border-color: var(--blue); }
.badge-neg { color: var(--verm); border-color: var(--verm); }
.badge-neutral { color: var(--muted); border-color: var(--muted); border-style: dashed; }
.pval { font-family: "DejaVu Sans Mono", Menlo, monospace; color: var(--muted); }
.verdict-body { display: grid; grid-template-columns: 3fr 2fr; gap: 18px; }
.assumptions { background: var(--soft); border-radius: 4px; padding: 8px 12px;
  font-size: 0.9rem; }
dl { display: grid; grid-template-columns: max-content 1fr; gap: 2px 12px; margin: 4px 0; }
dt { color: var(--muted); }
dd { margin: 0; overflow-wrap: anywhere; }
.caveat { font-size: 0.85rem; color: var(--muted); font-style: italic; }
figure { margin: 18px 0; }
figure img { display: block; max-width: 100%; height: auto; margin: 0 auto; }
figcaption { font-size: 0.9rem; color: var(--ink); margin-top: 6px; max-width: 90ch; }
.table-wrap { overflow-x: auto; margin: 12px 0; }
table { border-collapse: collapse; font-size: 0.88rem; min-width: 40%; }
caption { text-align: left; font-weight: 600; padding-bottom: 4px; }
th, td { padding: 3px 10px; border-bottom: 1px solid var(--line); text-align: left;
  vertical-align: top; overflow-wrap: anywhere; }
th { border-bottom: 2px solid var(--ink); }
.num { text-align: right; font-variant-numeric: tabular-nums; }
tbody tr:nth-child(even) { background: #fafafa; }
.table-note { font-size: 0.8rem; color: var(--muted); }
.cautions { border: 1px solid var(--verm); border-radius: 6px; padding: 8px 18px;
  background: #fff8f3; }
.cautions li { margin: 4px 0; }
footer { margin-top: 40px; color: var(--muted); font-size: 0.8rem; }
@media (max-width: 720px) {
  .verdict-body { grid-template-columns: 1fr; }
  nav.toc ol { columns: 1; }
}
@media print {
  @page { size: A4; margin: 14mm 12mm; }
  html { font-size: 10.5pt; }
  main { max-width: none; padding: 0; }
  nav.toc { background: none; }
  nav.toc a { color: var(--ink); }
  h2 { break-after: avoid; page-break-after: avoid; }
  h3, h4 { break-after: avoid; }
  figure, .verdict, .card, tr, .cautions { break-inside: avoid; page-break-inside: avoid; }
  figure img { max-height: 22cm; }
  .table-wrap { overflow: visible; }
  tbody tr:nth-child(even) { background: none; }
  .cautions { background: none; }
}
"""


def build_report(path, *, title: str, summary: Mapping, sections: list = (), methods: str = "",
                 cautions: list = (), versions: Mapping | None = None,
                 input_hash: str = "", verdicts: list = (), tables: Mapping | None = None,
                 tables_dir=None, subtitle: str = "") -> ReportFiles:
    """Write the self-contained HTML report and its CSV tables, atomically.

    Parameters
    ----------
    path : path-like
        The ``report.html`` to write (its folder is created if missing).
    title : str
    summary : dict
        Headline numbers ``{label: value}`` (nested dicts are flattened as
        ``group · label``), shown as cards at the top.
    sections : list of Section
        Figures, tables, text and verdicts, in order; each gets a table-of-contents entry.
    methods : str
        Methods text (generated by the caller from the resolved configuration).
    cautions : list of str
        Shown as a list; :data:`MODEL_NOT_BRAIN` is added first when no caution already
        says "not proof".
    versions : dict
        Software versions ``{package: version}``.
    input_hash : str
        Hash of every input file read.
    verdicts : list of Verdict
        Shown right after the summary.
    tables : dict {name: (header, rows)}, optional
        Extra tables, shown in a "Tables" section and written as CSV.
    tables_dir : path-like, optional
        Where CSV tables go; default ``tables/`` beside ``path``.
    subtitle : str
        A line under the title (e.g. the recording's name).

    Returns
    -------
    ReportFiles
        The HTML path and the CSV paths written.

    Raises
    ------
    InputError
        Bad table names or rows, duplicate table names, unreadable figure files, or
        blocks of an unknown type.
    """
    path = os.fspath(path)
    if not isinstance(summary, Mapping):
        raise InputError(f"summary: expected a dict of headline numbers, got "
                         f"{type(summary).__name__}")
    tables_dir = (os.path.join(os.path.dirname(os.path.abspath(path)), "tables")
                  if tables_dir is None else os.fspath(tables_dir))
    ids: set = {"summary", "verdicts", "methods", "cautions", "tables", "provenance", "top"}
    ctx = {"ids": ids, "n_fig": 0, "tables": []}
    toc = [("summary", "Summary")]
    body = []

    # summary cards
    cards = "".join(f'<div class="card"><div class="label">{_esc(k)}</div>'
                    f'<div class="value">{_esc(_fmt(v))}</div></div>'
                    for k, v in _flatten(summary))
    body.append(f'<section id="summary"><h2>Summary</h2><div class="cards">{cards}</div>'
                "</section>")
    # verdicts
    verdicts = list(verdicts or [])
    if verdicts:
        toc.append(("verdicts", "Verdicts"))
        body.append('<section id="verdicts"><h2>Verdicts</h2>' + "\n".join(
            _verdict_html(v, _slug("verdict-" + str(getattr(v, "name", "")), ids))
            for v in verdicts) + "</section>")
    # cautions (near the top: they frame everything below)
    caution_list = [str(c) for c in (cautions or [])]
    if not any("not proof" in c.lower() for c in caution_list):
        caution_list.insert(0, MODEL_NOT_BRAIN)
    cautions_html = ('<section id="cautions"><h2>Cautions</h2><ul class="cautions">'
                     + "".join(f"<li>{_esc(c)}</li>" for c in caution_list) + "</ul></section>")
    toc.append(("cautions", "Cautions"))
    body.append(cautions_html)
    # sections
    for sec in sections or []:
        if not isinstance(sec, Section):
            raise InputError(f"sections: expected Section objects, got {type(sec).__name__}")
        sid = _slug(sec.title, ids)
        toc.append((sid, str(sec.title)))
        inner = "\n".join(_block_html(b, ctx) for b in sec.blocks)
        body.append(f'<section id="{sid}"><h2>{_esc(sec.title)}</h2>\n{inner}\n</section>')
    # methods
    if methods:
        toc.append(("methods", "Methods"))
        body.append(f'<section id="methods"><h2>Methods</h2>{_paragraphs(methods)}</section>')
    # extra tables
    if tables:
        if not isinstance(tables, Mapping):
            raise InputError("tables: expected a dict {name: (header, rows)}")
        parts = []
        for name, val in tables.items():
            try:
                header, rows = val
            except (TypeError, ValueError):
                raise InputError(f"tables[{name!r}]: expected (header, rows)") from None
            name, header, rows = _check_table(name, header, rows)
            ctx["tables"].append((name, header, rows))
            parts.append(f"<h3>{_esc(name)}</h3>" + _table_html(name, header, rows))
        toc.append(("tables", "Tables"))
        body.append('<section id="tables"><h2>Tables</h2>' + "\n".join(parts) + "</section>")
    # provenance
    vers = dict(versions or {})
    prov_rows = "".join(f"<tr><td>{_esc(k)}</td><td><code>{_esc(v)}</code></td></tr>"
                        for k, v in sorted(vers.items(), key=lambda kv: str(kv[0])))
    toc.append(("provenance", "Versions and input"))
    body.append('<section id="provenance"><h2>Versions and input</h2>'
                f"<p>Input hash (every file read): <code>{_esc(input_hash or 'n/a')}</code></p>"
                '<div class="table-wrap"><table><thead><tr><th scope="col">software</th>'
                f'<th scope="col">version</th></tr></thead><tbody>{prov_rows}</tbody></table>'
                "</div></section>")

    names = [t[0] for t in ctx["tables"]]
    dup = sorted({n for n in names if names.count(n) > 1})
    if dup:
        raise InputError(f"table name: {dup[0]!r} is used by more than one table; expected "
                         "unique names (one CSV file each)")

    nav = ('<nav class="toc" aria-label="Contents"><b>Contents</b><ol>'
           + "".join(f'<li><a href="#{sid}">{_esc(label)}</a></li>' for sid, label in toc)
           + "</ol></nav>")
    generator = _esc(vers.get("attractorfit", ""))
    page = ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            f"<title>{_esc(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
            f'<main id="top">\n<h1>{_esc(title)}</h1>\n'
            + (f'<p class="subtitle">{_esc(subtitle)}</p>\n' if subtitle else "")
            + nav + "\n" + "\n".join(body)
            + f"\n<footer>Made by attractorfit {generator}. Input hash "
              f"<code>{_esc(input_hash or 'n/a')}</code>.</footer>\n</main>\n</body>\n</html>\n")

    csv_paths = []
    for name, header, rows in ctx["tables"]:
        p = os.path.join(tables_dir, f"{name}.csv")
        write_csv(p, header, rows)
        csv_paths.append(p)
    atomic_write(path, page)
    return ReportFiles(html=path, tables=csv_paths)
