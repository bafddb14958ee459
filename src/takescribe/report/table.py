"""The list of every finding, and the ways the page writes times, beats and amounts.

Conventions
-----------
- Each row is ``<tr data-finding="<id>">``; its play button and its bar number are what the
  page's script makes clickable. Rows of findings to check by ear carry ``data-uncertain``.
- Beats are written as musicians count them ("3½"); times as minutes:seconds.
"""

from __future__ import annotations

import html

import numpy as np

from ..comparison.compare import pitch_name
from .annotate import is_uncertain
from .styles import KIND_STYLES, marker_svg

__all__ = ["findings_table", "format_time", "format_beat", "format_deviation"]

_FRACTIONS = ((0.0, ""), (0.25, "\u00bc"), (1 / 3, "\u2153"), (0.5, "\u00bd"), (2 / 3, "\u2154"), (0.75, "\u00be"),
              (1.0, ""))

#: How close (in beats) a position must be to a half, third or quarter of a beat to be written as one.
BEAT_FRACTION_TOLERANCE = 0.04


def format_time(t: float) -> str:
    """Seconds as ``m:ss.s``."""
    minutes, seconds = divmod(max(float(t), 0.0), 60.0)
    return f"{int(minutes)}:{seconds:04.1f}"


def format_deviation(kind: str, value: float | None) -> str:
    """The amount of a finding in words a teacher reads."""
    if value is None:
        return ""
    if kind == "wrong_pitch":
        return f"{value:+.0f} semitone{'s' if abs(value) != 1 else ''}"
    if kind == "hesitation":
        return f"{value:.1f} s stop"
    if kind == "restart":
        return f"{value:.1f} s of music again"
    return f"{value:+.2f} s"


def format_beat(beat: float | None) -> str:
    """A beat as a teacher reads it: "3", "3½" (halfway through beat 3), "2¼"; else one decimal."""
    if beat is None:
        return ""
    whole = int(np.floor(beat + 1e-9))
    part = beat - whole
    fraction, mark = min(_FRACTIONS, key=lambda item: abs(item[0] - part))
    if abs(fraction - part) > BEAT_FRACTION_TOLERANCE:
        return f"{beat:.1f}"
    return f"{whole + int(fraction == 1.0)}{mark}"


def findings_table(comparison) -> str:
    """The findings as an HTML table, one row each, linked findings indented under theirs."""
    if not comparison.findings:
        return "<p>Nothing to point out: every note of the part was heard, in time.</p>"
    esc = html.escape
    rows = ['<div class="table-wrap"><table><thead><tr><th>#</th><th>listen</th><th>what</th><th>bar</th><th>beat</th>'
            "<th>time</th><th>written</th><th>heard</th><th>by</th><th>in words</th></tr></thead><tbody>"]
    for f in comparison.findings:
        st = KIND_STYLES[f.kind]
        uncertain = is_uncertain(f)
        classes = " ".join(c for c in ("linked" if f.linked_to is not None else "", "uncertain" if uncertain else "") if c)
        attrs = f' data-finding="{f.id}"' + (f' class="{classes}"' if classes else "") + (' data-uncertain="1"' if uncertain else "")
        bar = esc(str(f.measure_label or f.measure or ""))
        bar_cell = f'<button type="button" class="bar-link" data-bar="{f.measure}">{bar}</button>' if f.measure else ""
        note = " (listen to check)" if uncertain else ""
        rows.append(
            f"<tr{attrs}><td class=\"num\">{f.id}</td>"
            f'<td><button type="button" class="play" data-finding="{f.id}" aria-label="play from just before finding {f.id}">'
            "&#9654;</button></td>"
            f'<td><svg width="14" height="14" aria-hidden="true">{marker_svg(f.kind, 7, 7, 4.5, uncertain=uncertain)}</svg> '
            f"{esc(st.label)}</td><td>{bar_cell}</td>"
            f"<td class=\"num\">{format_beat(f.beat)}</td><td class=\"num\">{format_time(f.time)}</td>"
            f"<td>{'' if f.expected_pitch is None else pitch_name(f.expected_pitch)}</td>"
            f"<td>{'' if f.played_pitch is None else pitch_name(f.played_pitch)}</td>"
            f"<td class=\"num\">{esc(format_deviation(f.kind, f.deviation))}</td>"
            f"<td>{esc(f.text)}{esc(note)}{'' if f.linked_to is None else f' (see #{f.linked_to})'}</td></tr>"
        )
    rows.append("</tbody></table></div>")
    return "".join(rows)
