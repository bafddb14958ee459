"""The report page: one self-contained HTML document a teacher reads and listens to.

Conventions
-----------
- Offline: inline CSS, inline SVG (the engraved part, the piano roll, the pace chart), the
  take as a ``data:`` URI, one inline script; no font, image, style or script from elsewhere.
- The header says whose take it is (student, piece, instrument, date); it gives counts only
  for the kinds of finding present and no percentage or other grade-like figure, and says in
  plain words how well the part lined up with the take.
- Wording and layout are this project's own.
"""

from __future__ import annotations

import base64
import html
from dataclasses import dataclass
from typing import Any, Sequence

from ..comparison.compare import KINDS
from .annotate import label_of
from .media import EmbeddedAudio
from .roll import HATCH, piano_roll_rows, tempo_svg
from .script import SCRIPT
from .styles import KIND_STYLES, kinds_present, legend_html
from .table import findings_table, format_time

__all__ = ["ReportDetails", "LineupWording", "render_html", "lineup_words", "counts_sentence"]


@dataclass(frozen=True)
class ReportDetails:
    """Who and what the take is, for the page's header (empty strings when unknown).

    Attributes
    ----------
    student, piece, instrument : str
    recorded : str
        Date of the take as the files give it (e.g. ``"2026-11-30"``), with its source in
        brackets when it is only the file's date.
    take_name : str
        File name of the take (no folder).
    """

    student: str = ""
    piece: str = ""
    instrument: str = ""
    recorded: str = ""
    take_name: str = ""


@dataclass(frozen=True)
class LineupWording:
    """Where the plain-words description of the alignment changes.

    ``alignment_confidence`` (0..1, :mod:`takescribe.alignment.align`) at or above ``closely``
    reads "closely", at or above ``mostly`` "for most of the take", below it "only loosely";
    0.3 is where the comparison refuses a take as not being the part at all, so the bands
    sit above it.
    """

    closely: float = 0.7
    mostly: float = 0.5


_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:1.2rem auto;max-width:72rem;padding:0 1rem;
 color:#1a1a1a;background:#fff;line-height:1.45}
