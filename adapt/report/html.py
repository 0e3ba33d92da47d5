"""Self-contained HTML report pages: one file, inline CSS, figures as data: URIs.

A page opens offline in any browser and prints cleanly: no scripts, no web fonts, no
external style sheets, images or links. Every piece of text that came from outside
(scene names, source names, processor labels, table cells) is escaped with
:func:`html.escape`; only fragments built by this module's helpers are inserted as
markup. Fragments are :class:`Markup` strings; a plain ``str`` given as a section part is
escaped and shown as a paragraph.

Building blocks:

* :func:`paragraph`, :func:`preformatted`, :func:`caution`, :func:`table` (rows of
  sequences or mappings), :func:`figure` (PNG bytes -> ``<figure>`` with an ``<img>``
  whose ``src`` is ``data:image/png;base64,...``, an alt text and a caption),
  :func:`definition_list`;
* :func:`build_page` ``(title, sections)`` - the whole HTML5 document; a section is a
  ``(heading, parts)`` pair, ``parts`` a list of fragments or plain strings;
* :func:`compare_report` - the layout of a processor comparison (title, caution, scene
  summary, score table, figures).

Standards: HTML5 (WHATWG Living Standard) document structure; data: URIs, RFC 2397;
base64, RFC 4648.
"""
from __future__ import annotations

import base64
import html
from typing import Any, Iterable, Mapping, Sequence

import numpy as np

from adapt.report.figures import FIGURE_TEXT, is_png
from adapt.report.numbers import format_number

__all__ = ["Markup", "escape", "paragraph", "preformatted", "caution", "table", "figure",
           "definition_list", "png_data_uri", "build_page", "compare_report",
           "CAUTION_TEXT", "STYLE"]

CAUTION_TEXT = ("Simulation only. Results come from a model of the array, the sources and "
                "the receiver, not from measurements. Transmitting interference (jamming) is "
                "unlawful in most places. Validate against measured hardware before fielding "
                "any of these processors.")


class Markup(str):
    """A string of HTML markup built by this module (inserted as is, not escaped)."""


def escape(text: Any) -> str:
    """``html.escape(str(text), quote=True)``."""
    return html.escape(str(text), quote=True)


def _part(p: Any) -> Markup:
    if isinstance(p, Markup):
        return p
    if isinstance(p, str):
        return paragraph(p)
    raise ValueError(f"a section part must be markup from adapt.report.html or text, "
                     f"got {type(p).__name__}")


def paragraph(text: str, css_class: str | None = None) -> Markup:
    """``<p>`` with escaped text."""
    cls = f' class="{escape(css_class)}"' if css_class else ""
    return Markup(f"<p{cls}>{escape(text)}</p>")


def preformatted(text: str, wrap: bool = False) -> Markup:
    """``<pre>`` block with escaped text (fixed-width summaries); ``wrap``: long lines
    wrap inside the page instead of scrolling sideways (nothing is hidden)."""
    cls = ' class="wrap"' if wrap else ""
    return Markup(f"<pre{cls}>{escape(text)}</pre>")


def caution(text: str = CAUTION_TEXT) -> Markup:
    """A boxed caution paragraph."""
    return Markup(f'<p class="caution"><strong>Caution.</strong> {escape(text)}</p>')


def _cell_text(value: Any, digits: int) -> tuple[str, bool]:
    """(text, is_number) for one table cell."""
    if value is None:
        return "", False
    if isinstance(value, (bool, np.bool_)):
        return ("yes" if value else "no"), False
    if isinstance(value, (int, np.integer)):
        return f"{int(value)}", True
    if isinstance(value, (float, np.floating)):
        return format_number(value, digits), True
    return str(value), False


