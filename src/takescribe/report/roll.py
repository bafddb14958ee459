"""The second view of the page: a piano roll of the part and the take, and the pace bar by bar.

Conventions
-----------
- Time in the take runs left to right, a few bars per row; the part, placed at the player's
  own pace, is drawn as outlined boxes, what was heard as filled bars; every note of the part
  carries its pitch name (C4 = 60), written inside its box.
- Finding markers are the shapes of :mod:`takescribe.report.styles`; each is a
  ``<g class="finding" data-finding="<id>">`` the page's script makes clickable.
"""

from __future__ import annotations

import html
import math
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..comparison.compare import pitch_name
from .annotate import is_uncertain, label_of
from .styles import OUTLINE, marker_svg

__all__ = ["RollSettings", "HATCH", "piano_roll_rows", "tempo_svg"]

PLAYED_FILL = "#7F7F7F"

HATCH = ('<defs><pattern id="hatch" width="6" height="6" patternUnits="userSpaceOnUse" patternTransform="rotate(45)">'
         '<rect width="6" height="6" fill="#fff"/><line x1="0" y1="0" x2="0" y2="6" stroke="#888" stroke-width="2"/>'
         "</pattern></defs>")


@dataclass(frozen=True)
class RollSettings:
    """Geometry of the piano roll (SVG user units; the drawing scales to the page width).

    Attributes
    ----------
    bars_per_row : int
        Four bars a row leave room for a pitch name in every note at usual tempi.
    px_per_pitch : float
        Height of one semitone; tall enough for a 7-unit pitch name inside the box.
    """

    bars_per_row: int = 4
    width: float = 1000.0
    left: float = 34.0
    px_per_pitch: float = 9.0
    name_size: float = 7.0


@dataclass(frozen=True)
class _Row:
    t0: float
    t1: float
    low: int
    high: int
    settings: RollSettings

    @property
    def height(self) -> float:
        return 22.0 + (self.high - self.low + 1) * self.settings.px_per_pitch

    def x(self, t: float) -> float:
        s = self.settings
        scale = (s.width - s.left - 6.0) / (self.t1 - self.t0)
        return round(s.left + (min(max(t, self.t0), self.t1) - self.t0) * scale, 2)

    def y(self, p: float) -> float:
        return round(16.0 + (self.high - p) * self.settings.px_per_pitch, 2)


def piano_roll_rows(comparison: Any, reference: Any, *, draft_notes=None, settings: RollSettings | None = None) -> list[str]:
    """One ``<div class="row"><svg>`` per few bars of the take."""
    settings = settings or RollSettings()
    played = list(draft_notes) if draft_notes is not None else list(comparison.played_notes)
    exp_off = np.asarray(comparison.expected_offsets, dtype=float)
    times = sorted((float(t), int(m)) for m, t in comparison.measure_times.items()) or [(0.0, 1)]
    end = max([comparison.summary.get("take_duration", 0.0)] + [n.offset for n in played] + list(exp_off) + [0.0])
    starts = [t for k, (t, _) in enumerate(times) if k % settings.bars_per_row == 0]
    starts[0] = min(starts[0], 0.0)
    edges = starts + [max(end, starts[-1] + 1.0) + 0.25]
    rows = []
    for r in range(len(edges) - 1):
        if edges[r + 1] - edges[r] > 1e-6:
            rows.append(_row_svg(comparison, reference, played, times, edges[r], edges[r + 1], settings))
    return rows or ["<p>No notes to draw.</p>"]