h1{font-size:1.45rem;margin:.2rem 0} h2{font-size:1.12rem;margin-top:1.8rem;border-bottom:2px solid #1a1a1a;padding-bottom:.15rem}
dl.who{display:grid;grid-template-columns:max-content 1fr;gap:.1rem 1rem;margin:.6rem 0}
dl.who dt{font-weight:600} dl.who dd{margin:0}
.note-to-reader{border:1px dashed #555;padding:.5rem .9rem;margin:1rem 0}
.listen{position:sticky;top:0;background:#fff;border-bottom:1px solid #bbb;padding:.4rem 0;z-index:2}
.listen audio{width:100%} .controls{display:flex;flex-wrap:wrap;gap:.4rem 1.2rem;align-items:center}
.controls button,.play,.bar-link{font:inherit;cursor:pointer;border:1px solid #555;background:#f6f6f6;border-radius:3px}
.bar-link{padding:0 .4rem}
#listen-status{margin:.2rem 0;font-size:.9rem;color:#333}
.legend{display:flex;flex-wrap:wrap;gap:.3rem 1.2rem;margin:.5rem 0;font-size:.9rem}
.legend span{display:inline-flex;align-items:center;gap:.3rem}
.score svg{width:100%;height:auto;display:block}
.score g.note[id^="ts-n"],.score g.mNum,.finding,.bar-number{cursor:pointer}
.score g.measure.chosen g.mNum text,.bar-number.chosen{fill:#0072B2;font-weight:bold}
.row{margin:.6rem 0 1.2rem} .row svg{width:100%;height:auto;display:block}
.score-sure{display:none} .hide-uncertain .score-sure{display:block} .hide-uncertain .score-all{display:none}
.hide-uncertain [data-uncertain]{display:none}
.table-wrap{overflow-x:auto} table{border-collapse:collapse;width:100%;font-size:.9rem}
th,td{border-bottom:1px solid #ddd;padding:.25rem .4rem;text-align:left;vertical-align:top}
th{background:#efefef} td.num{text-align:right;font-variant-numeric:tabular-nums}
tr.linked td{color:#555} tr.linked td:first-child{padding-left:1.2rem} tr.uncertain td{font-style:italic}
@media print{.row{break-inside:avoid}.listen{position:static}}
@media (max-width:40rem){.row{overflow-x:auto} .row svg{width:56rem;max-width:none}}
"""


def lineup_words(confidence: float | None, *, wording: LineupWording | None = None) -> str:
    """How well the part lined up with the take, in a sentence."""
    wording = wording or LineupWording()
    if confidence is None:
        return "The take was compared with the part as written, without lining the two up first."
    if confidence >= wording.closely:
        return "The part lined up closely with the take, so bars and times on this page can be trusted."
    if confidence >= wording.mostly:
        return ("The part lined up with most of the take; where a finding seems odd, listen to that place "
                "before trusting it.")
    return ("The part lined up only loosely with the take (a noisy recording, or playing far from the part?): "
            "bars and times on this page are approximate, so listen before trusting any finding.")


def counts_sentence(comparison: Any) -> str:
    """The kinds of finding present with their counts, as one sentence; no share or score."""
    counts = comparison.summary.get("counts", {})
    parts = [f"{KIND_STYLES[k].label}: {counts[k]}" for k in KINDS if counts.get(k, 0)]
    uncertain = comparison.summary.get("notes_uncertain", 0)
    text = "In this take: " + "; ".join(parts) + "." if parts else "Nothing stood out in this take."
    if uncertain:
        text += f" {uncertain} note{'s' if uncertain != 1 else ''} of the part to listen to check."
    return text


def render_html(comparison: Any, reference: Any, *, details: ReportDetails | None = None,
                audio: EmbeddedAudio | None = None, score_svgs: Sequence[str] = (), data_json: str = "{}",
                draft_notes=None) -> str:
    """The page (see the module docstring); the parts are made by :func:`takescribe.report.practice.write_report`."""
    details = details or ReportDetails()
    piece = details.piece or getattr(reference, "part_name", "") or "the part"
    esc = html.escape
    out = ["<!DOCTYPE html>", '<html lang="en">', "<head>", '<meta charset="utf-8">',
           '<meta name="viewport" content="width=device-width, initial-scale=1">',
           f"<title>{esc(piece)}{' - ' + esc(details.student) if details.student else ''}: listening notes</title>",
           f"<style>{_CSS}</style>", "</head>", "<body>"]
    out += _header(comparison, reference, details, piece)
    out += _listen_panel(comparison, audio)
    out.append(f'<svg width="0" height="0" style="position:absolute" aria-hidden="true">{HATCH}</svg>')
    kinds = kinds_present(comparison.findings)
    uncertain = bool(comparison.summary.get("notes_uncertain")) or any(
        getattr(f, "status", "") == "check_by_ear" for f in comparison.findings)
    out.append("<h2>The part, marked</h2>")
    out.append(legend_html(kinds, with_listen=uncertain))
    if score_svgs:
        out.append(f'<div class="score score-all">{score_svgs[0]}</div>')
        if len(score_svgs) > 1:
            out.append(f'<div class="score score-sure">{score_svgs[1]}</div>')
    else:
        out.append("<p>The part could not be engraved; the piano roll below shows it.</p>")
    out.append("<h2>Bar by bar, as heard</h2>")
    out.append(legend_html(kinds, with_listen=uncertain, with_roll=True))
    out.extend(piano_roll_rows(comparison, reference, draft_notes=draft_notes))
    out.append("<h2>Pace</h2>")
    out.append(tempo_svg(comparison, reference))
    out.append("<h2>Every finding</h2>")
    out.append(findings_table(comparison))
    out.append("<p><small>Made by takescribe on this computer. Colours from Okabe &amp; Ito (2008), chosen to be told "
               "apart with the common colour-vision deficiencies; every kind also has its own shape and word.</small></p>")
    out.append(f'<script type="application/json" id="takescribe-data">{data_json}</script>')
    out.append(f"<script>{SCRIPT}</script>")
    out.append("</body></html>")
    return "\n".join(out) + "\n"


def _header(comparison: Any, reference: Any, details: ReportDetails, piece: str) -> list[str]:
    esc = html.escape
    duration = comparison.summary.get("take_duration")
    rows = [("Student", details.student or "not given (use --student)"), ("Piece", piece),
            ("Instrument", details.instrument or "not given"), ("Recorded", details.recorded or "date unknown")]
    if details.take_name:
        rows.append(("Recording", details.take_name + (f", {format_time(duration)} long" if duration else "")))
    out = [f"<h1>Listening notes: {esc(piece)}</h1>", '<dl class="who">']
    out += [f"<dt>{esc(k)}</dt><dd>{esc(v)}</dd>" for k, v in rows]
    out.append("</dl>")
    out.append(f"<p>{esc(counts_sentence(comparison))} {esc(lineup_words(comparison.summary.get('alignment_confidence')))}</p>")
    busiest = comparison.summary.get("bars_with_most_findings") or []
    if busiest:
        bars = ", ".join(f'<button type="button" class="bar-link" data-bar="{b["measure"]}">bar '
                         f'{esc(label_of(reference, b["measure"]))}</button>' for b in busiest)
        out.append(f"<p>Places to listen to first: {bars}</p>")
    out.append('<p class="note-to-reader"><strong>For the teacher:</strong> these notes are suggestions to listen to and '
               "judge, not a grade. They come from a computer comparing the recording with the written part and can "
               "be wrong, for example with a noisy or echoing room, the sustain pedal or a deliberate change of tempo. "
               "The recording was processed on this computer only; nothing was sent anywhere.</p>")
    return out


def _listen_panel(comparison: Any, audio: EmbeddedAudio | None) -> list[str]:
    out = ['<section class="listen" aria-label="Listening">']
    if audio is not None:
        out.append(f'<audio id="take" controls preload="auto" src="data:{audio.mime};base64,'
                   f'{base64.b64encode(audio.data).decode("ascii")}"></audio>')
    else:
        out.append("<p>The take is not embedded in this page.</p>")
    uncertain = bool(comparison.summary.get("notes_uncertain")) or any(
        getattr(f, "status", "") == "check_by_ear" for f in comparison.findings)
    out.append('<div class="controls"><button type="button" id="hear-part">Hear the part from the chosen bar</button>'
               '<label><input type="checkbox" id="repeat-bar"> Repeat the chosen bar</label>'
               + ('<label><input type="checkbox" id="show-uncertain" checked> Show what to listen to check</label>'
                  if uncertain else "") + "</div>")
    out.append('<p id="listen-status" aria-live="polite">Click a finding, a marked note or a bar number to hear the take '
               "from just before it.</p></section>")
    return out
