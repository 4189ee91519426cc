"""A single self-contained HTML report a client can open: text, tables and plots in one file.

Plots are matplotlib figures embedded as PNG ``data:`` URIs (RFC 2397), styles are inline,
nothing is fetched from anywhere: the file can be mailed, copied to a phone, or opened
offline. Written atomically (a report replaced is kept as ``.bak``).
"""

from __future__ import annotations

__all__ = ["Section", "figure_png", "render_html", "write_html"]

import base64
import html
import io
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Sequence

from ..io.atomic import atomic_write_bytes

_STYLE = """
body { font-family: system-ui, sans-serif; max-width: 60em; margin: 2em auto; padding: 0 1em; color: #222; }
h1 { font-size: 1.6em; } h2 { font-size: 1.25em; margin-top: 2em; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; font-size: 0.9em; margin: 1em 0; }
th, td { border: 1px solid #ddd; padding: 0.2em 0.6em; text-align: right; }
th { background: #f3f3f3; } td:first-child, th:first-child { text-align: left; }
tr.flagged td { background: #fff3d6; }
img { max-width: 100%; height: auto; display: block; margin: 1em 0; }
p.caution { background: #f6f6f6; border-left: 4px solid #c80; padding: 0.6em 1em; }
"""


@dataclass
class Section:
    """One part of a report: a heading, paragraphs, an optional table, PNG figures.

    ``rows`` is a list of cell lists (strings or numbers) under ``columns``; a row whose
    index is in ``highlight`` is marked (e.g. a flagged key).
    """

    heading: str
    paragraphs: Sequence[str] = ()
    columns: Sequence[str] = ()
    rows: Sequence[Sequence[Any]] = ()
    highlight: frozenset[int] = frozenset()
    figures: Sequence[tuple[bytes, str]] = field(default_factory=list)  # (png bytes, alt text)


def figure_png(fig: Any, *, dpi: int = 110) -> bytes:
    """A matplotlib figure as PNG bytes (the figure is closed)."""
    import matplotlib.pyplot as plt

    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi)
    plt.close(fig)
    return buf.getvalue()


def _cell(value: Any) -> str:
    if isinstance(value, float):
        return "" if value != value else f"{value:.4g}"  # NaN: empty
    return html.escape(str(value))


def render_html(title: str, sections: Sequence[Section], *, caution: str | None = None) -> str:
    """The report as one HTML document (UTF-8 text)."""
    out = ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">',
           f"<title>{html.escape(title)}</title><style>{_STYLE}</style></head><body>",
           f"<h1>{html.escape(title)}</h1>"]
    if caution:
        out.append(f'<p class="caution">{html.escape(caution)}</p>')
    for s in sections:
        out.append(f"<h2>{html.escape(s.heading)}</h2>")
        out.extend(f"<p>{html.escape(p)}</p>" for p in s.paragraphs)
        for png, alt in s.figures:
            data = base64.b64encode(png).decode("ascii")
            out.append(f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">')
        if s.rows:
            out.append("<table><thead><tr>" + "".join(f"<th>{html.escape(c)}</th>" for c in s.columns)
                       + "</tr></thead><tbody>")
            for i, row in enumerate(s.rows):
                mark = ' class="flagged"' if i in s.highlight else ""
                out.append(f"<tr{mark}>" + "".join(f"<td>{_cell(v)}</td>" for v in row) + "</tr>")
            out.append("</tbody></table>")
    out.append("</body></html>")
    return "\n".join(out) + "\n"


def write_html(path: str | Path, title: str, sections: Sequence[Section], *, caution: str | None = None) -> Path:
    """Write the report to ``path`` atomically; returns the path."""
    return atomic_write_bytes(path, render_html(title, sections, caution=caution).encode("utf-8"))
