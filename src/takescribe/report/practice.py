"""Practice report of a comparison: a self-contained HTML page, findings JSON, annotated
MusicXML and the draft MIDI, written into one folder.

Files written by :func:`write_report` (all through :mod:`takescribe.safeio`: atomic, never
replacing an existing file without ``force``):

- ``report.html`` — opens offline in any browser: inline CSS, inline SVG drawn here, the
  take embedded as a ``data:`` URI (the original file when it is at most
  :data:`MAX_EMBED_BYTES`, otherwise a 16 kHz mono OGG Vorbis made from it), no scripts,
  fonts or images from elsewhere.
- ``findings.json`` — :func:`takescribe.compare.findings_json` (schema in
  :mod:`takescribe.compare`).
- ``annotated.musicxml`` — the reference part with every finding marked on its note
  (colour, notehead shape and a short lyric word), extra notes and restarts as text
  directions at their place; MusicXML 4.0.
- ``take.mid`` — the draft transcription, when its bytes are given.

Conventions
-----------
- One visual language everywhere (HTML piano roll, legend, table and MusicXML): every kind
  of finding has a colour *and* a shape, so the report reads in greyscale and for readers
  with colour-vision deficiencies. The colours are the eight-colour palette of Okabe & Ito
  (see References); shapes carry the meaning on their own.
- Piano roll: time in the take runs left to right, a few bars per row; the part, placed at
  the player's own pace, is drawn as outlined boxes, what was played as filled bars.

References
----------
.. [1] M. Okabe and K. Ito, "Color Universal Design (CUD): how to make figures and
   presentations that are friendly to colorblind people", J*Fly, 2008 (the palette).
"""

from __future__ import annotations

import base64
import html
import io
import math
import os
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Sequence

import numpy as np

from ..comparison.compare import KINDS, Comparison, pitch_name
from ..errors import InputError, OutputError
from ..notes import Note
from ..safeio import ensure_folder, write_bytes, write_text

__all__ = ["KIND_STYLES", "KindStyle", "MAX_EMBED_BYTES", "write_report", "render_html", "annotate_musicxml"]

MAX_EMBED_BYTES = 15 * 1024 * 1024


@dataclass(frozen=True, slots=True)
class KindStyle:
    """How one kind of finding is shown."""

    label: str  # teacher-facing name
    colour: str  # Okabe–Ito palette
    shape: str  # marker in the piano roll
    notehead: str | None  # MusicXML notehead value on the annotated note
    word: str  # short lyric word in the annotated score


# Okabe & Ito (2008) palette: black #000000, orange #E69F00, sky blue #56B4E9,
# bluish green #009E73, yellow #F0E442, blue #0072B2, vermillion #D55E00, reddish purple #CC79A7
KIND_STYLES = {
    "wrong_pitch": KindStyle("wrong note", "#D55E00", "cross", "x", "wrong"),
    "missed": KindStyle("missed note", "#0072B2", "diamond", "diamond", "missed"),
    "extra": KindStyle("extra note", "#000000", "plus", None, "extra"),
    "early": KindStyle("early", "#009E73", "triangle-left", "triangle", "early"),
    "late": KindStyle("late", "#E69F00", "triangle-right", "inverted triangle", "late"),
    "held_short": KindStyle("released early", "#CC79A7", "bar", "slash", "short"),
    "held_long": KindStyle("held too long", "#56B4E9", "square", "square", "long"),
    "hesitation": KindStyle("hesitation", "#000000", "pause", None, "pause"),
    "restart": KindStyle("went back", "#D55E00", "arrow", None, "restart"),
}

_PART_FILL = "#FFFFFF"
_PLAYED_FILL = "#7F7F7F"


# --------------------------------------------------------------------------- entry point


