"""The report as a document: blocks (headings, paragraphs, lists, tables, figures) rendered both as Markdown
and as one self-contained HTML page (figures inlined), and written into the grid dir.

Inline marks are Markdown's `code`, **strong** and *emphasis*, the only ones the sections write; the HTML
renderer turns them into tags and escapes everything else.
"""

from __future__ import annotations

import base64
import dataclasses
import html
import re
from pathlib import Path

from blockyard import fs


@dataclasses.dataclass(frozen=True)
class Heading:
    level: int
    text: str


@dataclasses.dataclass(frozen=True)
class Paragraph:
    text: str


@dataclasses.dataclass(frozen=True)
class Bullets:
    items: list[str]


@dataclasses.dataclass(frozen=True)
class Table:
    header: list[str]
    rows: list[list[str]]


@dataclasses.dataclass(frozen=True)
class Figure:
    name: str  # a PNG in the grid dir
    caption: str


Block = Heading | Paragraph | Bullets | Table | Figure

_STYLE = ("body{font-family:sans-serif;max-width:70em;margin:2em auto;padding:0 1em;line-height:1.4}"
          "table{border-collapse:collapse;margin:1em 0}td,th{border:1px solid #ccc;padding:.25em .6em;"
          "text-align:left}th{background:#f3f3f3}img{max-width:100%}figcaption{font-style:italic}"
          ".wide{overflow-x:auto;max-width:100%}")


@dataclasses.dataclass
class Doc:
    """A report as blocks, rendered both as Markdown and as self-contained HTML."""

    blocks: list[Block] = dataclasses.field(default_factory=list)

    def h(self, level: int, text: str) -> None:
        self.blocks.append(Heading(level, text))

    def p(self, text: str) -> None:
        self.blocks.append(Paragraph(text))

    def ul(self, items: list[str]) -> None:
        self.blocks.append(Bullets(items))

    def table(self, header: list[str], rows: list[list[str]]) -> None:
        self.blocks.append(Table(header, rows))

    def img(self, name: str, caption: str) -> None:
        self.blocks.append(Figure(name, caption))

    def markdown(self) -> str:
        return "\n\n".join(_markdown(b) for b in self.blocks) + "\n"

    def html(self, grid_dir: Path, title: str) -> str:
        """One page; figures are read from ``grid_dir`` and inlined."""
        head = f"<!doctype html><html><head><meta charset='utf-8'><title>{html.escape(title)}</title><style>"
        out = [head + _STYLE + "</style></head><body>"]
        out += [_html(b, grid_dir) for b in self.blocks]
        out.append("</body></html>")
        return "\n".join(out)


def _markdown(b: Block) -> str:
    if isinstance(b, Heading):
        return "#" * b.level + " " + b.text
    if isinstance(b, Paragraph):
        return b.text
    if isinstance(b, Bullets):
        return "\n".join(f"- {item}" for item in b.items)
    if isinstance(b, Table):
        def cell(s: object) -> str:
            return str(s).replace("|", "\\|")

        lines = ["| " + " | ".join(cell(c) for c in b.header) + " |", "|" + "---|" * len(b.header)]
        lines += ["| " + " | ".join(cell(c) for c in row) + " |" for row in b.rows]
        return "\n".join(lines)
    return f"![{b.caption}]({b.name})\n\n*{b.caption}*"


def _html(b: Block, grid_dir: Path) -> str:
    e = html.escape
    if isinstance(b, Heading):
        return f"<h{b.level}>{_inline_html(b.text)}</h{b.level}>"
    if isinstance(b, Paragraph):
        return f"<p>{_inline_html(b.text)}</p>"
    if isinstance(b, Bullets):
        return "<ul>" + "".join(f"<li>{_inline_html(i)}</li>" for i in b.items) + "</ul>"
    if isinstance(b, Table):
        head = "".join(f"<th>{e(str(c))}</th>" for c in b.header)
        body = "".join("<tr>" + "".join(f"<td>{_inline_html(str(c))}</td>" for c in row) + "</tr>" for row in b.rows)
        # A table wider than the page scrolls inside it instead of running off its right edge.
        return f"<div class='wide'><table><tr>{head}</tr>{body}</table></div>"
    data = base64.b64encode((grid_dir / b.name).read_bytes()).decode()
    return (f"<figure><img alt='{e(b.caption)}' src='data:image/png;base64,{data}'>"
            f"<figcaption>{_inline_html(b.caption)}</figcaption></figure>")


_CODE = re.compile(r"`([^`]+)`")
_STRONG = re.compile(r"\*\*(?=\S)(.+?)(?<=\S)\*\*")
# *x*: a star not touching a word or another star on its outer side, and no space on its inner side,
# so products such as ``2*3`` or ``a * b`` stay as written.
_EM = re.compile(r"(?<![\w*])\*(?=[^\s*])(.+?)(?<=[^\s*])\*(?![\w*])")


def _inline_html(text: str) -> str:
    """Escape, then turn Markdown's `code`, **strong** and *emphasis* into tags (the only inline marks we
    write); nothing inside a code span is read as emphasis."""
    parts = _CODE.split(text)  # odd positions are the insides of code spans
    out = []
    for i, part in enumerate(parts):
        s = html.escape(part)
        if i % 2:
            out.append(f"<code>{s}</code>")
        else:
            out.append(_EM.sub(r"<em>\1</em>", _STRONG.sub(r"<strong>\1</strong>", s)))
    return "".join(out)


def write_document(grid_dir: Path, doc: Doc, title: str) -> Path:
    """report.md and report.html in ``grid_dir``, each written atomically; returns report.md."""
    fs.atomic_write_text(grid_dir / "report.md", doc.markdown(), what="the report")
    fs.atomic_write_text(grid_dir / "report.html", doc.html(grid_dir, title), what="the report")
    return grid_dir / "report.md"
