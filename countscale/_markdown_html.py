"""The report's Markdown → one self-contained HTML page (private).

``report.md`` is the one source of the report's words; ``report.html`` is made from it here,
so the two always say the same. Only the subset of Markdown the report writes is read:

- ``#`` to ``####`` headings (each gets an ``id``, the same as GitHub's anchor for it, so a
  ``[text](#anchor)`` link works in both files);
- paragraphs; ``- `` lists (a line indented by two spaces continues an item);
- pipe tables with an alignment row (``\\|`` is a literal bar in a cell);
- ``![alt](file.png)`` on a line of its own: a figure, embedded as a ``data:`` URI;
- ``> `` quotes (the report's cautions);
- fenced code blocks (the run file's text);
- the raw lines ``<details>``, ``<details open>``, ``</details>`` and
  ``<summary>...</summary>`` (folded long tables);
- inline: ``**bold**``, ```code```, and links whose target is an anchor (``#...``) or
  ``http(s)://``.

Everything else is text and is escaped. No script or style comes from the Markdown; the page's
own style is inline and it loads nothing from the network.
"""

from __future__ import annotations

import base64
import html
import re
from collections.abc import Callable

__all__ = ["anchor", "markdown_to_html"]

_HEADING = re.compile(r"^(#{1,4}) (.+)$")
_IMAGE = re.compile(r"^!\[([^\]]*)\]\(([^)\s]+)\)$")
_RAW = re.compile(r"^(<details>|<details open>|</details>)$")
_SUMMARY = re.compile(r"^<summary>(.*)</summary>$")
_LINK = re.compile(r"\[([^\]]+)\]\((#[\w\-]*|https?://[^)\s]+)\)")
_BOLD = re.compile(r"\*\*(.+?)\*\*")
_CODE = re.compile(r"`([^`]+)`")

STYLE = """
:root { color-scheme: light; --ink: #1b1f24; --muted: #57606a; --line: #d0d7de;
        --soft: #f6f8fa; --warn: #9a6700; --warn-bg: #fff8c5; }
* { box-sizing: border-box; }
body { margin: 0 auto; max-width: 60rem; padding: 1rem 1.25rem 3rem; color: var(--ink);
       font: 16px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "Noto Sans", sans-serif;
       -webkit-text-size-adjust: 100%; overflow-wrap: break-word; }
h1 { font-size: 1.7rem; line-height: 1.25; margin: 0.5rem 0 1rem; }
h2 { font-size: 1.35rem; border-bottom: 1px solid var(--line); padding-bottom: 0.2rem;
     margin-top: 2.2rem; }
h3 { font-size: 1.1rem; margin-top: 1.6rem; }
code { font: 0.9em ui-monospace, SFMono-Regular, Menlo, Consolas, monospace;
       background: var(--soft); padding: 0.05em 0.3em; border-radius: 4px; }
pre { background: var(--soft); padding: 0.75rem; overflow-x: auto; border-radius: 6px;
      font-size: 0.85rem; line-height: 1.4; }
pre code { background: none; padding: 0; }
.table-wrap { overflow-x: auto; margin: 0.8rem 0; }
table { border-collapse: collapse; font-size: 0.92rem; }
th, td { border: 1px solid var(--line); padding: 0.3rem 0.55rem; vertical-align: top; }
th { background: var(--soft); text-align: left; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
figure { margin: 1.2rem 0; }
figure img { display: block; max-width: 100%; height: auto; border: 1px solid var(--line); }
figcaption { color: var(--muted); font-size: 0.9rem; margin-top: 0.3rem; }
blockquote { margin: 0.8rem 0; padding: 0.5rem 0.9rem; border-left: 4px solid var(--warn);
             background: var(--warn-bg); }
blockquote p { margin: 0.3rem 0; }
details { margin: 0.8rem 0; border: 1px solid var(--line); border-radius: 6px;
          padding: 0.4rem 0.8rem; }
summary { cursor: pointer; font-weight: 600; }
@media (max-width: 40rem) {
  body { padding: 0.6rem 0.8rem 2rem; font-size: 15px; }
  h1 { font-size: 1.4rem; }
  .table-wrap.stack table, .table-wrap.stack tbody, .table-wrap.stack tr,
  .table-wrap.stack td { display: block; width: 100%; }
  .table-wrap.stack thead { display: none; }
  .table-wrap.stack tr { border: 1px solid var(--line); border-radius: 6px;
                         margin-bottom: 0.6rem; }
  .table-wrap.stack td { border: none; border-bottom: 1px solid var(--soft);
                         text-align: left; white-space: normal; }
  .table-wrap.stack td::before { content: attr(data-label); display: block;
                                 font-size: 0.78rem; color: var(--muted); }
}
@media print {
  body { max-width: none; font-size: 10.5pt; padding: 0; }
  details { border: none; padding: 0; }
  figure, table, blockquote, pre { break-inside: avoid; }
  h2, h3 { break-after: avoid; }
  a { color: inherit; text-decoration: none; }
}
"""

#: Folded sections open for printing (a closed <details> prints as its summary line only).
SCRIPT = ("window.addEventListener('beforeprint', function () {"
          " document.querySelectorAll('details').forEach(function (d) { d.open = true; }); });")


def anchor(text: str) -> str:
    """GitHub's anchor for a heading: lower case, punctuation dropped, spaces to hyphens."""
    return re.sub(r"[^\w\- ]", "", text.strip().lower()).replace(" ", "-")


