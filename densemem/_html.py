"""One self-contained HTML page per job report (private).

A page is built from sections holding paragraphs, tables and figures; figures
are PNG bytes embedded as ``data:image/png;base64`` so the file opens from disk
in any browser, with no server and no network link. Writers refuse an existing
file unless asked (the rule of every densemem writer) and write atomically.

Examples
--------
>>> from densemem._html import Section, page
>>> html = page("t", [Section("one", paragraphs=["a < b"], tables=[(["x"], [[1]], "")])])
>>> '<td class="num">1</td>' in html and "a &lt; b" in html
True
"""

from __future__ import annotations

import base64
import html as _html
import io
import os
import secrets
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

from .errors import InputTypeError, InputValueError

__all__ = ["Section", "page", "write_page", "png_bytes", "check_html_path", "have_matplotlib"]

_STYLE = """
body { font: 15px/1.45 system-ui, sans-serif; margin: 2em auto; max-width: 1200px; padding: 0 1em; color: #222; }
h1 { font-size: 1.5em; } h2 { font-size: 1.2em; margin-top: 1.8em; border-bottom: 1px solid #ddd; }
table { border-collapse: collapse; margin: .8em 0; font-size: 13px; }
th, td { border: 1px solid #ccc; padding: 3px 8px; } th { background: #f3f3f3; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
caption { caption-side: bottom; text-align: left; color: #555; font-size: 12px; padding-top: 4px; }
figure { margin: 1em 0; } figure img { max-width: 100%; border: 1px solid #eee; }
figcaption { color: #555; font-size: 13px; }
p.verdict { font-size: 1.1em; font-weight: 600; background: #eef5ee; padding: .6em .8em; }
p.warning { background: #fff3e0; padding: .6em .8em; }
dl.legend dt { font-weight: 600; float: left; clear: left; width: 11em; } dl.legend dd { margin-left: 12em; }
footer { margin-top: 3em; color: #777; font-size: 12px; }
"""

Table = tuple[Sequence[str], Sequence[Sequence[Any]], str]  # headers, rows, caption


@dataclass
class Section:
    """One titled part of a page: paragraphs, tables, a legend, figures (in that order)."""

    title: str
    paragraphs: list[str] = field(default_factory=list)
    tables: list[Table] = field(default_factory=list)
    legend: list[tuple[str, str]] = field(default_factory=list)
    figures: list[tuple[bytes, str]] = field(default_factory=list)  # PNG bytes, caption
    css_class: str = ""  # e.g. "verdict" or "warning" for the paragraphs


def _cell(value: Any) -> str:
    if isinstance(value, bool):
        return f"<td>{'yes' if value else 'no'}</td>"
    if isinstance(value, float):
        return f'<td class="num">{value:.4g}</td>'
    if isinstance(value, int):
        return f'<td class="num">{value}</td>'
    if value is None:
        return "<td>-</td>"
    return f"<td>{_html.escape(str(value))}</td>"


def _table(headers: Sequence[str], rows: Sequence[Sequence[Any]], caption: str) -> str:
    head = "".join(f"<th>{_html.escape(str(h))}</th>" for h in headers)
    body = "\n".join("<tr>" + "".join(_cell(c) for c in r) + "</tr>" for r in rows)
    cap = f"<caption>{_html.escape(caption)}</caption>" if caption else ""
    return f"<table>{cap}<thead><tr>{head}</tr></thead><tbody>\n{body}\n</tbody></table>"


def _section(s: Section) -> str:
    cls = f' class="{s.css_class}"' if s.css_class else ""
    parts = [f"<h2>{_html.escape(s.title)}</h2>"] if s.title else []
    parts += [f"<p{cls}>{_html.escape(p)}</p>" for p in s.paragraphs]
    parts += [_table(*t) for t in s.tables]
    if s.legend:
        items = "".join(f"<dt>{_html.escape(k)}</dt><dd>{_html.escape(v)}</dd>" for k, v in s.legend)
        parts.append(f'<dl class="legend">{items}</dl>')
    for png, caption in s.figures:
        data = base64.b64encode(png).decode("ascii")
        alt = _html.escape(caption, quote=True)
        parts.append(f'<figure><img alt="{alt}" src="data:image/png;base64,{data}">'
                     f"<figcaption>{_html.escape(caption)}</figcaption></figure>")
    return "<section>\n" + "\n".join(parts) + "\n</section>"


def page(title: str, sections: Sequence[Section], *, footer: str = "") -> str:
    """The HTML text of one report page (inline style, embedded figures, no external link)."""
    from ._version import __version__

    foot = _html.escape(footer or f"written by densemem {__version__}")
    body = "\n".join(_section(s) for s in sections)
    return (f'<!DOCTYPE html>\n<html lang="en">\n<head>\n<meta charset="utf-8">\n'
            f'<meta name="viewport" content="width=device-width, initial-scale=1">\n'
            f"<title>{_html.escape(title)}</title>\n<style>{_STYLE}</style>\n</head>\n<body>\n"
            f"<h1>{_html.escape(title)}</h1>\n{body}\n<footer>{foot}</footer>\n</body>\n</html>\n")


def check_html_path(path: Any, *, overwrite: bool, where: str, name: str = "path") -> Path:
    """``path`` as a Path ending in .html in an existing folder; an existing file only with ``overwrite``."""
    if not isinstance(path, (str, os.PathLike)):
        raise InputTypeError(f"{where}: `{name}` must be a str or os.PathLike; got {type(path).__name__}.")
    p = Path(os.fspath(path))
    if p.suffix.lower() not in (".html", ".htm"):
        raise InputValueError(f"{where}: `{name}` must name an .html file; got {str(p)!r}.")
    if not p.absolute().parent.is_dir():
        raise InputValueError(f"{where}: the folder of `{name}` does not exist: {str(p.absolute().parent)!r}.")
    if p.exists() and not overwrite:
        raise InputValueError(f"{where}: {str(p)!r} exists; pass overwrite=True to replace it.")
    return p


def write_page(path: Any, text: str, *, overwrite: bool = False, where: str = "write_page") -> Path:
    """Write ``text`` to ``path`` atomically (temp file beside it, fsync, rename); returns the path."""
    p = check_html_path(path, overwrite=overwrite, where=where)
    tmp = p.absolute().parent / f".{p.name}.tmp-{os.getpid()}-{secrets.token_hex(4)}"
    try:
        with open(tmp, "x", encoding="utf-8") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        if overwrite:
            os.replace(tmp, p)
        else:
            try:
                os.link(tmp, p)  # fails if the file appeared meanwhile
            except FileExistsError:
                raise InputValueError(f"{where}: {str(p)!r} exists; pass overwrite=True to replace it.") from None
    finally:
        tmp.unlink(missing_ok=True)
    return p


def have_matplotlib() -> bool:
    """Whether matplotlib imports (figures are left out of a page without it)."""
    try:
        import matplotlib  # noqa: F401
    except ImportError:
        return False
    return True


def png_bytes(draw: Callable[[Path], Any]) -> bytes:
    """Run ``draw(path)`` (a plot function writing a PNG to ``path``) in a temp folder; return the bytes."""
    import tempfile

    with tempfile.TemporaryDirectory() as d:
        out = Path(d) / "figure.png"
        draw(out)
        return out.read_bytes()


def figure_png(fig: Any, dpi: int = 110) -> bytes:
    """PNG bytes of a matplotlib figure."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    return buf.getvalue()