def _row_svg(comparison, reference, played, times, t0, t1, settings: RollSettings) -> str:
    notes = list(getattr(reference, "notes", ()))
    exp_on = np.asarray(comparison.expected_onsets, dtype=float)
    exp_off = np.asarray(comparison.expected_offsets, dtype=float)
    # a note belongs to the row where it starts, or to a row it reaches well into
    in_ref = [i for i in range(len(notes)) if exp_on[i] < t1 and (exp_on[i] >= t0 or exp_off[i] > t0 + 0.05)]
    in_played = [n for n in played if n.onset < t1 and n.offset > t0]
    findings = [f for f in comparison.findings if t0 <= f.time < t1]
    pitches = [notes[i].pitch for i in in_ref] + [n.pitch for n in in_played]
    pitches += [p for f in findings for p in (f.expected_pitch, f.played_pitch) if p is not None]
    pitches = pitches or [60]
    row = _Row(t0, t1, min(pitches) - 2, max(pitches) + 2, settings)
    parts = [f'<div class="row"><svg viewBox="0 0 {settings.width:.0f} {row.height:.0f}" role="img" '
             f'aria-label="Piano roll from {t0:.1f} s to {t1:.1f} s">']
    parts += _guides(row)
    parts += _spans(comparison, row)
    parts += _bars(reference, times, row)
    for i in in_ref:
        status = comparison.note_status[i] if i < len(comparison.note_status) else "played"
        parts.append(_part_note(notes[i].pitch, exp_on[i], exp_off[i], status, row))
    for n in in_played:
        parts.append(f'<rect x="{row.x(n.onset)}" y="{row.y(n.pitch) + 2}" width="{max(row.x(n.offset) - row.x(n.onset), 1.5)}" '
                     f'height="{settings.px_per_pitch - 4}" fill="{PLAYED_FILL}" fill-opacity=".55"/>')
    for f in findings:
        pitch = f.played_pitch if f.kind in ("extra", "wrong_pitch") else f.expected_pitch
        pitch = row.high - 0.5 if pitch is None else pitch
        uncertain = ' data-uncertain="1"' if is_uncertain(f) else ""
        cx, cy = row.x(f.time), row.y(pitch) + settings.px_per_pitch / 2
        # a transparent square under the shape takes the click anywhere on the marker
        parts.append(f'<g class="finding" data-finding="{f.id}"{uncertain}><title>{html.escape(f"#{f.id} " + f.text)}</title>'
                     f'<rect x="{cx - 8}" y="{cy - 8}" width="16" height="16" fill="transparent"/>'
                     f'{marker_svg(f.kind, cx, cy, uncertain=bool(uncertain))}</g>')
    parts.append("</svg></div>")
    return "".join(parts)


def _guides(row: _Row) -> list[str]:
    out = []
    for p in range(row.low, row.high + 1):
        if p % 12 == 0:
            mid = row.y(p) + row.settings.px_per_pitch / 2
            out.append(f'<line x1="{row.settings.left}" y1="{mid}" x2="{row.settings.width}" y2="{mid}" stroke="#ddd"/>')
            out.append(f'<text x="2" y="{mid + 3}" font-size="9" fill="#555">{pitch_name(p)}</text>')
    return out


def _spans(comparison, row: _Row) -> list[str]:
    """Pauses and abandoned attempts, hatched."""
    out = []
    for f in comparison.findings:
        if f.kind == "hesitation" and f.deviation:
            a, b = f.time, f.time + float(f.deviation)
        elif f.kind == "restart":
            linked = [g.time for g in comparison.findings if g.linked_to == f.id]
            a, b = min(linked + [f.time]), (f.to_time if f.to_time is not None else f.time)
        else:
            continue
        if b > row.t0 and a < row.t1:
            out.append(f'<rect x="{row.x(a)}" y="14" width="{max(row.x(b) - row.x(a), 1)}" height="{row.height - 16}" '
                       f'fill="url(#hatch)" opacity=".45"><title>{html.escape(f.text)}</title></rect>')
    return out


def _bars(reference, times, row: _Row) -> list[str]:
    out = []
    for t, m in times:
        if row.t0 - 1e-6 <= t < row.t1:
            out.append(f'<line x1="{row.x(t)}" y1="10" x2="{row.x(t)}" y2="{row.height - 2}" stroke="#000"/>')
            out.append(f'<text class="bar-number" data-bar="{m}" x="{row.x(t) + 3}" y="10" font-size="10" '
                       f'font-weight="bold">{html.escape(label_of(reference, m))}</text>')
    return out