def table(rows: Sequence, header: Sequence[str] | None = None, caption: str | None = None,
          digits: int = 2) -> Markup:
    """An HTML table from ``rows``.

    rows: a list of mappings (the header defaults to the keys, in first-seen order) or
    of sequences (give ``header``, or none for a headerless table). Floats are shown with
    ``digits`` decimals (NaN as ``n/a``), numbers right-aligned; every cell is escaped.
    """
    rows = list(rows)
    if digits < 0:
        raise ValueError(f"digits must be >= 0, got {digits}")
    if rows and all(isinstance(r, Mapping) for r in rows):
        keys: list = list(header) if header is not None else []
        if header is None:
            for r in rows:
                for k in r:
                    if k not in keys:
                        keys.append(k)
        body = [[r.get(k) for k in keys] for r in rows]
        head = keys
    elif all(isinstance(r, Sequence) and not isinstance(r, (str, bytes)) for r in rows):
        body = [list(r) for r in rows]
        head = list(header) if header is not None else None
    else:
        raise ValueError("table rows must all be mappings or all be sequences of cells")
    out = ['<div class="table-wrap"><table>']
    if caption:
        out.append(f"<caption>{escape(caption)}</caption>")
    if head:
        out.append("<thead><tr>" + "".join(f'<th scope="col">{escape(h)}</th>' for h in head)
                   + "</tr></thead>")
    out.append("<tbody>")
    for r in body:
        cells = []
        for v in r:
            text, num = _cell_text(v, digits)
            cells.append(f'<td class="num">{escape(text)}</td>' if num
                         else f"<td>{escape(text)}</td>")
        out.append("<tr>" + "".join(cells) + "</tr>")
    out.append("</tbody></table></div>")
    return Markup("".join(out))


def definition_list(items: Iterable[tuple[str, Any]]) -> Markup:
    """``<dl>`` of (term, description) pairs, escaped."""
    body = "".join(f"<dt>{escape(k)}</dt><dd>{escape(v)}</dd>" for k, v in items)
    return Markup(f"<dl>{body}</dl>")


def png_data_uri(png: bytes) -> str:
    """``data:image/png;base64,...`` (RFC 2397) for PNG bytes; ValueError if ``png`` is
    not a PNG."""
    if not is_png(png):
        raise ValueError("figure data is not a PNG image (missing the PNG signature)")
    return "data:image/png;base64," + base64.b64encode(bytes(png)).decode("ascii")


def figure(png: bytes, alt: str, caption: str | None = None, name: str | None = None) -> Markup:
    """``<figure>`` with the PNG embedded as a data: URI, an alt text and a caption."""
    if not alt or not str(alt).strip():
        raise ValueError("every figure needs an alt text")
    ident = f' id="fig-{escape(name)}"' if name else ""
    cap = f"<figcaption>{escape(caption)}</figcaption>" if caption else ""
    return Markup(f'<figure{ident}><img src="{png_data_uri(png)}" alt="{escape(alt)}">'
                  f"{cap}</figure>")


STYLE = """
:root { color-scheme: light; }
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, Helvetica, Arial,
       sans-serif; color: #1f1f1f; background: #ffffff; line-height: 1.45;
       max-width: 68rem; margin: 0 auto; padding: 1.5rem 1.25rem 3rem; }
h1 { font-size: 1.55rem; margin: 0 0 0.4rem; border-bottom: 2px solid #0072B2;
     padding-bottom: 0.3rem; }
h2 { font-size: 1.2rem; margin: 2rem 0 0.6rem; color: #10395a; }
p { margin: 0.5rem 0; }
.meta { color: #555555; font-size: 0.92rem; }
.caution { border-left: 4px solid #D55E00; background: #fff4ec; padding: 0.55rem 0.8rem;
           margin: 0.9rem 0; }
pre { background: #f6f7f8; border: 1px solid #dfe2e5; padding: 0.7rem 0.9rem;
      overflow-x: auto; font-size: 0.86rem; line-height: 1.35;
      font-family: ui-monospace, "DejaVu Sans Mono", Menlo, Consolas, monospace; }
pre.wrap { white-space: pre-wrap; overflow-wrap: anywhere; overflow-x: visible; }
.table-wrap { overflow-x: auto; }
table { border-collapse: collapse; font-size: 0.9rem; margin: 0.6rem 0; }
caption { caption-side: top; text-align: left; color: #555555; padding-bottom: 0.3rem; }
th, td { border-bottom: 1px solid #dcdcdc; padding: 0.3rem 0.65rem; text-align: left;
         vertical-align: top; }
th { background: #eef3f7; font-weight: 600; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tbody tr:nth-child(even) { background: #fafafa; }
figure { margin: 1.2rem 0; }
figure img { max-width: 100%; height: auto; border: 1px solid #e3e3e3; }
figcaption { font-size: 0.88rem; color: #444444; margin-top: 0.35rem; max-width: 52rem; }
dl { display: grid; grid-template-columns: max-content auto; gap: 0.2rem 1rem; }
dt { font-weight: 600; }
dd { margin: 0; }
footer { margin-top: 2.5rem; font-size: 0.82rem; color: #666666;
         border-top: 1px solid #e0e0e0; padding-top: 0.5rem; }
@media print {
  body { max-width: none; padding: 0; font-size: 10.5pt; }
  h2 { break-after: avoid; }
  figure, table, pre { break-inside: avoid; }
  .caution { background: none; }
  tbody tr:nth-child(even) { background: none; }
}
"""


