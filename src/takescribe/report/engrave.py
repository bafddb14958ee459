"""The annotated part engraved as SVG for the page, with the engraving library (offline, from its wheel).

Conventions
-----------
- Input is the annotated MusicXML of :mod:`takescribe.report.annotate`; its note ids
  (``ts-n<k>``) survive into the SVG as the ids of the engraving's ``<g class="note">`` groups,
  and every bar is a ``<g class="measure" data-n="<printed number>">``.
- Every bar shows its number (so a teacher can click it); the whole part is one page, laid
  out in systems for the report's width; the SVG scales to its container.
- ``id_suffix`` renames the note ids of a second engraving of the same part on one page
  (HTML ids are page-wide).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

__all__ = ["EngraveSettings", "engrave_svg"]


@dataclass(frozen=True)
class EngraveSettings:
    """Layout of the engraving (the engraving library's options).

    Attributes
    ----------
    page_width : int
        Page width in the engraving library's units (tenths of a staff space at scale 100); with ``scale``
        it gives systems about as wide as the report's column.
    scale : int
        Percent; 48 keeps five-line staves readable on a laptop screen at 1100 px.
    lyric_size : float
        Size of the finding words under the notes (the engraving library's unit, staff spaces); smaller
        than sung text, as they are labels.
    """

    page_width: int = 2200
    scale: int = 48
    lyric_size: float = 3.6


def engrave_svg(musicxml: bytes, *, settings: EngraveSettings | None = None, id_suffix: str = "") -> str:
    """One SVG of the whole part (see the module docstring)."""
    import verovio

    settings = settings or EngraveSettings()
    toolkit = verovio.toolkit()
    toolkit.setOptions({
        "pageWidth": settings.page_width, "pageHeight": 60000, "adjustPageHeight": True,
        "scale": settings.scale, "breaks": "auto", "svgViewBox": True, "header": "none", "footer": "none",
        "mnumInterval": 1, "svgAdditionalAttribute": ["measure@n"], "lyricSize": settings.lyric_size,
        "svgRemoveXlink": True, "xmlIdSeed": 1,  # the same part gives the same SVG, ids included
    })
    text = musicxml.decode("utf-8") if isinstance(musicxml, (bytes, bytearray)) else str(musicxml)
    if not toolkit.loadData(text):
        raise ValueError("the engraving library could not read the annotated MusicXML")
    pages = [toolkit.renderToSVG(page) for page in range(1, toolkit.getPageCount() + 1)]
    svg = "".join(_strip_prolog(page) for page in pages)
    if id_suffix:
        svg = re.sub(r'id="(ts-n\d+)"', rf'id="\1{id_suffix}"', svg)
    return svg


def _strip_prolog(svg: str) -> str:
    return re.sub(r"^\s*<\?xml[^>]*\?>\s*", "", svg)
