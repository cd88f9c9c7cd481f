"""The study report's HTML: numbers in words, tables, figure blocks, anchors and the page (pure functions).

The report job (``foldwise.jobs.report``) builds one HTML fragment per
section and hands them to :func:`render_page`, which adds the table of
contents (one entry per section, with sub-entries per analysis, ROI and map)
and the screen and print styles. Nothing here reads a file.
"""

import base64
import html
import math
import re

from foldwise.errors import InputError

__all__ = [
    "DIRECTION_TOOLTIP",
    "anchor",
    "direction_tooltip",
    "format_number",
    "format_p",
    "html_table",
    "figure_block",
    "render_page",
]

DIRECTION_TOOLTIP = "train on {train}, test on {test}"


def anchor(*parts):
    """A stable, lower-case HTML id from name parts (analysis, ROI, map ...).

    Examples
    --------
    >>> anchor("analysis", "shape", "roi", "ember")
    'analysis-shape-roi-ember'
    >>> anchor("map", "carry_Over")
    'map-carry-over'
    """
    text = "-".join(str(part) for part in parts).lower()
    text = re.sub(r"[^a-z0-9]+", "-", text).strip("-")
    return text if re.match(r"[a-z]", text) else f"id-{text}"


def direction_tooltip(direction):
    """A direction's name in plain words, for a tooltip; the name itself stays as in the tables.

    Examples
    --------
    >>> direction_tooltip("seen->heard")
    'train on seen, test on heard'
    >>> direction_tooltip("seen<->heard")
    'mean of seen->heard and heard->seen'
    >>> direction_tooltip("within")
    'train and test on the same conditions (leave-one-run-out)'
    """
    if direction == "within":
        return "train and test on the same conditions (leave-one-run-out)"
    if "<->" in direction:
        first, second = direction.split("<->", 1)
        return f"mean of {first}->{second} and {second}->{first}"
    if "->" in direction:
        train, test = direction.split("->", 1)
        return DIRECTION_TOOLTIP.format(train=train, test=test)
    return direction


def format_number(value, digits=3):
    """A proportion or statistic with fixed decimals; ``n/a`` for missing values.

    Examples
    --------
    >>> format_number(0.41666), format_number(float("nan"))
    ('0.417', 'n/a')
    """
    try:
        value = float(value)
    except (TypeError, ValueError):
        return "n/a"
    return "n/a" if not math.isfinite(value) else f"{value:.{digits}f}"


def format_p(value, n_draws=None):
    """A p-value with three significant digits, or its resolution when it is the smallest a test can give.

    Parameters
    ----------
    value : float
    n_draws : int, optional
        Draws of the permutation or sign-flip test that gave ``value``. Its
        smallest attainable p is 1 / (n_draws + 1) (Phipson & Smyth 2010,
        "Permutation p-values should never be zero"); at that value the text
        is ``< 1/n_draws (n draws)`` because the test cannot say more.

    Examples
    --------
    >>> format_p(0.0099009901), format_p(0.5), format_p(None)
    ('0.0099', '0.5', 'n/a')
    >>> format_p(1 / 10001, n_draws=10000)
    '< 0.0001 (10,000 draws)'
    >>> format_p(0.03, n_draws=10000)
    '0.03'
    """
    try:
        value = float(value)
    except (TypeError, ValueError):
        return "n/a"
    if not math.isfinite(value):
        return "n/a"
    if n_draws and value <= (1.0 + 1e-9) / (int(n_draws) + 1):
        return f"< {1.0 / int(n_draws):.2g} ({int(n_draws):,} draws)"
    return f"{value:.3g}"


