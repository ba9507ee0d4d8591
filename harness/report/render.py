"""A small document model shared by the run report and the comparison, rendered as Markdown or HTML.

A report is computed once as plain data; a builder turns it into a list of blocks (headings,
paragraphs, bullet lists, tables, images), and the two renderers below write the same blocks as
Markdown (images as PNG files beside it) or as one self-contained HTML page (images inlined as
base64), so the two files can never say different things.
"""

from __future__ import annotations

import base64
import html
import math
import re
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from harness.files import atomic_write_bytes, atomic_write_text

__all__ = [
    "Block", "Bullets", "Heading", "Image", "Para", "Table", "fmt", "table", "to_html", "to_markdown",
    "write_documents", "write_images",
]


@dataclass(frozen=True)
class Heading:
    text: str
    level: int = 2


@dataclass(frozen=True)
class Para:
    text: str


@dataclass(frozen=True)
class Bullets:
    items: tuple[str, ...]


@dataclass(frozen=True)
class Table:
    headers: tuple[str, ...]
    rows: tuple[tuple[str, ...], ...]
    caption: str = ""


@dataclass(frozen=True)
class Image:
    file: str  # file name the Markdown links to, relative to the Markdown file's folder
    png: bytes
    alt: str


Block = Heading | Para | Bullets | Table | Image

_NUM = r"<?[-+\u2212]?\d[\d,]*(\.\d+)?(e[-+]?\d+)?[kMB%×]?"
# A number, optionally "± sd", "to hi" or a bracketed interval: such columns are right-aligned.
_NUMERIC = re.compile(rf"{_NUM}( (±|to) {_NUM})?( \[{_NUM}, {_NUM}\])?")
_NOT_A_VALUE = ("", "–", "best")


def fmt(value: Any, digits: int = 3) -> str:
    """A number as table text: fixed decimals for floats, thousands separators for ints, '–' for missing."""
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return "–"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        return f"{value:,}"
    if isinstance(value, float):
        return f"{value:.{digits}f}"
    return str(value)


def table(headers: Sequence[str], rows: Sequence[Sequence[Any]], caption: str = "") -> Table:
    """A Table from any cell values (formatted with `fmt`)."""
    return Table(tuple(headers), tuple(tuple(fmt(c) for c in r) for r in rows), caption)


def _md_cell(text: str) -> str:
    return text.replace("\\", "\\\\").replace("|", "\\|").replace("\n", " ").replace("\r", " ")


def _numeric_columns(t: Table) -> list[bool]:
    cols = []
    for j in range(len(t.headers)):
        cells = [r[j] for r in t.rows if j < len(r) and r[j] not in _NOT_A_VALUE]
        cols.append(bool(cells) and all(_NUMERIC.fullmatch(c) for c in cells))
    return cols


def to_markdown(blocks: Sequence[Block]) -> str:
    """Markdown text; images link to their `file` (write them with `write_images`)."""
    out: list[str] = []
    for b in blocks:
        if isinstance(b, Heading):
            out += ["#" * b.level + " " + b.text, ""]
        elif isinstance(b, Para):
            out += [b.text, ""]
        elif isinstance(b, Bullets):
            out += [f"- {item}" for item in b.items] + [""]
        elif isinstance(b, Table):
            if b.caption:
                out += [b.caption, ""]
            numeric = _numeric_columns(b)
            out.append("| " + " | ".join(_md_cell(h) for h in b.headers) + " |")
            out.append("|" + "|".join("---:" if n else "---" for n in numeric) + "|")
            out += ["| " + " | ".join(_md_cell(c) for c in r) + " |" for r in b.rows]
            out.append("")
        elif isinstance(b, Image):
            out += [f"![{b.alt}]({b.file})", ""]
    return "\n".join(out).rstrip() + "\n"


_CSS = """
body { font-family: system-ui, -apple-system, "Segoe UI", sans-serif; color: #1d2329; background: #fff;
       max-width: 1080px; margin: 1.5rem auto; padding: 0 1.2rem; line-height: 1.45; }
h1 { font-size: 1.5rem; border-bottom: 3px solid #2a6f97; padding-bottom: .3rem; }
h2 { font-size: 1.2rem; margin-top: 2rem; color: #2a6f97; }
table { border-collapse: collapse; margin: .6rem 0 1rem; font-size: .9rem; }
p.caption { color: #555; margin: .8rem 0 .2rem; font-size: .9rem; }
th, td { border: 1px solid #d0d7de; padding: .25rem .55rem; vertical-align: top; }
th { background: #eef3f7; text-align: left; }
td:first-child { min-width: 9rem; max-width: 24rem; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
tr:nth-child(even) td { background: #f8fafb; }
img { max-width: 100%; height: auto; display: block; margin: .5rem 0 1rem; }
p, li { max-width: 80ch; }
"""


def _html_text(text: str) -> str:
    # why: the Markdown renderer shows `code` spans; mirror just that one construct in HTML
    parts = html.escape(text).split("`")
    return "".join(f"<code>{p}</code>" if i % 2 else p for i, p in enumerate(parts))


def to_html(blocks: Sequence[Block], title: str) -> str:
    """One self-contained HTML page: inline CSS, images as base64 PNG data URIs."""
    body: list[str] = []
    for b in blocks:
        if isinstance(b, Heading):
            body.append(f"<h{b.level}>{_html_text(b.text)}</h{b.level}>")
        elif isinstance(b, Para):
            body.append(f"<p>{_html_text(b.text)}</p>")
        elif isinstance(b, Bullets):
            body.append("<ul>" + "".join(f"<li>{_html_text(i)}</li>" for i in b.items) + "</ul>")
        elif isinstance(b, Table):
            numeric = _numeric_columns(b)
            cap = f'<p class="caption">{_html_text(b.caption)}</p>' if b.caption else ""
            head = "".join(f"<th>{html.escape(h)}</th>" for h in b.headers)
            rows = []
            for r in b.rows:
                cells = "".join(
                    f'<td class="num">{html.escape(c)}</td>' if n else f"<td>{html.escape(c)}</td>"
                    for c, n in zip(r, numeric, strict=False)
                )
                rows.append(f"<tr>{cells}</tr>")
            body.append(f"{cap}<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>")
        elif isinstance(b, Image):
            data = base64.b64encode(b.png).decode("ascii")
            body.append(f'<img alt="{html.escape(b.alt)}" src="data:image/png;base64,{data}">')
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        f"<title>{html.escape(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
        + "\n".join(body)
        + "\n</body>\n</html>\n"
    )


def write_images(blocks: Sequence[Block], folder: Path) -> list[Path]:
    """Write every Image block's PNG to `folder / file` (atomically); returns the paths."""
    paths = []
    for b in blocks:
        if isinstance(b, Image):
            path = folder / b.file
            atomic_write_bytes(path, b.png)
            paths.append(path)
    return paths


def write_documents(blocks: Sequence[Block], title: str, md_path: Path, html_path: Path) -> tuple[Path, Path]:
    """Markdown (with its PNG files) and HTML of the same blocks."""
    write_images(blocks, md_path.parent)
    atomic_write_text(md_path, to_markdown(blocks))
    atomic_write_text(html_path, to_html(blocks, title))
    return md_path, html_path