def _inline(text: str) -> str:
    """Escape, then code spans, links and bold (code spans are left as they are)."""
    parts = _CODE.split(text)
    out = []
    for i, part in enumerate(parts):
        if i % 2:
            out.append(f"<code>{html.escape(part, quote=False)}</code>")
            continue
        part = html.escape(part.replace("\\|", "|"), quote=False)
        part = _LINK.sub(lambda m: f'<a href="{html.escape(m[2])}">{m[1]}</a>', part)
        out.append(_BOLD.sub(r"<strong>\1</strong>", part))
    return "".join(out)


def _cells(line: str) -> list[str]:
    inner = line.strip()
    inner = inner[1:] if inner.startswith("|") else inner
    inner = inner[:-1] if inner.endswith("|") and not inner.endswith("\\|") else inner
    return [cell.strip() for cell in re.split(r"(?<!\\)\|", inner)]


def _table(lines: list[str]) -> str:
    header = _cells(lines[0])
    aligns = ["num" if cell.strip().endswith(":") else "" for cell in _cells(lines[1])]
    aligns += [""] * (len(header) - len(aligns))
    stack = " stack" if len(header) >= 3 else ""
    out = [f'<div class="table-wrap{stack}"><table>', "<thead><tr>"]
    out += [f'<th{f" class={chr(34)}{a}{chr(34)}" if a else ""}>{_inline(h)}</th>'
            for h, a in zip(header, aligns, strict=False)]
    out.append("</tr></thead><tbody>")
    for line in lines[2:]:
        cells = _cells(line)
        row = []
        for k, cell in enumerate(cells):
            label = html.escape(re.sub(r"[`*]", "", header[k]) if k < len(header) else "")
            cls = f' class="{aligns[k]}"' if k < len(aligns) and aligns[k] else ""
            row.append(f'<td{cls} data-label="{label}">{_inline(cell)}</td>')
        out.append("<tr>" + "".join(row) + "</tr>")
    out.append("</tbody></table></div>")
    return "\n".join(out)


def markdown_to_html(text: str, title: str, image: Callable[[str], str | None]) -> str:
    """One HTML page from the report's Markdown.

    Parameters
    ----------
    text : str
        The Markdown (the subset in the module docstring).
    title : str
        The page's ``<title>``.
    image : callable
        ``image(src) -> bytes of a PNG or None``: the figure a Markdown image names. Each is
        embedded as a ``data:image/png;base64`` URI; an image it cannot give is left out
        with a line saying so.
    """
    lines = text.splitlines()
    out: list[str] = []
    paragraph: list[str] = []
    items: list[str] = []
    quote: list[str] = []

    def flush() -> None:
        if paragraph:
            out.append(f"<p>{_inline(' '.join(paragraph))}</p>")
            paragraph.clear()
        if items:
            out.append("<ul>" + "".join(f"<li>{_inline(i)}</li>" for i in items) + "</ul>")
            items.clear()
        if quote:
            out.append(f"<blockquote><p>{_inline(' '.join(quote))}</p></blockquote>")
            quote.clear()

    i = 0
    while i < len(lines):
        line = lines[i]
        stripped = line.strip()
        if not stripped:
            flush()
        elif stripped.startswith("```"):
            flush()
            block = []
            i += 1
            while i < len(lines) and not lines[i].strip().startswith("```"):
                block.append(lines[i])
                i += 1
            out.append("<pre><code>" + html.escape("\n".join(block), quote=False)
                       + "</code></pre>")
        elif match := _HEADING.match(stripped):
            flush()
            level, words = len(match[1]), match[2]
            out.append(f'<h{level} id="{anchor(words)}">{_inline(words)}</h{level}>')
        elif _RAW.match(stripped):
            flush()
            out.append(stripped)
        elif match := _SUMMARY.match(stripped):
            flush()
            out.append(f"<summary>{_inline(match[1])}</summary>")
        elif stripped.startswith("|"):
            flush()
            block = []
            while i < len(lines) and lines[i].strip().startswith("|"):
                block.append(lines[i])
                i += 1
            out.append(_table(block) if len(block) >= 2 else f"<p>{_inline(block[0])}</p>")
            continue
        elif match := _IMAGE.match(stripped):
            flush()
            data = image(match[2])
            alt = html.escape(match[1])
            if data:
                uri = "data:image/png;base64," + base64.b64encode(data).decode("ascii")
                out.append(f'<figure><img src="{uri}" alt="{alt}" loading="eager">'
                           f"<figcaption>Figure: {alt}</figcaption></figure>")
            else:
                out.append(f"<p>(Figure “{alt}” is missing: {html.escape(match[2])}.)</p>")
        elif stripped.startswith("> "):
            if paragraph or items:
                flush()
            quote.append(stripped[2:])
        elif stripped.startswith("- "):
            if paragraph or quote:
                flush()
            items.append(stripped[2:])
        elif items and line.startswith("  "):
            items[-1] += " " + stripped
        else:
            if items or quote:
                flush()
            paragraph.append(stripped)
        i += 1
    flush()
    body = "\n".join(out)
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
            f"<title>{html.escape(title)}</title>\n<style>{STYLE}</style>\n"
            f"<script>{SCRIPT}</script>\n</head>\n<body>\n{body}\n</body>\n</html>\n")
