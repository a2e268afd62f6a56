"""A matplotlib figure made fit to sit inline in a page: SVG (and optionally PNG), ids unique
per figure, hover texts as ``<title>`` elements."""

from __future__ import annotations

import io
import re
from dataclasses import dataclass
from html import escape

from matplotlib.figure import Figure


@dataclass
class Figures:
    """What was drawn, for the page and for checks: counts per figure."""

    svg: str
    png: bytes | None
    alarm_spans: int
    notes: int
    hover: dict[str, str]


def finish(fig: Figure, key: str, hover: dict[str, str], spans: int, n_notes: int,
            png: bool) -> Figures:
    buf = io.StringIO()
    fig.savefig(buf, format="svg", metadata={"Date": None})
    svg = svg_of(buf.getvalue(), key, hover)
    data = None
    if png:
        b = io.BytesIO()
        fig.savefig(b, format="png", dpi=110, metadata={"Software": None})
        data = b.getvalue()
    return Figures(svg, data, spans, n_notes, hover)


_ID = re.compile(r'\bid="([^"]+)"')
_URL = re.compile(r"url\(#([^)]+)\)")
_HREF = re.compile(r'(xlink:href|href)="#([^"]+)"')


def _class_of(gid: str) -> str:
    return re.sub(r"-\d+$", "", gid)


def svg_of(text: str, key: str, hover: dict[str, str]) -> str:
    """Matplotlib's SVG made fit to sit inline in a page next to others: no XML prolog, ids
    prefixed with ``key`` (unique in the page), a ``<title>`` (hover text) and a class on
    every hoverable group, scaled to the page width."""
    text = text[text.index("<svg"):]
    text = re.sub(r"<metadata>.*?</metadata>\s*", "", text, count=1, flags=re.S)
    text = _ID.sub(lambda m: f'id="{key}--{m.group(1)}"', text)
    text = _URL.sub(lambda m: f"url(#{key}--{m.group(1)})", text)
    text = _HREF.sub(lambda m: f'{m.group(1)}="#{key}--{m.group(2)}"', text)
    for gid, tip in hover.items():
        text = text.replace(f'<g id="{key}--{gid}">',
                            f'<g id="{key}--{gid}" class="{_class_of(gid)}">'
                            f"<title>{escape(tip, quote=False)}</title>", 1)
    # scale with the page: keep the viewBox, drop the fixed size
    text = re.sub(r'<svg([^>]*?)\swidth="[^"]+"\s+height="[^"]+"',
                  rf'<svg\1 width="100%" class="plot" data-panel="{key}" role="img"', text,
                  count=1)
    return text.strip()
