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


@dataclasses.dataclass
class Doc:
    """A report as blocks, rendered both as Markdown and as self-contained HTML."""

    blocks: list[tuple] = dataclasses.field(default_factory=list)

    def h(self, level: int, text: str) -> None:
        self.blocks.append(("h", level, text))

    def p(self, text: str) -> None:
        self.blocks.append(("p", text))

    def ul(self, items: list[str]) -> None:
        self.blocks.append(("ul", items))

    def table(self, header: list[str], rows: list[list[str]]) -> None:
        self.blocks.append(("table", header, rows))

    def img(self, name: str, caption: str) -> None:
        self.blocks.append(("img", name, caption))

    def markdown(self) -> str:
        out: list[str] = []
        for b in self.blocks:
            if b[0] == "h":
                out.append("#" * b[1] + " " + b[2])
            elif b[0] == "p":
                out.append(b[1])
            elif b[0] == "ul":
                out.append("\n".join(f"- {item}" for item in b[1]))
            elif b[0] == "table":
                cell = lambda s: str(s).replace("|", "\\|")
                lines = ["| " + " | ".join(cell(c) for c in b[1]) + " |", "|" + "---|" * len(b[1])]
                lines += ["| " + " | ".join(cell(c) for c in row) + " |" for row in b[2]]
                out.append("\n".join(lines))
            elif b[0] == "img":
                out.append(f"![{b[2]}]({b[1]})\n\n*{b[2]}*")
        return "\n\n".join(out) + "\n"

    def html(self, grid_dir: Path, title: str) -> str:
        e = html.escape
        out = [f"<!doctype html><html><head><meta charset='utf-8'><title>{e(title)}</title><style>"
               "body{font-family:sans-serif;max-width:70em;margin:2em auto;padding:0 1em;line-height:1.4}"
               "table{border-collapse:collapse;margin:1em 0}td,th{border:1px solid #ccc;padding:.25em .6em;"
               "text-align:left}th{background:#f3f3f3}img{max-width:100%}figcaption{font-style:italic}"
               ".wide{overflow-x:auto;max-width:100%}"
               "</style></head><body>"]
        for b in self.blocks:
            if b[0] == "h":
                out.append(f"<h{b[1]}>{_inline_html(b[2])}</h{b[1]}>")
            elif b[0] == "p":
                out.append(f"<p>{_inline_html(b[1])}</p>")
            elif b[0] == "ul":
                out.append("<ul>" + "".join(f"<li>{_inline_html(i)}</li>" for i in b[1]) + "</ul>")
            elif b[0] == "table":
                head = "".join(f"<th>{e(str(c))}</th>" for c in b[1])
                body = "".join("<tr>" + "".join(f"<td>{_inline_html(str(c))}</td>" for c in row) + "</tr>"
                               for row in b[2])
                # A table wider than the page scrolls inside it instead of running off its right edge.
                out.append(f"<div class='wide'><table><tr>{head}</tr>{body}</table></div>")
            elif b[0] == "img":
                data = base64.b64encode((grid_dir / b[1]).read_bytes()).decode()
                out.append(f"<figure><img alt='{e(b[2])}' src='data:image/png;base64,{data}'>"
                           f"<figcaption>{_inline_html(b[2])}</figcaption></figure>")
        out.append("</body></html>")
        return "\n".join(out)


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