def html_table(header, rows, caption=None, row_classes=None, wide=False, header_titles=None, table_id=None):
    """An HTML table of text cells (escaped).

    Parameters
    ----------
    header : sequence of str
    rows : sequence of sequence
        Cells (converted with ``str``).
    caption : str, optional
    row_classes : sequence of str, optional
        A CSS class per row ("" for none).
    wide : bool
        Compact cells; on screen a horizontal scroll bar when the table is
        wider than the page, on paper wrapped headers so every column prints.
    header_titles : sequence of str, optional
        A plain-language tooltip per column ("" for none).
    table_id : str, optional

    Returns
    -------
    str
    """
    identity = f" id=\"{html.escape(table_id)}\"" if table_id else ""
    parts = [f"<div class=\"wide\"><table class=\"compact\"{identity}>" if wide else f"<table{identity}>"]
    if caption:
        parts.append(f"<caption>{html.escape(caption)}</caption>")
    titles = list(header_titles) if header_titles else [""] * len(header)
    parts.append("<thead><tr>" + "".join(
        f"<th scope=\"col\"{' title=' + chr(34) + html.escape(title) + chr(34) if title else ''}>{html.escape(str(cell))}</th>"
        for cell, title in zip(header, titles)) + "</tr></thead><tbody>")
    for number, row in enumerate(rows):
        css = row_classes[number] if row_classes else ""
        opening = f"<tr class=\"{html.escape(css)}\">" if css else "<tr>"
        parts.append(opening + "".join(f"<td>{html.escape(str(cell))}</td>" for cell in row) + "</tr>")
    parts.append("</tbody></table></div>" if wide else "</tbody></table>")
    return "".join(parts)


def figure_block(png_bytes, stem, alt, caption, formats=("png", "svg", "pdf"), heading=None, heading_id=None,
                 files_dir="figures", files_note=None):
    """One figure: its screen PNG embedded as a data URI, its caption and links to its files.

    Parameters
    ----------
    png_bytes : bytes
        The screen preview (the publication files stay on disk, linked).
    stem : str
        File stem under ``files_dir``.
    alt : str
        Text alternative of the image.
    caption : str
    formats : sequence of str
        The formats written, linked under the caption.
    heading : str, optional
        A heading kept on the same printed page as the figure.
    heading_id : str, optional
        The heading's anchor.
    files_dir : str
        The figures' folder relative to the page (links only: nothing is loaded).
    files_note : str, optional
        Said after the links (e.g. which target writes the files).

    Returns
    -------
    str
    """
    if not png_bytes.startswith(b"\x89PNG\r\n\x1a\n"):
        raise InputError(None, stem, "the figure is not a PNG image", "rerun the report job")
    data = base64.b64encode(png_bytes).decode("ascii")
    files = ", ".join(f"<a href=\"{html.escape(f'{files_dir}/{stem}.{suffix}')}\">{html.escape(f'{files_dir}/{stem}.{suffix}')}</a>"
                      for suffix in formats)
    title = ""
    if heading:
        identity = f" id=\"{html.escape(heading_id)}\"" if heading_id else ""
        title = f"<h4{identity}>{html.escape(heading)}</h4>"
    return (f"<figure id=\"fig-{html.escape(stem)}\">{title}<img src=\"data:image/png;base64,{data}\" "
            f"alt=\"{html.escape(alt)}\"><figcaption>{html.escape(caption)} "
            f"<span class=\"files\">Files: {files}{' (' + html.escape(files_note) + ')' if files_note else ''}</span>"
            "</figcaption></figure>")


_STYLE = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif; color: #1a1a1a;
       background: #ffffff; margin: 0; line-height: 1.45; }
