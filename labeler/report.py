"""Self-contained HTML reports: escaped text, tables, and matplotlib figures embedded as PNG.

Every string that comes from inputs (item text, topic names, ids) goes through :func:`esc`
(item metadata is user-generated and may hold markup). Figures are drawn with the Agg backend and
can be checked for overlapping text with :func:`overlapping_texts`.
"""
from __future__ import annotations

import base64
import html
import io
import itertools
from typing import Iterable

import pandas as pd


def esc(value) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def new_figure(width: float, height: float):
    import matplotlib
    matplotlib.use("Agg", force=False)
    import matplotlib.pyplot as plt
    fig = plt.figure(figsize=(width, height), dpi=100)
    return fig


def plain_text():
    """A matplotlib context in which text is drawn as given: a topic or group name such as
    '$\\notacommand{x}$' is text, never math markup (user metadata must not break a report)."""
    import matplotlib
    return matplotlib.rc_context({"text.parse_math": False})


def close(fig) -> None:
    import matplotlib.pyplot as plt
    plt.close(fig)


def figure_png(fig) -> str:
    """The figure as a data URI (PNG), for an <img> that needs no other file."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=100)
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def overlapping_texts(fig, pad: float = 0.5) -> list[tuple[str, str]]:
    """Pairs of visible, non-empty texts of ``fig`` whose drawn boxes overlap (in pixels)."""
    from matplotlib.text import Text
    fig.canvas.draw()
    renderer = fig.canvas.get_renderer()
    undrawn = set()  # labels of ticks outside the view: they exist but are never drawn
    for ax in fig.axes:
        for axis in (ax.xaxis, ax.yaxis):
            lo, hi = sorted(axis.get_view_interval())
            eps = 1e-9 * max(1.0, abs(hi - lo))
            for tick in axis.get_major_ticks() + axis.get_minor_ticks():
                if not lo - eps <= tick.get_loc() <= hi + eps:
                    undrawn.update({id(tick.label1), id(tick.label2)})
    boxes = []
    for t in fig.findobj(Text):
        if not t.get_visible() or not t.get_text().strip() or id(t) in undrawn:
            continue
        bb = t.get_window_extent(renderer)
        if bb.width <= 0 or bb.height <= 0:
            continue
        boxes.append((t.get_text(), bb.expanded(1.0, 1.0).padded(-pad)))
    return [(a, b) for (a, ba), (b, bb) in itertools.combinations(boxes, 2) if ba.overlaps(bb)]


def table(df: pd.DataFrame, max_rows: int = 50, floats: str = "{:.4g}") -> str:
    """An HTML table with every cell escaped."""
    head = "".join(f"<th>{esc(c)}</th>" for c in df.columns)
    rows = []
    for rec in df.head(max_rows).itertuples(index=False):
        cells = []
        for v in rec:
            if isinstance(v, float) and v.is_integer() and abs(v) >= 1000:
                text = f"{int(v):,}"
            elif isinstance(v, float):
                text = floats.format(v)
            else:
                text = f"{v:,}" if isinstance(v, int) and not isinstance(v, bool) else v
            cells.append(f"<td>{esc(text)}</td>")
        rows.append("<tr>" + "".join(cells) + "</tr>")
    more = f"<p class='note'>{len(df) - max_rows} more rows in the CSV.</p>" if len(df) > max_rows else ""
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(rows)}</tbody></table>{more}"


def image(uri: str, alt: str) -> str:
    return f"<img src='{uri}' alt='{esc(alt)}'>"


CSS = """
body { font-family: system-ui, -apple-system, 'Segoe UI', sans-serif; margin: 2em auto; max-width: 1100px;
       color: #222; line-height: 1.45; padding: 0 1em; }
h1 { font-size: 1.6em; } h2 { font-size: 1.25em; margin-top: 2em; border-bottom: 1px solid #ddd; }
table { border-collapse: collapse; margin: 0.6em 0; font-size: 0.9em; }
th, td { border: 1px solid #ddd; padding: 0.25em 0.6em; text-align: left; vertical-align: top; }
th { background: #f3f3f3; } .pass { color: #176b2c; font-weight: 600; } .fail { color: #a1141c; font-weight: 600; }
img { max-width: 100%; height: auto; display: block; margin: 0.8em 0; } .note { color: #666; font-size: 0.9em; }
"""


def page(title: str, sections: Iterable[tuple[str, str]], intro: str = "") -> str:
    """A whole HTML document: ``sections`` are (heading, HTML body) pairs; headings are escaped,
    bodies must already be built from escaped parts."""
    body = "".join(f"<h2>{esc(h)}</h2>{b}" for h, b in sections)
    return (f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>{esc(title)}</title>"
            f"<style>{CSS}</style></head><body><h1>{esc(title)}</h1>{intro}{body}</body></html>\n")
