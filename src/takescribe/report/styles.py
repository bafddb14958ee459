"""How each kind of finding looks and is named, everywhere in the report.

Conventions
-----------
- Meaning never rests on colour alone: every kind has a shape of its own and a word or two
  written beside its note. The colours only group kinds by what to listen for (the pitch,
  the rhythm, the length of a note, the flow of the playing), so two kinds share a colour
  only when their shapes point opposite ways (early / late, cut short / held on).
- No colour means "right" or "wrong": there is no green for what went well and no
  red-against-green pair. Notes played as written are simply left unmarked.
- The colours are taken from the eight-colour set of Okabe & Ito [1]_, chosen so that
  readers with the common colour-vision deficiencies can tell them apart; each filled
  shape has a dark outline so it stands out from white paper (WCAG 2.1 non-text contrast).
- Names and words are plain teaching language chosen for this project.

References
----------
.. [1] M. Okabe and K. Ito, "Color Universal Design (CUD): how to make figures and
   presentations that are friendly to colorblind people", J*Fly, 2008.
"""

from __future__ import annotations

import html
from dataclasses import dataclass

from ..comparison.compare import KINDS

__all__ = ["KindStyle", "KIND_STYLES", "LISTEN_STYLE", "marker_svg", "legend_html", "kinds_present", "OUTLINE"]

OUTLINE = "#1A1A1A"


@dataclass(frozen=True, slots=True)
class KindStyle:
    """How one kind of finding is shown.

    Attributes
    ----------
    label : str
        Teacher-facing name (legend, table, header counts).
    colour : str
        ``#RRGGBB`` from the Okabe–Ito set; shared by kinds of one group.
    shape : str
        Marker shape name understood by :func:`marker_svg`.
    notehead : str or None
        MusicXML 4.0 notehead value on the annotated note (None: the notehead is kept).
    word : str
        The word or two written beside the note in the engraved score.
    group : str
        What to listen for: ``"pitch"``, ``"rhythm"``, ``"length"`` or ``"flow"``.
    """

    label: str
    colour: str
    shape: str
    notehead: str | None
    word: str
    group: str


KIND_STYLES = {
    "wrong_pitch": KindStyle("wrong note", "#D55E00", "cross", "x", "wrong", "pitch"),
    "missed": KindStyle("note left out", "#0072B2", "diamond", "diamond", "left out", "pitch"),
    "extra": KindStyle("added note", "#CC79A7", "plus", None, "added", "pitch"),
    "early": KindStyle("came early", "#E69F00", "point-left", "triangle", "early", "rhythm"),
    "late": KindStyle("came late", "#E69F00", "point-right", "inverted triangle", "late", "rhythm"),
    "held_short": KindStyle("cut short", "#56B4E9", "bracket-in", "slash", "short", "length"),
    "held_long": KindStyle("held on too long", "#56B4E9", "bracket-out", "square", "long", "length"),
    "hesitation": KindStyle("stopped", "#000000", "pause", None, "stop", "flow"),
    "restart": KindStyle("went back", "#000000", "loop", None, "back", "flow"),
}

#: Notes the recording cannot settle, and findings the comparison marks ``check_by_ear``.
LISTEN_STYLE = KindStyle("listen to check", "#767676", "ring", None, "listen?", "listen")


def kinds_present(findings) -> list[str]:
    """Kinds with at least one finding, in :data:`KINDS` order."""
    present = {f.kind for f in findings}
    return [k for k in KINDS if k in present]


def marker_svg(kind: str, x: float, y: float, size: float = 6.0, *, uncertain: bool = False) -> str:
    """SVG of one finding kind's shape centred on ``(x, y)``; dashed when ``uncertain``."""
    st = LISTEN_STYLE if kind == "listen" else KIND_STYLES[kind]
    c, s = st.colour, size
    dash = ' stroke-dasharray="2,1.5"' if uncertain else ""
    line = f'stroke="{c}" stroke-width="{0.36 * s:.2f}" fill="none" stroke-linecap="round"{dash}'
    filled = f'fill="{c}" stroke="{OUTLINE}" stroke-width="{0.2 * s:.2f}"{dash}'
    x, y = round(x, 2), round(y, 2)
    paths = {
        "cross": f'<path d="M{x-s},{y-s}L{x+s},{y+s}M{x-s},{y+s}L{x+s},{y-s}" {line}/>',
        "plus": f'<path d="M{x-s},{y}L{x+s},{y}M{x},{y-s}L{x},{y+s}" {line}/>',
        "diamond": f'<path d="M{x},{y-s}L{x+s},{y}L{x},{y+s}L{x-s},{y}Z" {line}/>',
        "point-left": f'<path d="M{x-s},{y}L{x+s},{y-s}L{x+s},{y+s}Z" {filled}/>',
        "point-right": f'<path d="M{x+s},{y}L{x-s},{y-s}L{x-s},{y+s}Z" {filled}/>',
        "bracket-in": (f'<path d="M{x-s},{y-s}L{x-s*.3},{y}L{x-s},{y+s}M{x+s},{y-s}L{x+s*.3},{y}L{x+s},{y+s}" '
                       f'{line}/>'),
        "bracket-out": (f'<path d="M{x-s*.3},{y-s}L{x-s},{y}L{x-s*.3},{y+s}M{x+s*.3},{y-s}L{x+s},{y}L{x+s*.3},{y+s}" '
                        f'{line}/>'),
        "pause": (f'<rect x="{x-s}" y="{y-s}" width="{0.7*s:.2f}" height="{2*s}" {filled}/>'
                  f'<rect x="{x+0.3*s:.2f}" y="{y-s}" width="{0.7*s:.2f}" height="{2*s}" {filled}/>'),
        "loop": (f'<path d="M{x+s},{y+s*.2}A{s},{s} 0 1 0 {x},{y+s}" {line}/>'
                 f'<path d="M{x-s*.3},{y+s*.5}L{x},{y+s}L{x-s*.4},{y+s*1.5}" {line}/>'),
        "ring": f'<circle cx="{x}" cy="{y}" r="{s}" {line} stroke-dasharray="2,1.5"/>',
    }
    if st.shape not in paths:
        raise ValueError(f"unknown marker shape {st.shape!r}")
    return paths[st.shape]


def legend_html(kinds: list[str], *, with_listen: bool, with_roll: bool = False) -> str:
    """The legend: only the kinds present, then the "listen to check" mark when used."""
    items = []
    if with_roll:
        items.append('<span><svg width="26" height="14" aria-hidden="true"><rect x="1" y="3" width="24" height="8" '
                     f'fill="#FFFFFF" stroke="{OUTLINE}" stroke-width="1.2"/></svg>the part, at the player\'s pace</span>')
        items.append('<span><svg width="26" height="14" aria-hidden="true"><rect x="1" y="4" width="24" height="6" '
                     'fill="#7F7F7F"/></svg>what was heard</span>')
    for kind in kinds:
        st = KIND_STYLES[kind]
        items.append(f'<span data-kind="{kind}"><svg width="18" height="18" aria-hidden="true">{marker_svg(kind, 9, 9, 5)}'
                     f'</svg>{html.escape(st.label)} <i>({html.escape(st.word)})</i></span>')
    if with_listen:
        items.append(f'<span data-kind="listen"><svg width="18" height="18" aria-hidden="true">'
                     f'{marker_svg("listen", 9, 9, 5)}</svg>{html.escape(LISTEN_STYLE.label)}: '
                     "the recording could not settle it</span>")
    return '<div class="legend">' + "".join(items) + "</div>"