main { max-width: 1320px; margin: 0 auto; padding: 1rem 1.5rem 3rem; }
h1 { font-size: 1.7rem; margin-bottom: 0.2rem; }
h2 { border-bottom: 2px solid #0072B2; padding-bottom: 0.2rem; margin-top: 2.2rem; }
h3 { margin-top: 1.6rem; }
nav.contents { font-size: 0.92rem; columns: 2 22rem; background: #f6f8fa; padding: 0.6rem 1rem; }
nav.contents ul { margin: 0.1rem 0; padding-left: 1.1rem; }
nav.contents > ul { padding-left: 0; list-style: none; }
nav.contents li { break-inside: avoid; }
.answer { border: 2px solid #0072B2; background: #f0f6fb; padding: 0.6rem 1.2rem; margin: 1rem 0; }
.answer h3 { margin-top: 0.6rem; }
.answer li { margin: 0.25rem 0; }
.answer .caveat { font-size: 0.88rem; color: #333333; }
table { border-collapse: collapse; margin: 0.6rem 0 1rem; font-size: 0.9rem; }
caption { text-align: left; font-weight: 600; padding: 0.3rem 0; }
th, td { border: 1px solid #c8c8c8; padding: 0.25rem 0.5rem; text-align: left; vertical-align: top; }
th { background: #eef3f8; }
th[title] { text-decoration: underline dotted; cursor: help; }
tr.survives td { font-weight: 700; }
.wide { overflow-x: auto; max-width: 100%; }
table.compact { font-size: 0.78rem; }
table.compact th, table.compact td { padding: 0.2rem 0.35rem; }
figure { margin: 0.8rem 0 1.4rem; }
figure img { max-width: 100%; height: auto; border: 1px solid #e0e0e0; }
figcaption { font-size: 0.88rem; color: #333333; max-width: 70rem; }
.files { color: #555555; font-family: ui-monospace, "DejaVu Sans Mono", monospace; font-size: 0.8rem; }
.gallery { display: flex; flex-wrap: wrap; gap: 1rem; align-items: flex-start; }
.gallery figure { margin: 0; max-width: 46%; }
.caution { border-left: 5px solid #D55E00; background: #fdf3ec; padding: 0.6rem 1rem; }
.warnings li { font-family: ui-monospace, "DejaVu Sans Mono", monospace; font-size: 0.82rem; }
code, pre { font-family: ui-monospace, "DejaVu Sans Mono", monospace; background: #f4f4f4; }
pre { padding: 0.5rem 0.8rem; overflow-x: auto; white-space: pre-wrap; }
@page { size: A4; margin: 14mm 12mm; }
@page wide-table { size: A4 landscape; margin: 12mm 10mm; }
@media print {
  body { font-size: 10pt; line-height: 1.3; }
  main { max-width: none; padding: 0; }
  nav.contents { columns: 2; background: none; border: 1px solid #c8c8c8; }
  h2 { break-before: page; margin-top: 0; }
  section#summary h2 { break-before: auto; }
  h2, h3, h4, caption { break-after: avoid; page-break-after: avoid; }
  figure, .answer li, tr { break-inside: avoid; page-break-inside: avoid; }
  figure img { max-height: 230mm; width: auto; max-width: 100%; border: none; }
  .wide { overflow: visible; page: wide-table; }
  table { width: 100%; table-layout: fixed; }
  table.compact { font-size: 7pt; }
  table.compact th, table.compact td { padding: 1px 2px; overflow-wrap: break-word; }
  thead { display: table-header-group; }
  .gallery figure { max-width: 48%; }
  a { color: inherit; text-decoration: none; }
}
"""


def render_page(title, sections, lead=""):
    """The whole page: title, table of contents and sections; no script, no external resource.

    Parameters
    ----------
    title : str
    sections : sequence of tuple
        ``(id, heading, inner HTML)`` or ``(id, heading, inner HTML,
        entries)`` where ``entries`` lists ``(anchor, label)`` or ``(anchor,
        label, sub-entries)`` shown under the section in the contents.
    lead : str
        HTML between the title and the contents (a one-line note).

    Returns
    -------
    str
    """
    items, body = [], []
    for section in sections:
        section_id, heading, inner = section[:3]
        entries = section[3] if len(section) > 3 else ()
        if not re.fullmatch(r"[a-z][a-z0-9-]*", section_id):
            raise InputError(None, "section id", f"{section_id!r} is not a lower-case identifier", "rename the section")
        items.append(f"<li><a href=\"#{section_id}\">{html.escape(heading)}</a>{_entries(entries)}</li>")
        body.append(f"<section id=\"{section_id}\"><h2>{html.escape(heading)}</h2>{inner}</section>")
    return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
            f"<title>{html.escape(title)}</title><style>{_STYLE}</style></head><body><main>"
            f"<h1>{html.escape(title)}</h1>{lead}<nav class=\"contents\" aria-label=\"contents\"><ul>{''.join(items)}</ul>"
            f"</nav>{''.join(body)}</main></body></html>\n")


def _entries(entries):
    if not entries:
        return ""
    parts = []
    for entry in entries:
        target, label = entry[:2]
        children = entry[2] if len(entry) > 2 else ()
        parts.append(f"<li><a href=\"#{html.escape(target)}\">{html.escape(label)}</a>{_entries(children)}</li>")
    return "<ul>" + "".join(parts) + "</ul>"