def _part_note(pitch: int, onset: float, offset: float, status: str, row: _Row) -> str:
    s = row.settings
    x0, width, y0 = row.x(onset), max(row.x(offset) - row.x(onset), 1.5), row.y(pitch)
    name = (f'<text x="{x0 + 1.5}" y="{y0 + s.px_per_pitch - 1.8}" font-size="{s.name_size}" fill="{OUTLINE}" '
            f'class="pitch-name">{pitch_name(pitch)}</text>')
    if status == "uncertain":
        return (f'<g data-uncertain="1"><title>{html.escape(pitch_name(pitch))}: the recording could not settle it; '
                f'listen</title><rect x="{x0}" y="{y0}" width="{width}" height="{s.px_per_pitch}" fill="none" '
                f'stroke="#767676" stroke-width="1.4" stroke-dasharray="1.5,2"/>{name}</g>')
    dash = ' stroke-dasharray="3,2"' if status == "missed" else ""
    return (f'<g><rect x="{x0}" y="{y0}" width="{width}" height="{s.px_per_pitch}" fill="#FFFFFF" fill-opacity="0" '
            f'stroke="{OUTLINE}" stroke-width="1.1"{dash}/>{name}</g>')


def tempo_svg(comparison: Any, reference: Any) -> str:
    """The player's pace bar by bar against the written tempo."""
    curve = comparison.summary.get("tempo_curve") or []
    if len(curve) == 0:
        return "<p>Not enough notes lined up to follow the pace.</p>"
    width, height, left, bottom = 1000.0, 220.0, 48.0, 28.0
    measures = [c["measure"] for c in curve]
    bpm = [c["beats_per_minute"] for c in curve]
    written = _written_bpm(reference, curve)
    values = bpm + [w for w in written if w is not None]
    pad = max(5.0, 0.1 * (max(values) - min(values)))
    low, high = max(min(values) - pad, 0.0), max(values) + pad
    m0, m1 = min(measures), max(max(measures), min(measures) + 1)

    def x(m: float) -> float:
        return round(left + (m - m0) / (m1 - m0) * (width - left - 10), 2)

    def y(v: float) -> float:
        return round(10 + (high - v) / (high - low) * (height - bottom - 10), 2)

    parts = [f'<svg viewBox="0 0 {width:.0f} {height:.0f}" role="img" aria-label="Pace bar by bar" style="width:100%;height:auto">']
    for v in np.linspace(low, high, 5):
        parts.append(f'<line x1="{left}" y1="{y(v)}" x2="{width - 10}" y2="{y(v)}" stroke="#e3e3e3"/>'
                     f'<text x="{left - 4}" y="{y(v) + 3}" font-size="10" text-anchor="end">{v:.0f}</text>')
    for m in measures[::max(1, int(math.ceil(len(measures) / 25)))]:
        parts.append(f'<text x="{x(m)}" y="{height - 10}" font-size="10" text-anchor="middle">{html.escape(label_of(reference, m))}</text>')
    parts.append(f'<text x="{width / 2}" y="{height}" font-size="10" text-anchor="middle">bar</text>'
                 f'<text x="10" y="{height / 2}" font-size="10" transform="rotate(-90 10 {height / 2})" '
                 'text-anchor="middle">quarter notes per minute</text>')
    pts = [(x(m), y(v)) for m, v in zip(measures, written) if v is not None]
    if pts:
        parts.append('<polyline points="' + " ".join(f"{a},{b}" for a, b in pts)
                     + '" fill="none" stroke="#000" stroke-width="1.2" stroke-dasharray="6,4"/>')
    parts.append('<polyline points="' + " ".join(f"{x(m)},{y(v)}" for m, v in zip(measures, bpm))
                 + '" fill="none" stroke="#0072B2" stroke-width="2"/>')
    for m, v in zip(measures, bpm):
        parts.append(f'<circle cx="{x(m)}" cy="{y(v)}" r="3" fill="#0072B2"><title>bar {m}: {v:.0f} per minute</title></circle>')
    parts.append("</svg><p><small>Solid line with dots: the player's pace, bar by bar. Dashed line: the tempo "
                 "written in the part.</small></p>")
    return "".join(parts)


def _written_bpm(reference: Any, curve: list[dict]) -> list[float | None]:
    tempo_map = getattr(reference, "tempo_map", None)
    if not tempo_map:
        return [None] * len(curve)
    starts = np.array([float(q) for q, _ in tempo_map])
    bpms = np.array([float(b) for _, b in tempo_map])
    out = []
    for c in curve:
        k = int(np.searchsorted(starts, c["score_quarters"] + 1e-9, side="right")) - 1
        out.append(float(bpms[max(k, 0)]))
    return out