def build_page(title: str, sections: Sequence, intro: Sequence | None = None,
               footer: str | None = None) -> str:
    """One self-contained HTML5 document.

    title: page title and ``<h1>`` (escaped). sections: a list of ``(heading, parts)``
    pairs; ``parts`` is a list of fragments from this module (:func:`table`,
    :func:`figure`, ...) or plain strings (escaped, shown as paragraphs); a heading of
    None or "" leaves the section untitled. intro: parts placed under the title before
    the first section. footer: a closing line (escaped). Inline CSS only; no external
    resources of any kind.
    """
    if not isinstance(title, str) or not title.strip():
        raise ValueError("a page needs a non-empty title")
    body = [f"<h1>{escape(title)}</h1>"]
    for p in intro or ():
        body.append(_part(p))
    for i, item in enumerate(sections):
        if not (isinstance(item, (tuple, list)) and len(item) == 2):
            raise ValueError(f"section {i} must be a (heading, parts) pair")
        heading, parts = item
        if isinstance(parts, (str, Markup)):
            parts = [parts]
        body.append("<section>")
        if heading:
            body.append(f"<h2>{escape(heading)}</h2>")
        body.extend(_part(p) for p in parts)
        body.append("</section>")
    if footer:
        body.append(f"<footer>{escape(footer)}</footer>")
    return ("<!DOCTYPE html>\n"
            '<html lang="en">\n<head>\n<meta charset="utf-8">\n'
            '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            f"<title>{escape(title)}</title>\n"
            f"<style>{STYLE}</style>\n</head>\n<body>\n<main>\n"
            + "\n".join(body)
            + "\n</main>\n</body>\n</html>\n")


def _figure_words(name: str) -> tuple[str, str]:
    if name in FIGURE_TEXT:
        return FIGURE_TEXT[name]
    words = str(name).replace("_", " ").replace("-", " ").strip() or "figure"
    return f"Figure: {words}", words[:1].upper() + words[1:] + "."


def compare_report(evaluation, summary_rows: Sequence, scene_summary_text: str,
                   figures: Mapping[str, bytes], *, title: str | None = None,
                   captions: Mapping[str, str] | None = None,
                   alt_texts: Mapping[str, str] | None = None,
                   notes: Sequence[str] = (), table_header: Sequence[str] | None = None,
                   footer: str | None = None) -> str:
    """The HTML page of a processor comparison.

    Layout: title ("Processor comparison: <scene name>"), a line of run facts, the
    caution (simulation only; transmitting interference is unlawful in most places;
    validate against measured hardware), the scene summary as a ``<pre>`` block, the
    score table (``summary_rows`` as for :func:`table`: mappings, or sequences with
    ``table_header``), optional ``notes`` paragraphs, then every figure in ``figures``
    order (name -> PNG bytes), each with an alt text and a caption (defaults for the
    standard names in :data:`adapt.report.figures.FIGURE_TEXT`; override with
    ``captions``/``alt_texts``).
    """
    if not isinstance(figures, Mapping):
        raise ValueError("figures must map a name to PNG bytes")
    sc = evaluation.scene
    name = getattr(sc, "name", "scene")
    page_title = title or f"Processor comparison: {name}"
    labels = ", ".join(p.label for p in evaluation.processors)
    facts = (f"{evaluation.trials} trials, {int(evaluation.snapshots)} snapshots, "
             f"seed {evaluation.seed}, {sc.elements} elements ({sc.array.layout}), "
             f"{len(evaluation.checkpoints)} checkpoints; processors: {labels}.")
    intro = [paragraph(facts, "meta"), caution()]
    sections: list = [("Scene", [preformatted(scene_summary_text, wrap=True)])]
    score_parts: list = [table(summary_rows, header=table_header)]
    score_parts += [paragraph(n) for n in notes]
    sections.append(("Scores", score_parts))
    figs = []
    for key, png in figures.items():
        alt, cap = _figure_words(key)
        if alt_texts and key in alt_texts:
            alt = alt_texts[key]
        if captions and key in captions:
            cap = captions[key]
        figs.append(figure(png, alt, cap, name=key))
    if figs:
        sections.append(("Figures", figs))
    return build_page(page_title, sections, intro=intro,
                      footer=footer or "Made by adapt, an adaptive beamforming sandbox. "
                                       "Simulation results only.")
