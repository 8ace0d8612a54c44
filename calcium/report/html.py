"""A static, self-contained HTML report: sections, text, figures and sortable tables.

The report is one folder: ``index.html`` plus the images under ``figures/``,
referenced by relative paths, so the folder can be zipped, moved or opened
straight from disk. The page fetches nothing from the network: its style
sheet and its one small script are written inline, and a Content Security
Policy in the page forbids loading anything but its own images. Every piece
of text a caller passes in (titles, captions, ROI names, table cells) is
escaped with :func:`html.escape`, so a label such as ``<script>`` shows as
text and never runs.

Tables can be sorted by clicking a column heading (again to reverse the
order). A column whose cells are all numbers (or empty) sorts numerically;
others sort as text; empty cells (NaN, None) always go last.
"""
from __future__ import annotations

import html
import math
import numbers
import os
import re
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from .figures import figure_png_bytes

__all__ = ["HtmlReport"]

_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_-]{0,99}$")
_IMAGE_SUFFIXES = {".png": "png", ".jpg": "jpeg", ".jpeg": "jpeg", ".gif": "gif", ".svg": "svg",
                   ".webp": "webp"}
_FIGURE_FOLDER = "figures"

_CSS = """
:root {
  --ink: #1b2a49; --text: #26303f; --muted: #5d6675; --line: #d8dce3; --band: #f4f6f9;
  --accent: #d9730d; --flag: #fff4d6; --flag-edge: #d9a400; --link: #2f6fb2;
}
* { box-sizing: border-box; }
html { font-size: 16px; }
body {
  margin: 0; color: var(--text); background: #fff;
  font: 15px/1.55 system-ui, -apple-system, "Segoe UI", "Noto Sans", "DejaVu Sans", sans-serif;
}
header.masthead { background: var(--ink); color: #fff; padding: 1.6rem 2rem 1.3rem; }
header.masthead h1 { margin: 0; font-size: 1.6rem; font-weight: 650; letter-spacing: 0.01em; }
header.masthead p { margin: 0.35rem 0 0; color: #cfd6e4; }
main { max-width: 1120px; margin: 0 auto; padding: 1rem 2rem 2rem; }
nav.contents { border-left: 3px solid var(--accent); padding: 0.2rem 0 0.2rem 1rem; margin: 1rem 0 1.5rem; }
nav.contents h2 { font-size: 0.8rem; text-transform: uppercase; letter-spacing: 0.08em; color: var(--muted);
  margin: 0 0 0.3rem; border: 0; padding: 0; }
nav.contents ol { margin: 0; padding-left: 1.2rem; }
nav.contents a { color: var(--link); text-decoration: none; }
nav.contents a:hover { text-decoration: underline; }
section.part { margin: 0 0 2.2rem; }
section.part > h2 { font-size: 1.25rem; color: var(--ink); border-bottom: 1px solid var(--line);
  padding-bottom: 0.25rem; margin: 1.6rem 0 0.8rem; }
p { margin: 0.5rem 0 0.8rem; max-width: 75ch; }
p, figcaption, .caption, h1, h2, footer { overflow-wrap: anywhere; }  /* long paths break rather than spill */
pre { margin: 0.5rem 0 1rem; padding: 0.6rem 0.8rem; overflow-x: auto; background: var(--band);
  border: 1px solid var(--line); border-radius: 4px; font-size: 0.82rem; line-height: 1.4; }
figure.plot { margin: 1rem 0 1.6rem; }
figure.plot img { display: block; max-width: 100%; height: auto; border: 1px solid var(--line);
  border-radius: 4px; background: #fff; }
figure.plot figcaption, .table-wrap .caption { color: var(--muted); font-size: 0.9rem; margin-top: 0.4rem;
  max-width: 90ch; }
.table-wrap { margin: 1rem 0 1.6rem; overflow-x: auto; max-height: 70vh; overflow-y: auto;
  border: 1px solid var(--line); border-radius: 4px; }
.table-wrap .caption { padding: 0.4rem 0.6rem; margin: 0; max-width: none; background: var(--band);
  border-bottom: 1px solid var(--line); position: sticky; left: 0; }
table.data { border-collapse: collapse; width: 100%; font-size: 0.88rem; font-variant-numeric: tabular-nums; }
table.data th, table.data td { padding: 0.3rem 0.7rem; border-bottom: 1px solid var(--line); text-align: left;
  white-space: nowrap; }
table.data td.num, table.data th.num { text-align: right; }
table.data thead th { position: sticky; top: 0; background: #fff; color: var(--ink); font-weight: 600;
  box-shadow: inset 0 -2px 0 var(--line); }
table.data tbody tr:nth-child(even) { background: var(--band); }
table.data tbody tr.flagged { background: var(--flag); box-shadow: inset 4px 0 0 var(--flag-edge); }
table.data td.empty { color: var(--muted); }
table.data th button.sort { all: unset; cursor: pointer; display: inline-flex; gap: 0.3rem; align-items: center; }
table.data th button.sort:focus-visible { outline: 2px solid var(--link); outline-offset: 2px; }
table.data th button.sort::after { content: "\\2195"; color: #a7aebb; font-size: 0.8em; }
table.data th[aria-sort="ascending"] button.sort::after { content: "\\25B2"; color: var(--accent); }
table.data th[aria-sort="descending"] button.sort::after { content: "\\25BC"; color: var(--accent); }
.warning { display: none; background: var(--flag); border-left: 4px solid var(--flag-edge);
  padding: 0.5rem 0.8rem; margin: 1rem 0; }
.warning.shown { display: block; }
footer { max-width: 1120px; margin: 0 auto; padding: 1rem 2rem 2rem; color: var(--muted); font-size: 0.85rem;
  border-top: 1px solid var(--line); }
@media print {
  header.masthead { background: none; color: var(--ink); padding: 0; }
  header.masthead p { color: var(--muted); }
  .table-wrap { max-height: none; overflow: visible; }
  nav.contents { display: none; }
}
"""