def write_report(
    folder: str | os.PathLike,
    comparison: Comparison,
    reference: Any,
    *,
    take_path: str | os.PathLike | None = None,
    draft_notes: Sequence[Note] | None = None,
    draft_midi_bytes: bytes | None = None,
    title: str | None = None,
    force: bool = False,
) -> dict:
    """Write the practice report of ``comparison`` into ``folder``.

    Parameters
    ----------
    folder : path-like
        Output folder, created when missing.
    comparison : takescribe.compare.Comparison
    reference : takescribe.score.Reference
        The part compared with (its ``source`` MusicXML/MIDI file is annotated when readable;
        otherwise the part is rebuilt from its notes).
    take_path : path-like, optional
        The take's audio file, embedded in the HTML page.
    draft_notes : sequence of Note, optional
        The draft transcription; drawn in the piano roll instead of
        ``comparison.played_notes`` when given.
    draft_midi_bytes : bytes, optional
        Standard MIDI File of the draft, written as ``take.mid``.
    title : str, optional
        Heading of the page (default: the part's name or file name).
    force : bool
        Replace existing files.

    Returns
    -------
    dict
        ``{"report.html": Path, "findings.json": Path, "annotated.musicxml": Path,
        "take.mid": Path (when written)}``.

    Raises
    ------
    OutputError
        If a file exists and ``force`` is false, or the folder cannot be written.
    InputError
        If the take cannot be read for embedding.
    """
    if not isinstance(comparison, Comparison):
        raise TypeError(f"comparison must be a takescribe.compare.Comparison, got {type(comparison).__name__}")
    if draft_midi_bytes is not None and not isinstance(draft_midi_bytes, (bytes, bytearray)):
        raise TypeError(f"draft_midi_bytes must be bytes (a Standard MIDI File), got {type(draft_midi_bytes).__name__}")
    if draft_midi_bytes is not None and bytes(draft_midi_bytes[:4]) != b"MThd":
        raise InputError("draft_midi_bytes does not start with 'MThd': it is not a Standard MIDI File")
    folder = ensure_folder(folder)
    names = ["report.html", "findings.json", "annotated.musicxml"] + (["take.mid"] if draft_midi_bytes is not None else [])
    if not force:
        # refuse before writing anything, so a refused report leaves no mixture of old and new files
        existing = [n for n in names if (folder / n).exists()]
        if existing:
            raise OutputError(f"{folder}: {', '.join(existing)} already exist; pass --force to overwrite or choose another folder")
    audio = _embedded_audio(take_path) if take_path is not None else None
    musicxml = annotate_musicxml(comparison, reference)
    page = render_html(comparison, reference, audio=audio, draft_notes=draft_notes, title=title,
                       take_name=None if take_path is None else Path(take_path).name)
    written = {
        "findings.json": write_text(folder / "findings.json", comparison.dumps() + "\n", force=force),
        "annotated.musicxml": write_bytes(folder / "annotated.musicxml", musicxml, force=force),
    }
    if draft_midi_bytes is not None:
        written["take.mid"] = write_bytes(folder / "take.mid", bytes(draft_midi_bytes), force=force)
    written["report.html"] = write_text(folder / "report.html", page, force=force)
    return written


# --------------------------------------------------------------------------- audio


