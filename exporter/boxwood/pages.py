"""Self-contained HTML pages for reports (``verify --report-html``, ``diff --report-html``).

A :class:`Page` collects headings, paragraphs, tables and matplotlib figures and writes one
HTML file that makes no network request: the style sheet is inline and every figure is a
PNG embedded as a ``data:`` URI. Text is escaped with :func:`html.escape`.

matplotlib is optional (``pip install "boxwood[report]"``); :func:`pyplot` imports it with the
non-interactive Agg backend and says how to install it when it is missing.
"""
from __future__ import annotations

import base64
import html
import io
from pathlib import Path
from typing import Any, List, Optional, Sequence, Union

STYLE = """
body { font-family: system-ui, -apple-system, "Segoe UI", Roboto, sans-serif; margin: 2em auto;
       max-width: 1100px; color: #1d2329; background: #ffffff; line-height: 1.45; }
h1 { font-size: 1.6em; margin-bottom: 0.2em; } h2 { margin-top: 1.6em; border-bottom: 1px solid #d5dbe0; }
.sub { color: #56616b; margin-top: 0; }
.verdict { font-size: 1.25em; font-weight: 600; padding: 0.6em 0.9em; border-radius: 6px; }
.pass { background: #e3f4e6; color: #14532d; } .fail { background: #fbe4e4; color: #7f1d1d; }
.note { background: #eef2f6; color: #1d2329; }
table { border-collapse: collapse; margin: 0.8em 0; font-size: 0.92em; }
th, td { border: 1px solid #d5dbe0; padding: 0.3em 0.6em; text-align: left; vertical-align: top; }
th { background: #f3f5f7; }
td.num { text-align: right; font-variant-numeric: tabular-nums; }
figure { margin: 1em 0; } figcaption { color: #56616b; font-size: 0.9em; }
img { max-width: 100%; height: auto; border: 1px solid #eef0f2; }
.small { color: #56616b; font-size: 0.85em; }
"""


class MissingPlotting(ImportError):
    """matplotlib is not installed (the message says how to install it)."""


def pyplot() -> Any:
    """matplotlib.pyplot on the Agg backend (no display needed)."""
    try:
        import matplotlib
    except ImportError:
        raise MissingPlotting("HTML reports need matplotlib: pip install \"boxwood[report]\"")
    matplotlib.use("Agg", force=True)
    import matplotlib.pyplot as plt

    return plt


class Page:
    """One HTML report page, built piece by piece."""

    def __init__(self, title: str, subtitle: Optional[str] = None):
        self.title = title
        self.parts: List[str] = ["<h1>%s</h1>" % html.escape(title)]
        if subtitle:
            self.parts.append('<p class="sub">%s</p>' % html.escape(subtitle))

    def verdict(self, ok: Optional[bool], text: str) -> None:
        """A coloured line: passed (True), failed (False) or neutral (None)."""
        cls = "note" if ok is None else ("pass" if ok else "fail")
        self.parts.append('<p class="verdict %s">%s</p>' % (cls, html.escape(text)))

    def heading(self, text: str, level: int = 2) -> None:
        level = min(max(level, 2), 4)
        self.parts.append("<h%d>%s</h%d>" % (level, html.escape(text), level))

    def paragraph(self, text: str, small: bool = False) -> None:
        self.parts.append('<p%s>%s</p>' % (' class="small"' if small else "", html.escape(text)))

    def table(self, header: Sequence[str], rows: Sequence[Sequence[Any]]) -> None:
        out = ["<table><thead><tr>%s</tr></thead><tbody>" % "".join("<th>%s</th>" % html.escape(str(h))
                                                                     for h in header)]
        for row in rows:
            cells = []
            for v in row:
                num = isinstance(v, (int, float)) and not isinstance(v, bool)
                cells.append('<td%s>%s</td>' % (' class="num"' if num else "", html.escape(_text(v))))
            out.append("<tr>%s</tr>" % "".join(cells))
        out.append("</tbody></table>")
        self.parts.append("".join(out))

    def figure(self, fig: Any, caption: str, alt: Optional[str] = None, dpi: int = 110) -> None:
        """Embed a matplotlib figure as a PNG data URI (then close it)."""
        buf = io.BytesIO()
        fig.savefig(buf, format="png", dpi=dpi, bbox_inches="tight")
        pyplot().close(fig)
        data = base64.b64encode(buf.getvalue()).decode("ascii")
        self.parts.append('<figure><img alt="%s" src="data:image/png;base64,%s"><figcaption>%s</figcaption></figure>'
                          % (html.escape(alt or caption), data, html.escape(caption)))

    def html(self) -> str:
        return ("<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
                "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
                "<title>%s</title><style>%s</style></head><body>\n%s\n</body></html>\n"
                % (html.escape(self.title), STYLE, "\n".join(self.parts)))

    def write(self, path: Union[str, Path]) -> int:
        """Write the page (atomically: a temporary file, then rename); return its size."""
        data = self.html().encode("utf-8")
        path = Path(path)
        tmp = path.with_name(path.name + ".partial")
        tmp.write_bytes(data)
        tmp.replace(path)
        return len(data)


def _text(v: Any) -> str:
    if isinstance(v, float):
        return repr(v) if (v != v or abs(v) >= 1e6 or (v != 0 and abs(v) < 1e-4)) else "%.6g" % v
    return "" if v is None else str(v)