# Sorting (numbers numerically, text by locale, empty cells last) and the count
# of figures that loaded, written on <body> as data-images-loaded/-total.
_SCRIPT = """
(function () {
  "use strict";
  function key(cell) {
    var v = cell.getAttribute("data-value");
    return v === null ? cell.textContent.trim() : v;
  }
  function isNumber(text) { return text !== "" && !isNaN(Number(text)); }
  function sortBy(table, column, heading) {
    var body = table.tBodies[0];
    var rows = Array.prototype.slice.call(body.rows);
    var ascending = heading.getAttribute("aria-sort") !== "ascending";
    var keys = rows.map(function (row) { return key(row.cells[column]); });
    var numeric = keys.every(function (k) { return k === "" || isNumber(k); });
    var order = rows.map(function (row, i) { return i; });
    order.sort(function (a, b) {
      var x = keys[a], y = keys[b];
      if (x === "" || y === "") {
        if (x === y) { return a - b; }
        return x === "" ? 1 : -1;
      }
      var c = numeric ? Number(x) - Number(y) : x.localeCompare(y, undefined, {numeric: true});
      if (c === 0) { return a - b; }
      return ascending ? c : -c;
    });
    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (th) { th.removeAttribute("aria-sort"); });
    heading.setAttribute("aria-sort", ascending ? "ascending" : "descending");
    order.forEach(function (i) { body.appendChild(rows[i]); });
  }
  document.querySelectorAll("table.sortable").forEach(function (table) {
    Array.prototype.forEach.call(table.tHead.rows[0].cells, function (th, column) {
      var button = th.querySelector("button.sort");
      if (button) { button.addEventListener("click", function () { sortBy(table, column, th); }); }
    });
  });
  window.addEventListener("load", function () {
    var images = document.images, loaded = 0;
    for (var i = 0; i < images.length; i++) {
      if (images[i].complete && images[i].naturalWidth > 0) { loaded++; }
    }
    document.body.dataset.imagesLoaded = String(loaded);
    document.body.dataset.imagesTotal = String(images.length);
    // what sticks out of its container at this window width (tables and preformatted text scroll inside their
    // own box, so what they hold is not counted)
    var out = [], boxes = document.querySelectorAll("header *, main *, footer *");
    for (var j = 0; j < boxes.length; j++) {
      var el = boxes[j], parent = el.parentElement;
      if (el.closest(".table-wrap, pre") && !el.matches(".table-wrap, pre")) { continue; }
      var r = el.getBoundingClientRect(), p = parent.getBoundingClientRect();
      var spills = el.clientWidth > 0 && el.scrollWidth > el.clientWidth + 1 &&
        getComputedStyle(el).overflowX === "visible";  // (text wider than its own box)
      if (r.width > 0 && (spills || r.right > p.right + 1 || r.left < p.left - 1)) {
        out.push(el.tagName.toLowerCase() + (el.className ? "." + el.className : ""));
      }
    }
    if (document.documentElement.scrollWidth > window.innerWidth + 1) { out.push("page wider than the window"); }
    document.body.dataset.viewportWidth = String(window.innerWidth);
    document.body.dataset.overflowing = String(out.length);
    document.body.dataset.overflowingWhat = out.slice(0, 8).join(" ");
    if (loaded < images.length) {
      var note = document.getElementById("missing-images");
      note.textContent = (images.length - loaded) + " of " + images.length +
        " figure(s) could not be shown: keep index.html and the figures folder together.";
      note.className = "warning shown";
    }
  });
})();
"""