def _embedded_audio(take_path: str | os.PathLike) -> tuple[str, bytes]:
    """``(mime type, bytes)`` of the take to embed; large takes are re-encoded smaller."""
    path = Path(take_path)
    if not path.is_file():
        raise InputError(f"{path}: take not found; give the audio file that was compared")
    mime = {".flac": "audio/flac", ".wav": "audio/wav", ".ogg": "audio/ogg", ".oga": "audio/ogg",
            ".mp3": "audio/mpeg", ".opus": "audio/ogg"}.get(path.suffix.lower())
    size = path.stat().st_size
    if mime is not None and size <= MAX_EMBED_BYTES:
        return mime, path.read_bytes()
    import soundfile as sf

    from ..audio.load import load_audio, release_samples

    # a long take stays in a temporary file and is encoded block by block (flat memory)
    y, sr = load_audio(path, sr=16000, spill_seconds=150.0)
    buffer = io.BytesIO()
    try:
        with sf.SoundFile(buffer, "w", samplerate=sr, channels=1, format="OGG", subtype="VORBIS") as out:
            step = 60 * sr
            for first in range(0, len(y), step):
                out.write(np.asarray(y[first:first + step]))
                release_samples(y, first, first + step)
        return "audio/ogg", buffer.getvalue()
    except Exception:  # noqa: BLE001 - libsndfile without Vorbis: 8 kHz 16-bit WAV instead
        buffer = io.BytesIO()
        step = 2
        sf.write(buffer, y[::step], sr // step, format="WAV", subtype="PCM_16")
        warnings.warn(f"{path}: OGG encoding unavailable; the report embeds an 8 kHz WAV copy", stacklevel=3)
        return "audio/wav", buffer.getvalue()


# --------------------------------------------------------------------------- HTML


_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:1.5rem auto;max-width:70rem;
 padding:0 1rem;color:#1a1a1a;background:#fff;line-height:1.45}
h1{font-size:1.5rem;margin-bottom:.2rem} h2{font-size:1.15rem;margin-top:2rem;border-bottom:1px solid #ccc}
.caution{border-left:4px solid #000;padding:.5rem .9rem;background:#f4f4f4;margin:1rem 0}
.figures{display:flex;flex-wrap:wrap;gap:.6rem;margin:.8rem 0}
.figure{border:1px solid #bbb;border-radius:4px;padding:.4rem .7rem;min-width:7.5rem}
.figure b{display:block;font-size:1.3rem}
.legend{display:flex;flex-wrap:wrap;gap:.3rem 1.2rem;margin:.5rem 0;font-size:.9rem}
.legend span{display:inline-flex;align-items:center;gap:.3rem}
.row{margin:.6rem 0 1.2rem} .row svg{width:100%;height:auto;display:block}
table{border-collapse:collapse;width:100%;font-size:.9rem}
th,td{border-bottom:1px solid #ddd;padding:.25rem .4rem;text-align:left;vertical-align:top}
th{background:#f0f0f0} td.num{text-align:right;font-variant-numeric:tabular-nums}
.linked td{color:#555} .linked td:first-child{padding-left:1.2rem}
audio{width:100%;margin:.5rem 0}
@media print{.row{break-inside:avoid}}
@media (max-width:40rem){.row{overflow-x:auto} .row svg{width:56rem;max-width:none}}
"""


def render_html(
    comparison: Comparison,
    reference: Any,
    *,
    audio: tuple[str, bytes] | None = None,
    draft_notes: Sequence[Note] | None = None,
    title: str | None = None,
    take_name: str | None = None,
) -> str:
    """The report page as one self-contained HTML document (see the module docstring)."""
    summary = comparison.summary
    name = title or getattr(reference, "part_name", "") or Path(str(getattr(reference, "source", "") or "part")).stem or "part"
    esc = html.escape
    out = ["<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">',
           f"<title>Practice report: {esc(name)}</title>", f"<style>{_CSS}</style>", "</head>", "<body>"]
    out.append(f"<h1>Practice report: {esc(name)}</h1>")
    if take_name:
        out.append(f"<p>Recording: {esc(take_name)}</p>")
    out.append(
        '<p class="caution"><strong>Please read:</strong> these are suggestions for a teacher to listen to and '
        "judge, not a grade. They come from a computer comparing the recording with the written part and can "
        "be wrong, for example with a noisy or reverberant recording, the sustain pedal or a deliberate change of tempo. "
        "The recording was processed on this computer only; nothing was sent anywhere.</p>"
    )
    n_part = summary.get("notes_in_part", 0)
    correct = summary.get("notes_played_correctly", 0)
    share = f"{100.0 * correct / n_part:.0f} %" if n_part else "–"
    counts = summary.get("counts", {})
    figures = [("notes in the part", str(n_part)), ("played as written", f"{correct} ({share})")]
    figures += [(KIND_STYLES[k].label, str(counts.get(k, 0))) for k in KINDS if counts.get(k, 0)]
    if summary.get("linked_details"):
        figures.append(("notes listed under a restart or pause", str(summary["linked_details"])))
    if summary.get("notes_uncertain"):
        figures.append(("notes to check by ear", str(summary["notes_uncertain"])))
    confidence = summary.get("alignment_confidence")
    if confidence is not None:
        figures.append(("how sure the follow-along is", f"{100 * confidence:.0f} %"))
    out.append('<div class="figures">' + "".join(
        f'<div class="figure">{esc(label)}<b>{esc(value)}</b></div>' for label, value in figures) + "</div>")
    if summary.get("notes_uncertain"):
        out.append(f"<p>{summary['notes_uncertain']} note(s) of the part could not be judged from the recording: "
                   "heard too faintly, or hidden under the overtones of a lower note sounding with them. They are "
                   "drawn with a dotted grey outline and a question mark below; listen for them yourself.</p>")
    busiest = summary.get("bars_with_most_findings") or []
    if busiest:
        bars = ", ".join(f"bar {_label(comparison, reference, b['measure'])} ({b['findings']})" for b in busiest)
        out.append(f"<p>Bars to look at first: {esc(bars)}.</p>")
    if audio is not None:
        mime, data = audio
        out.append(f'<audio controls preload="metadata" src="data:{mime};base64,{base64.b64encode(data).decode("ascii")}"></audio>')

    out.append("<h2>Bar by bar</h2>")
    # the hatch pattern shared by every drawing on the page (ids are page-wide in HTML)
    out.append(f'<svg width="0" height="0" style="position:absolute" aria-hidden="true">{_HATCH}</svg>')
    out.append(_legend_html())
    out.extend(_piano_roll_rows(comparison, reference, draft_notes=draft_notes))

    out.append("<h2>Tempo</h2>")
    out.append(_tempo_svg(comparison, reference))

    out.append("<h2>All findings</h2>")
    out.append(_findings_table(comparison))
    out.append("<p><small>Made by takescribe. Colours: Okabe &amp; Ito (2008) palette; every kind also has "
               "its own shape, so the page reads in black and white.</small></p>")
    out.append("</body></html>")
    return "\n".join(out) + "\n"


def _label(comparison: Comparison, reference: Any, measure: int) -> str:
    labels = getattr(reference, "measure_labels", ()) or ()
    if 1 <= measure <= len(labels) and labels[measure - 1]:
        return str(labels[measure - 1])
    return str(measure)


def _marker(kind: str, x: float, y: float, size: float = 6.0) -> str:
    """SVG shape of one finding kind centred on (x, y)."""
    st = KIND_STYLES[kind]
    c, s = st.colour, size
    stroke = f'stroke="{c}" stroke-width="2.2" fill="none"'
    if st.shape == "cross":
        return f'<path d="M{x-s},{y-s}L{x+s},{y+s}M{x-s},{y+s}L{x+s},{y-s}" {stroke}/>'
    if st.shape == "plus":
        return f'<path d="M{x-s},{y}L{x+s},{y}M{x},{y-s}L{x},{y+s}" {stroke}/>'
    if st.shape == "diamond":
        return f'<path d="M{x},{y-s}L{x+s},{y}L{x},{y+s}L{x-s},{y}Z" {stroke}/>'
    if st.shape == "triangle-left":
        return f'<path d="M{x-s},{y}L{x+s},{y-s}L{x+s},{y+s}Z" fill="{c}" stroke="#000" stroke-width="1.2"/>'
    if st.shape == "triangle-right":
        return f'<path d="M{x+s},{y}L{x-s},{y-s}L{x-s},{y+s}Z" fill="{c}" stroke="#000" stroke-width="1.2"/>'
    if st.shape == "bar":
        return f'<path d="M{x-s},{y-s}L{x-s},{y+s}M{x-s},{y}L{x+s},{y}M{x+s},{y-s}L{x+s},{y+s}" {stroke}/>'
    if st.shape == "square":
        return f'<rect x="{x-s}" y="{y-s}" width="{2*s}" height="{2*s}" fill="{c}" stroke="#000" stroke-width="1.2"/>'
    if st.shape == "pause":
        return f'<path d="M{x-s*.5},{y-s}L{x-s*.5},{y+s}M{x+s*.5},{y-s}L{x+s*.5},{y+s}" stroke="{c}" stroke-width="2.4"/>'
    if st.shape == "arrow":
        return (f'<path d="M{x+s},{y+s*.2}A{s},{s} 0 1 0 {x},{y+s}" {stroke}/>'
                f'<path d="M{x-s*.3},{y+s*.5}L{x},{y+s}L{x-s*.4},{y+s*1.5}" {stroke}/>')
    raise ValueError(f"unknown marker shape {st.shape!r}")


def _legend_html() -> str:
    items = ['<span><svg width="26" height="14" aria-hidden="true"><rect x="1" y="3" width="24" height="8" '
             f'fill="{_PART_FILL}" stroke="#000" stroke-width="1.2"/></svg>the part, at your pace</span>',
             '<span><svg width="26" height="14" aria-hidden="true"><rect x="1" y="4" width="24" height="6" '
             f'fill="{_PLAYED_FILL}"/></svg>what was played</span>']
    for kind in KINDS:
        items.append(f'<span><svg width="18" height="18" aria-hidden="true">{_marker(kind, 9, 9, 5)}</svg>'
                     f"{html.escape(KIND_STYLES[kind].label)}</span>")
    items.append('<span><svg width="26" height="14" aria-hidden="true"><rect x="1" y="1" width="24" height="12" '
                 'fill="url(#hatch)" stroke="#000" stroke-width=".5"/></svg>pause / attempt started again</span>')
    items.append('<span><svg width="26" height="14" aria-hidden="true"><rect x="1" y="3" width="24" height="8" '
                 'fill="none" stroke="#767676" stroke-width="1.4" stroke-dasharray="1.5,2"/></svg>'
                 "could not be judged (listen)</span>")
    return '<div class="legend">' + "".join(items) + "</div>"


_HATCH = ('<defs><pattern id="hatch" width="6" height="6" patternUnits="userSpaceOnUse" patternTransform="rotate(45)">'
          '<rect width="6" height="6" fill="#fff"/><line x1="0" y1="0" x2="0" y2="6" stroke="#888" stroke-width="2"/>'
          "</pattern></defs>")


def _piano_roll_rows(comparison: Comparison, reference: Any, *, draft_notes=None, bars_per_row: int = 4) -> list[str]:
    notes = list(getattr(reference, "notes", ()))
    played = list(draft_notes) if draft_notes is not None else list(comparison.played_notes)
    exp_on = np.asarray(comparison.expected_onsets, dtype=float)
    exp_off = np.asarray(comparison.expected_offsets, dtype=float)
    times = sorted((float(t), int(m)) for m, t in comparison.measure_times.items())
    end = max([comparison.summary.get("take_duration", 0.0)] + [n.offset for n in played] + list(exp_off) + [0.0])
    if not times:
        times = [(0.0, 1)]
    # row boundaries: every bars_per_row-th bar start, in take order, covering the whole take
    starts = [t for k, (t, _) in enumerate(times) if k % bars_per_row == 0]
    starts[0] = min(starts[0], 0.0)
    edges = starts + [max(end, starts[-1] + 1.0) + 0.25]
    rows = []
    restarts = [f for f in comparison.findings if f.kind == "restart"]
    for r in range(len(edges) - 1):
        t0, t1 = edges[r], edges[r + 1]
        if t1 - t0 <= 1e-6:
            continue
        rows.append(_row_svg(comparison, notes, played, exp_on, exp_off, times, restarts, t0, t1, r))
    if len(rows) == 0:
        rows.append("<p>No notes to draw.</p>")
    return rows


def _row_svg(comparison, notes, played, exp_on, exp_off, times, restarts, t0, t1, row) -> str:
    width, left, px_per_pitch = 1000.0, 34.0, 7.0
    # a note belongs to the row where it starts, or to a row it reaches well into
    # (not a sliver spilling over from the row before)
    in_row_ref = [i for i in range(len(notes))
                  if exp_on[i] < t1 and (exp_on[i] >= t0 or exp_off[i] > t0 + 0.05)]
    in_row_played = [n for n in played if n.onset < t1 and n.offset > t0]
    row_findings = [f for f in comparison.findings if t0 <= f.time < t1]
    pitches = [notes[i].pitch for i in in_row_ref] + [n.pitch for n in in_row_played]
    pitches += [p for f in row_findings for p in (f.expected_pitch, f.played_pitch) if p is not None]
    if not pitches:
        pitches = [60]
    low, high = min(pitches) - 2, max(pitches) + 2
    height = 22.0 + (high - low + 1) * px_per_pitch
    scale = (width - left - 6.0) / (t1 - t0)

    def x(t: float) -> float:
        return round(left + (min(max(t, t0), t1) - t0) * scale, 2)

    def y(p: float) -> float:
        return round(16.0 + (high - p) * px_per_pitch, 2)

    parts = [f'<div class="row"><svg viewBox="0 0 {width:.0f} {height:.0f}" role="img" '
             f'aria-label="Piano roll from {t0:.1f} s to {t1:.1f} s">']
    # octave guide lines at every C
    for p in range(low, high + 1):
        if p % 12 == 0:
            parts.append(f'<line x1="{left}" y1="{y(p)+px_per_pitch/2}" x2="{width}" y2="{y(p)+px_per_pitch/2}" '
                         'stroke="#ddd" stroke-width="1"/>')
            parts.append(f'<text x="2" y="{y(p)+px_per_pitch/2+3}" font-size="9" fill="#555">{pitch_name(p)}</text>')
    # pauses and abandoned attempts, hatched
    for f in comparison.findings:
        if f.kind == "hesitation" and f.deviation:
            a, b = f.time, f.time + float(f.deviation)
            if b > t0 and a < t1:
                parts.append(f'<rect x="{x(a)}" y="14" width="{max(x(b)-x(a), 1)}" height="{height-16}" fill="url(#hatch)" '
                             f'opacity=".45"><title>{html.escape(f.text)}</title></rect>')
    for f in restarts:
        linked = [g for g in comparison.findings if g.linked_to == f.id]
        a = min([g.time for g in linked] + [f.time])
        b = f.to_time if f.to_time is not None else f.time
        if b > t0 and a < t1:
            parts.append(f'<rect x="{x(a)}" y="14" width="{max(x(b)-x(a), 1)}" height="{height-16}" fill="url(#hatch)" '
                         f'opacity=".45"><title>{html.escape(f.text)}</title></rect>')
    # bar lines and numbers
    for t, m in times:
        if t0 - 1e-6 <= t < t1:
            parts.append(f'<line x1="{x(t)}" y1="10" x2="{x(t)}" y2="{height-2}" stroke="#000" stroke-width="1"/>')
            parts.append(f'<text x="{x(t)+3}" y="10" font-size="10" font-weight="bold">{m}</text>')
    # the part, outlined; what was played, filled
    for i in in_row_ref:
        n = notes[i]
        status = comparison.note_status[i] if i < len(comparison.note_status) else "played"
        dash = ' stroke-dasharray="3,2"' if status == "missed" else ""
        if status == "uncertain":
            parts.append(f'<g><title>{html.escape(pitch_name(n.pitch))}: could not be judged from the recording'
                         f'</title><rect x="{x(exp_on[i])}" y="{y(n.pitch)}" '
                         f'width="{max(x(exp_off[i])-x(exp_on[i]), 1.5)}" height="{px_per_pitch}" fill="none" '
                         f'stroke="#767676" stroke-width="1.4" stroke-dasharray="1.5,2"/>'
                         f'<text x="{x(exp_on[i]) + 1}" y="{y(n.pitch) + px_per_pitch + 8}" font-size="9" '
                         f'fill="#333">?</text></g>')
            continue
        parts.append(f'<rect x="{x(exp_on[i])}" y="{y(n.pitch)}" width="{max(x(exp_off[i])-x(exp_on[i]), 1.5)}" '
                     f'height="{px_per_pitch}" fill="{_PART_FILL}" fill-opacity="0" stroke="#000" stroke-width="1.1"{dash}/>')
    for n in in_row_played:
        parts.append(f'<rect x="{x(n.onset)}" y="{y(n.pitch)+1.5}" width="{max(x(n.offset)-x(n.onset), 1.5)}" '
                     f'height="{px_per_pitch-3}" fill="{_PLAYED_FILL}"/>')
    # findings
    for f in row_findings:
        pitch = f.played_pitch if f.kind in ("extra", "wrong_pitch") else f.expected_pitch
        if pitch is None:
            pitch = high - 0.5
        parts.append(f'<g><title>{html.escape(f"#{f.id} " + f.text)}</title>{_marker(f.kind, x(f.time), y(pitch) + px_per_pitch / 2)}</g>')
    parts.append("</svg></div>")
    return "".join(parts)


def _tempo_svg(comparison: Comparison, reference: Any) -> str:
    curve = comparison.summary.get("tempo_curve") or []
    if len(curve) == 0:
        return "<p>Not enough matched notes to follow the tempo.</p>"
    width, height, left, bottom = 1000.0, 220.0, 48.0, 28.0
    measures = [c["measure"] for c in curve]
    bpm = [c["beats_per_minute"] for c in curve]
    written = _written_bpm(reference, curve)
    values = bpm + [w for w in written if w is not None]
    low, high = min(values), max(values)
    pad = max(5.0, 0.1 * (high - low))
    low, high = max(low - pad, 0.0), high + pad
    m0, m1 = min(measures), max(max(measures), min(measures) + 1)

    def x(m: float) -> float:
        return round(left + (m - m0) / (m1 - m0) * (width - left - 10), 2)

    def y(v: float) -> float:
        return round(10 + (high - v) / (high - low) * (height - bottom - 10), 2)

    parts = [f'<svg viewBox="0 0 {width:.0f} {height:.0f}" role="img" aria-label="Tempo bar by bar" style="width:100%;height:auto">']
    for v in np.linspace(low, high, 5):
        parts.append(f'<line x1="{left}" y1="{y(v)}" x2="{width-10}" y2="{y(v)}" stroke="#e3e3e3"/>')
        parts.append(f'<text x="{left-4}" y="{y(v)+3}" font-size="10" text-anchor="end">{v:.0f}</text>')
    step = max(1, int(math.ceil(len(measures) / 25)))
    for m in measures[::step]:
        parts.append(f'<text x="{x(m)}" y="{height-10}" font-size="10" text-anchor="middle">{m}</text>')
    parts.append(f'<text x="{width/2}" y="{height}" font-size="10" text-anchor="middle">bar</text>')
    parts.append(f'<text x="10" y="{height/2}" font-size="10" transform="rotate(-90 10 {height/2})" '
                 'text-anchor="middle">quarter notes per minute</text>')
    pts = [(x(m), y(v)) for m, v in zip(measures, written) if v is not None]
    if pts:
        parts.append('<polyline points="' + " ".join(f"{a},{b}" for a, b in pts)
                     + '" fill="none" stroke="#000" stroke-width="1.2" stroke-dasharray="6,4"/>')
    parts.append('<polyline points="' + " ".join(f"{x(m)},{y(v)}" for m, v in zip(measures, bpm))
                 + '" fill="none" stroke="#0072B2" stroke-width="2"/>')
    for m, v in zip(measures, bpm):
        parts.append(f'<circle cx="{x(m)}" cy="{y(v)}" r="3" fill="#0072B2"><title>bar {m}: {v:.0f} per minute</title></circle>')
    parts.append("</svg>")
    parts.append('<p><small>Solid line with dots: your pace, bar by bar. Dashed line: the tempo written in the part.'
                 "</small></p>")
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


def _format_time(t: float) -> str:
    minutes, seconds = divmod(max(float(t), 0.0), 60.0)
    return f"{int(minutes)}:{seconds:04.1f}"


def _format_deviation(kind: str, value: float | None) -> str:
    if value is None:
        return ""
    if kind == "wrong_pitch":
        return f"{value:+.0f} semitone{'s' if abs(value) != 1 else ''}"
    if kind == "hesitation":
        return f"{value:.1f} s pause"
    if kind == "restart":
        return f"{value:.1f} s of music again"
    return f"{value:+.2f} s"


_FRACTIONS = ((0.0, ""), (0.25, "\u00bc"), (1 / 3, "\u2153"), (0.5, "\u00bd"), (2 / 3, "\u2154"), (0.75, "\u00be"),
              (1.0, ""))


def _format_beat(beat: float | None) -> str:
    """A beat as a teacher reads it: "3", "3½" (halfway through beat 3), "2¼"; else one decimal."""
    if beat is None:
        return ""
    whole = int(np.floor(beat + 1e-9))
    part = beat - whole
    fraction, mark = min(_FRACTIONS, key=lambda item: abs(item[0] - part))
    if abs(fraction - part) > 0.04:
        return f"{beat:.1f}"
    return f"{whole + int(fraction == 1.0)}{mark}"


def _findings_table(comparison: Comparison) -> str:
    if not comparison.findings:
        return "<p>Nothing to point out: every note of the part was heard in time.</p>"
    esc = html.escape
    rows = ['<div style="overflow-x:auto"><table><thead><tr><th>#</th><th>kind</th><th>bar</th><th>beat</th>'
            "<th>time</th><th>expected</th>"
            "<th>played</th><th>off by</th><th>what happened</th></tr></thead><tbody>"]
    for f in comparison.findings:
        st = KIND_STYLES[f.kind]
        cls = ' class="linked"' if f.linked_to is not None else ""
        rows.append(
            f"<tr{cls}><td class=\"num\">{f.id}</td>"
            f'<td><svg width="14" height="14" aria-hidden="true">{_marker(f.kind, 7, 7, 4.5)}</svg> {esc(st.label)}</td>'
            f"<td>{esc(str(f.measure_label or f.measure or ''))}</td>"
            f"<td class=\"num\">{_format_beat(f.beat)}</td>"
            f"<td class=\"num\">{_format_time(f.time)}</td>"
            f"<td>{'' if f.expected_pitch is None else pitch_name(f.expected_pitch)}</td>"
            f"<td>{'' if f.played_pitch is None else pitch_name(f.played_pitch)}</td>"
            f"<td class=\"num\">{esc(_format_deviation(f.kind, f.deviation))}</td>"
            f"<td>{esc(f.text)}{'' if f.linked_to is None else f' (see #{f.linked_to})'}</td></tr>"
        )
    rows.append("</tbody></table></div>")
    return "".join(rows)


# --------------------------------------------------------------------------- annotated MusicXML


def annotate_musicxml(comparison: Comparison, reference: Any) -> bytes:
    """The reference part as MusicXML 4.0 bytes with the findings marked on it.

    Each reference note with a finding gets the kind's colour and notehead (the first
    finding by :data:`takescribe.compare.KINDS` order decides) and a lyric word per finding;
    extra notes and restarts become text directions at their place in the bar.
    """
    from music21 import expressions, musicxml

    stream = _reference_stream(reference)
    index = _note_index(stream)
    notes = list(getattr(reference, "notes", ()))
    by_ref: dict = {}
    for f in comparison.findings:
        if f.reference_index is not None and f.kind not in ("restart",):
            by_ref.setdefault(f.reference_index, []).append(f)
    for i, found in by_ref.items():
        if i >= len(notes):
            continue
        found_note = _find_note(index, notes[i], reference)
        if found_note is None:
            continue
        target, owner = found_note
        found = sorted(found, key=lambda f: KINDS.index(f.kind))
        main = KIND_STYLES[found[0].kind]
        target.style.color = main.colour
        if main.notehead is not None:
            target.notehead = main.notehead
        words = []
        for f in found:
            word = KIND_STYLES[f.kind].word
            if f.kind == "wrong_pitch" and f.played_pitch is not None:
                word = f"{word} {pitch_name(f.played_pitch)}"
            words.append(word)
        owner.addLyric(" ".join(words))
    measures = {int(m.number): m for m in stream.recurse().getElementsByClass("Measure")}
    for f in comparison.findings:
        if f.kind not in ("extra", "restart") or f.measure is None:
            continue
        if f.kind == "extra" and f.linked_to is not None:
            continue  # the notes of an abandoned attempt are summed up by their restart
        measure = measures.get(_written_measure_number(reference, f.measure))
        if measure is None:
            continue
        if f.kind == "extra":
            text = f"+{pitch_name(f.played_pitch)}" if f.played_pitch is not None else "+extra"
        else:
            back = "?" if f.to_measure is None else _label(comparison, reference, f.to_measure)
            text = f"restart: back to bar {back}"
        mark = expressions.TextExpression(text)
        mark.style.color = KIND_STYLES[f.kind].colour
        mark.placement = "above"
        offset = 0.0
        if f.beat is not None:
            ts = measure.getContextByClass("TimeSignature")
            beat_quarters = 4.0 / ts.denominator if ts is not None else 1.0
            offset = max(0.0, min((f.beat - 1.0) * beat_quarters, float(measure.highestTime)))
            offset = round(offset * 12) / 12  # keep divisions small (twelfths of a quarter)
        measure.insert(offset, mark)
    exporter = musicxml.m21ToXml.GeneralObjectExporter(stream)
    return exporter.parse()


def _written_measure_number(reference: Any, measure: int) -> int:
    """Performance-order bar -> printed bar number (repeats expanded back), when labels are numeric."""
    labels = getattr(reference, "measure_labels", ()) or ()
    if 1 <= measure <= len(labels):
        try:
            return int(str(labels[measure - 1]).strip().rstrip("abcdefgh") or measure)
        except ValueError:
            return measure
    return measure


def _reference_stream(reference: Any):
    """A music21 Score holding only the reference part (from its file, or rebuilt from its notes)."""
    from music21 import converter, stream

    source = str(getattr(reference, "source", "") or "")
    part = None
    if source and Path(source).is_file() and Path(source).suffix.lower() in (".musicxml", ".xml", ".mxl"):
        try:
            parsed = converter.parse(source)
            parts = list(parsed.parts) if hasattr(parsed, "parts") else []
            # a part on several staves (piano) comes back as one PartStaff per staff: keep them together
            groups: dict = {}
            for p in parts:
                groups.setdefault(str(p.id).split("-Staff")[0], []).append(p)
            wanted = getattr(reference, "part_name", "") or ""
            chosen = next((g for g in groups.values() if wanted and any((p.partName or "") == wanted for p in g)), None)
            if chosen is None and groups:
                chosen = next(iter(groups.values()))
            part = chosen
        except Exception as exc:  # noqa: BLE001 - rebuilt from the notes below, with a warning
            warnings.warn(f"{source}: could not be re-read for annotation ({exc}); the part is rebuilt from its notes",
                          stacklevel=3)
            part = None
    if part is None:
        part = [_part_from_notes(reference)]
    score = stream.Score()
    for staff in part:
        score.insert(0, staff)
    if len(part) > 1:
        from music21 import layout

        score.insert(0, layout.StaffGroup(list(part), symbol="brace"))
    return score


def _part_from_notes(reference: Any):
    """Rebuild a simple notated part from the reference notes (MIDI sources, test doubles)."""
    from music21 import chord, meter, note, stream

    part = stream.Part()
    signatures = getattr(reference, "time_signatures", None) or ((0.0, 4, 4),)
    numerator, denominator = int(signatures[0][1]), int(signatures[0][2])
    part.insert(0, meter.TimeSignature(f"{numerator}/{denominator}"))
    grid = 1.0 / 12.0
    groups: dict = {}
    for n in getattr(reference, "notes", ()):
        q = round(float(n.onset_quarters) / grid) * grid
        d = max(grid, round(float(n.duration_quarters) / grid) * grid)
        groups.setdefault((q, d), []).append(int(n.pitch))
    for (q, d), pitches in sorted(groups.items()):
        element = note.Note(pitches[0]) if len(pitches) == 1 else chord.Chord(sorted(set(pitches)))
        element.quarterLength = d
        part.insert(q, element)
    made = part.makeMeasures()
    made.makeTies(inPlace=True)
    return made


def _note_index(score) -> dict:
    """(measure number, pitch) -> list of (quarters into the measure, note, owner) for every sounding note.

    ``owner`` is the chord holding the note (lyrics go on the chord), or the note itself.
    """
    index: dict = {}
    for element in score.recurse().notes:
        measure_number = element.measureNumber
        measure = element.getContextByClass("Measure")
        if measure_number is None or measure is None:
            continue
        try:
            position = float(element.getOffsetInHierarchy(measure))
        except Exception:  # noqa: BLE001 - not inside that measure's hierarchy
            position = float(element.offset)
        members = element.notes if element.isChord else [element]
        for member in members:
            # a note inside a chord carries colour and notehead; the lyric goes on the chord
            index.setdefault((int(measure_number), int(member.pitch.midi)), []).append((position, member, element))
    return index


def _find_note(index: dict, score_note: Any, reference: Any):
    """``(note, owner)`` of a reference note: same printed bar and pitch, nearest place in the bar; or None."""
    label = str(getattr(score_note, "measure_label", "") or getattr(score_note, "measure", ""))
    try:
        measure = int(label.strip().rstrip("abcdefgh"))
    except ValueError:
        measure = int(getattr(score_note, "measure", 0))
    candidates = index.get((measure, int(score_note.pitch)), [])
    if not candidates:
        return None
    starts = getattr(reference, "measure_starts", None) or ()
    bar = int(getattr(score_note, "measure", 0))
    if 1 <= bar <= len(starts) and getattr(score_note, "onset_quarters", None) is not None:
        position = float(score_note.onset_quarters) - float(starts[bar - 1])
    else:
        position = float(getattr(score_note, "beat", 1.0)) - 1.0  # quarter-note beats assumed
    best = min(candidates, key=lambda c: abs(c[0] - position))
    if abs(best[0] - position) > 0.26:
        return None
    return best[1], best[2]