# Only the page's own inline style and script, and images from its folder.
_POLICY = ("default-src 'none'; img-src 'self' file: data:; style-src 'unsafe-inline'; "
           "script-src 'unsafe-inline'; base-uri 'none'; form-action 'none'")


def _text(value, name: str) -> str:
    if not isinstance(value, str):
        raise ValueError(f"{name} must be a string, got {type(value).__name__}")
    return value


def _paragraphs(text: str) -> str:
    """Escaped paragraphs: blank lines separate them, single newlines become spaces."""
    blocks = [" ".join(block.split()) for block in re.split(r"\n\s*\n", text)]
    return "".join(f"<p>{html.escape(block)}</p>\n" for block in blocks if block)


def _slug(text: str, taken: set) -> str:
    base = re.sub(r"[^a-z0-9]+", "-", text.lower()).strip("-")[:40] or "section"
    slug, k = base, 2
    while slug in taken:
        slug, k = f"{base}-{k}", k + 1
    taken.add(slug)
    return slug


def _cell(value) -> tuple[str, str | None, bool]:
    """(display text, sort key or None to sort by the text, is numeric) for one table cell."""
    if value is None:
        return "", "", False
    if isinstance(value, (bool, np.bool_)):
        return ("yes" if value else "no"), None, False
    if isinstance(value, numbers.Integral):
        return str(int(value)), str(int(value)), True
    if isinstance(value, numbers.Real):
        number = float(value)
        if math.isnan(number):
            return "", "", True
        if math.isinf(number):
            return ("∞" if number > 0 else "−∞"), ("Infinity" if number > 0 else "-Infinity"), True
        return f"{number:.3g}", repr(number), True  # (3 significant digits: what a table reader can use)
    return str(value), None, False


@dataclass
class _Image:
    file_name: str
    data: bytes


@dataclass
class _Section:
    heading: str
    slug: str
    parts: list = field(default_factory=list)


class HtmlReport:
    """A report page built up piece by piece and written as a folder.

    Parameters
    ----------
    title : str
        Page title (shown at the top and in the browser tab).
    subtitle : str
        One line under the title (data set, date of recording, ...).

    Notes
    -----
    Pieces are added in reading order. Anything added before the first
    :meth:`add_section` goes into an untitled opening section. Figures are
    rendered to PNG when they are added (and the Figure closed), so a report
    with many figures holds only their compressed images.

    Examples
    --------
    >>> import tempfile
    >>> report = HtmlReport("Session 12", subtitle="visual cortex, 30 Hz")
    >>> report.add_section("Summary", "Three ROIs, no missing frames.")
    >>> report.add_table(["ROI", "noise SD (ΔF/F)"], [[0, 0.021], [1, 0.013], [2, 0.034]])
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     page = report.write(folder)
    ...     page.name, "Session 12" in page.read_text(encoding="utf-8")
    ('index.html', True)
    """

    def __init__(self, title, *, subtitle=""):
        self.title = _text(title, "title")
        self.subtitle = _text(subtitle, "subtitle")
        self._sections: list[_Section] = []
        self._slugs: set = set()
        self._images: dict[str, _Image] = {}
        self._n_tables = 0

    # -- building -------------------------------------------------------
    def _current(self) -> _Section:
        if not self._sections:
            self._sections.append(_Section("", _slug("overview", self._slugs)))
        return self._sections[-1]

    def add_section(self, heading, text="") -> None:
        """Start a new section with a heading (listed in the contents) and optional text.

        Parameters
        ----------
        heading : str
        text : str
            Paragraphs (separated by blank lines) under the heading.
        """
        heading = _text(heading, "heading")
        if not heading.strip():
            raise ValueError("heading must not be empty")
        self._sections.append(_Section(heading, _slug(heading, self._slugs)))
        self.add_text(text)

    def add_text(self, text, *, preformatted=False) -> None:
        """Add paragraphs of plain text (blank lines separate paragraphs; no markup is interpreted).

        With ``preformatted=True`` the text keeps its line breaks and spacing (a
        fixed-width block), for tables and summaries printed as text.
        """
        text = _text(text, "text")
        if not text.strip():
            return
        if preformatted:
            self._current().parts.append(f"<pre>{html.escape(text.rstrip())}</pre>\n")
        else:
            self._current().parts.append(_paragraphs(text))

    def add_figure(self, path_or_fig, *, caption, name=None, alt=None, dpi=100) -> str:
        """Add a figure: a matplotlib Figure or an existing image file.

        Parameters
        ----------
        path_or_fig : matplotlib.figure.Figure or str or path-like
            A Figure is rendered to PNG now (and closed); an image file
            (.png, .jpg, .jpeg, .gif, .svg, .webp) is read now. Either way it
            is written to ``figures/<name>.<suffix>`` in the report folder.
        caption : str
            Text under the figure.
        name : str, optional
            File name stem: letters, digits, ``-`` and ``_``, unique within
            the report. Default ``figure-<n>``.
        alt : str, optional
            Text for readers who cannot see the image (default: the caption).
        dpi : float
            Resolution for a Figure (pixels per inch).

        Returns
        -------
        str
            The relative path of the image inside the report folder.
        """
        caption = _text(caption, "caption")
        alt = caption if alt is None else _text(alt, "alt")
        if name is None:
            k = len(self._images) + 1
            while f"figure-{k}" in self._images:
                k += 1
            name = f"figure-{k}"
        name = _text(name, "name")
        if not _NAME.match(name):
            raise ValueError(f"name must be 1-100 letters, digits, '-' or '_' (starting with a letter or digit), "
                             f"got {name!r}")
        if name in self._images:
            raise ValueError(f"name {name!r} is already used by another figure of this report")
        if isinstance(path_or_fig, Figure):
            data, suffix = figure_png_bytes(path_or_fig, dpi=dpi, close=True), ".png"
        elif isinstance(path_or_fig, (str, os.PathLike)):
            source = Path(path_or_fig)
            suffix = source.suffix.lower()
            if suffix not in _IMAGE_SUFFIXES:
                raise ValueError(f"path_or_fig must be an image file ({', '.join(sorted(_IMAGE_SUFFIXES))}), "
                                 f"got {str(source)!r}")
            if not source.is_file():
                raise ValueError(f"path_or_fig {str(source)!r} is not an existing file")
            data = source.read_bytes()
        else:
            raise ValueError(f"path_or_fig must be a matplotlib Figure or a path to an image file, "
                             f"got {type(path_or_fig).__name__}")
        file_name = f"{name}{suffix}"
        self._images[name] = _Image(file_name, data)
        relative = f"{_FIGURE_FOLDER}/{file_name}"
        self._current().parts.append(
            f'<figure class="plot" id="fig-{html.escape(name)}">\n'
            f'<img src="{html.escape(relative)}" alt="{html.escape(alt)}" loading="eager">\n'
            + (f"<figcaption>{html.escape(caption)}</figcaption>\n" if caption else "")
            + "</figure>\n")
        return relative

    def add_table(self, header, rows, *, sortable=True, caption="", flags=None) -> None:
        """Add a table (typically one row per ROI), sortable by clicking a heading.

        Parameters
        ----------
        header : sequence of str
            Column headings.
        rows : iterable of sequences
            One sequence per row, as long as ``header``. Numbers are shown
            with 3 significant digits and sorted by their full value; None
            and NaN show as empty cells that sort last; ±inf as ±∞.
        sortable : bool
            Make the columns sortable by a click on their heading.
        caption : str
            Text above the table.
        flags : sequence, optional
            One entry per row: a non-empty string (or True) highlights the row
            and the string is shown in an extra "note" column; None, False or
            "" leave the row plain.
        """
        header = [_text(h, "header entries") for h in _sequence(header, "header")]
        if not header:
            raise ValueError("header must name at least one column")
        caption = _text(caption, "caption")
        table_rows = []
        for number, row in enumerate(rows):
            row = _sequence(row, f"rows[{number}]")
            if len(row) != len(header):
                raise ValueError(f"rows[{number}] has {len(row)} value(s), the header has {len(header)}")
            table_rows.append(row)
        notes = [""] * len(table_rows)
        if flags is not None:
            flags = _sequence(flags, "flags")
            if len(flags) != len(table_rows):
                raise ValueError(f"flags must have one entry per row ({len(table_rows)}), got {len(flags)}")
            for i, flag in enumerate(flags):
                if flag is None or flag is False or flag == "":
                    continue
                notes[i] = "flagged" if flag is True else _text(flag, f"flags[{i}]")
        with_notes = any(notes)
        columns = header + (["note"] if with_notes else [])
        self._n_tables += 1
        table_id = f"table-{self._n_tables}"
        out = ['<div class="table-wrap">\n']
        if caption:
            out.append(f'<p class="caption" id="{table_id}-caption">{html.escape(caption)}</p>\n')
        described = f' aria-describedby="{table_id}-caption"' if caption else ""
        out.append(f'<table class="data{" sortable" if sortable else ""}" id="{table_id}"{described}>\n<thead><tr>')
        cells = [[_cell(value) for value in list(row) + ([note] if with_notes else [])]
                 for row, note in zip(table_rows, notes)]
        # a column of numbers (empty cells aside) is right-aligned, heading included
        numeric = [bool(cells) and all(c[k][2] or c[k][0] == "" for c in cells) for k in range(len(columns))]
        for heading, is_number in zip(columns, numeric):
            label = html.escape(heading)
            th = '<th scope="col" class="num">' if is_number else '<th scope="col">'
            out.append(f'{th}<button type="button" class="sort">{label}</button></th>'
                       if sortable else f"{th}{label}</th>")
        out.append("</tr></thead>\n<tbody>\n")
        for row_cells, note in zip(cells, notes):
            out.append(f'<tr class="flagged" title="{html.escape(note)}">' if note else "<tr>")
            for text, sort_key, is_number in row_cells:
                classes = [c for c, on in (("num", is_number), ("empty", text == "")) if on]
                attrs = f' class="{" ".join(classes)}"' if classes else ""
                if sort_key is not None:
                    attrs += f' data-value="{html.escape(sort_key)}"'
                out.append(f"<td{attrs}>{html.escape(text)}</td>")
            out.append("</tr>\n")
        out.append("</tbody>\n</table>\n</div>\n")
        self._current().parts.append("".join(out))

    # -- output ---------------------------------------------------------
    def to_html(self, *, created=None) -> str:
        """The page as a string (``created``: time stamp for the footer, default now)."""
        from .. import __version__

        created = created or datetime.now().astimezone().isoformat(timespec="seconds")
        titled = [s for s in self._sections if s.heading]
        out = [
            "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n",
            '<meta name="viewport" content="width=device-width, initial-scale=1">\n',
            f'<meta http-equiv="Content-Security-Policy" content="{_POLICY}">\n',
            f'<meta name="generator" content="calcium {html.escape(__version__)}">\n',
            f"<title>{html.escape(self.title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n",
            f'<header class="masthead">\n<h1>{html.escape(self.title)}</h1>\n',
            f"<p>{html.escape(self.subtitle)}</p>\n" if self.subtitle else "",
            "</header>\n<main>\n",
            '<div id="missing-images" class="warning" role="alert"></div>\n',
        ]
        if len(titled) >= 2:
            out.append('<nav class="contents" aria-label="Contents">\n<h2>Contents</h2>\n<ol>\n')
            out.extend(f'<li><a href="#{s.slug}">{html.escape(s.heading)}</a></li>\n' for s in titled)
            out.append("</ol>\n</nav>\n")
        for section in self._sections:
            out.append(f'<section class="part" id="{section.slug}">\n')
            if section.heading:
                out.append(f"<h2>{html.escape(section.heading)}</h2>\n")
            out.extend(section.parts)
            out.append("</section>\n")
        out.append("</main>\n<footer>\n")
        out.append(f"<p>Made with calcium {html.escape(__version__)} on "
                   f'<time datetime="{html.escape(created)}">{html.escape(created)}</time>.</p>\n')
        out.append(f"</footer>\n<script>{_SCRIPT}</script>\n</body>\n</html>\n")
        return "".join(out)

    def write(self, folder) -> Path:
        """Write the report into ``folder`` (created if needed) and return the path of ``index.html``.

        Images go to ``folder/figures/``; every file is written atomically
        (temporary file, then :func:`os.replace`), images first, so
        ``index.html`` never points at a half-written image. Other files in
        the folder are left alone.

        Raises
        ------
        ValueError
            If ``folder`` (or ``folder/figures``) exists and is not a folder.
        """
        from ..io.results import atomic_output

        folder = Path(folder)
        if folder.exists() and not folder.is_dir():
            raise ValueError(f"folder {str(folder)!r} is a file, not a folder; choose another place for the report")
        figures = folder / _FIGURE_FOLDER
        if figures.exists() and not figures.is_dir():
            raise ValueError(f"{str(figures)!r} is a file; the report needs it to be a folder for its images")
        folder.mkdir(parents=True, exist_ok=True)
        if self._images:
            figures.mkdir(exist_ok=True)
        for image in self._images.values():
            with atomic_output(figures / image.file_name) as tmp:
                tmp.write_bytes(image.data)
        page = folder / "index.html"
        with atomic_output(page) as tmp:
            tmp.write_text(self.to_html(), encoding="utf-8")
        return page


def _sequence(value, name: str) -> list:
    if isinstance(value, (str, bytes)) or not hasattr(value, "__iter__"):
        raise ValueError(f"{name} must be a sequence (list, tuple or array), got {type(value).__name__}")
    return list(value)
