"""The practice report of a comparison, written into one folder.

Files written by :func:`write_report` (all through :mod:`takescribe.safeio`: atomic, never
replacing an existing file without ``force``):

- ``report.html`` — :mod:`takescribe.report.page`: the engraved part with the findings on
  its notes (:mod:`~takescribe.report.engrave`), a piano roll, the pace, every finding, the
  take compressed and embedded (:mod:`~takescribe.report.media`) and the controls to listen
  from any finding, note or bar and to hear the part (:mod:`~takescribe.report.script`).
- ``findings.json`` — :func:`takescribe.comparison.compare.findings_json`.
- ``annotated.musicxml`` — :mod:`takescribe.report.annotate`; MusicXML 4.0.
- ``take.mid`` — the draft transcription, when its bytes are given.

The report reads no file: the pipeline hands it the parsed part (its notes and notation),
the take's samples and the sound model of the instrument.
"""

from __future__ import annotations

import os
import warnings
from typing import Any, Sequence

import numpy as np

from ..comparison.compare import Comparison
from ..errors import InputError, OutputError, ReportWarning
from ..notes import Note
from ..safeio import ensure_folder, write_bytes, write_text
from .annotate import annotate, annotate_musicxml
from .engrave import engrave_svg
from .media import EmbeddedAudio, encode_take
from .page import ReportDetails, render_html
from .script import page_data
from .styles import KIND_STYLES, KindStyle
from .table import format_beat as _format_beat  # noqa: F401 - 0.1 name, kept for one release

__all__ = ["KIND_STYLES", "KindStyle", "ReportDetails", "write_report", "render_html", "annotate_musicxml",
           "REPORT_NAMES"]

REPORT_NAMES = ("report.html", "findings.json", "annotated.musicxml")


def write_report(
    folder: str | os.PathLike,
    comparison: Comparison,
    reference: Any,
    *,
    written: Any = None,
    take: tuple[np.ndarray, int] | None = None,
    details: ReportDetails | None = None,
    voice: dict | None = None,
    draft_notes: Sequence[Note] | None = None,
    draft_midi_bytes: bytes | None = None,
    force: bool = False,
) -> dict:
    """Write the practice report of ``comparison`` into ``folder``.

    Parameters
    ----------
    folder : path-like
        Output folder, created when missing.
    comparison : Comparison
    reference : takescribe.reference.part.Reference
    written : music21.stream.Score, optional
        The part's notation from :func:`takescribe.reference.part.load_part` (copied, never
        changed); without it a plain part is rebuilt from the notes.
    take : (ndarray, int), optional
        The take's samples (mono) and their rate, as the pipeline analysed them; embedded.
    details : ReportDetails, optional
        Student, piece, instrument, date for the header.
    voice : dict, optional
        :func:`takescribe.report.voice.part_voice`, for "hear the part".
    draft_notes : sequence of Note, optional
        The draft transcription, drawn in the piano roll.
    draft_midi_bytes : bytes, optional
        Standard MIDI File of the draft, written as ``take.mid``.
    force : bool
        Replace existing files.

    Returns
    -------
    dict
        File name -> Path of every file written.

    Raises
    ------
    OutputError
        If a file exists and ``force`` is false, or the folder cannot be written.
    """
    _check_arguments(comparison, draft_midi_bytes, take)
    folder = ensure_folder(folder)
    names = list(REPORT_NAMES) + (["take.mid"] if draft_midi_bytes is not None else [])
    if not force:
        # refuse before writing anything, so a refused report leaves no mixture of old and new files
        existing = [n for n in names if (folder / n).exists()]
        if existing:
            raise OutputError(f"{folder}: {', '.join(existing)} already exist; pass --force to overwrite or choose another folder")
    marked = annotate(comparison, reference, written)
    svgs = _engravings(comparison, reference, written, marked.musicxml)
    audio: EmbeddedAudio | None = encode_take(*take) if take is not None else None
    data = page_data(comparison, reference, note_ids=marked.note_ids, voice=voice)
    page = render_html(comparison, reference, details=details, audio=audio, score_svgs=svgs, data_json=data,
                       draft_notes=draft_notes)
    written_files = {
        "findings.json": write_text(folder / "findings.json", comparison.dumps() + "\n", force=force),
        "annotated.musicxml": write_bytes(folder / "annotated.musicxml", marked.musicxml, force=force),
    }
    if draft_midi_bytes is not None:
        written_files["take.mid"] = write_bytes(folder / "take.mid", bytes(draft_midi_bytes), force=force)
    written_files["report.html"] = write_text(folder / "report.html", page, force=force)
    return written_files


def _check_arguments(comparison, draft_midi_bytes, take) -> None:
    if not isinstance(comparison, Comparison):
        raise TypeError(f"comparison must be a takescribe.comparison.compare.Comparison, got {type(comparison).__name__}")
    if draft_midi_bytes is not None and not isinstance(draft_midi_bytes, (bytes, bytearray)):
        raise TypeError(f"draft_midi_bytes must be bytes (a Standard MIDI File), got {type(draft_midi_bytes).__name__}")
    if draft_midi_bytes is not None and bytes(draft_midi_bytes[:4]) != b"MThd":
        raise InputError("draft_midi_bytes does not start with 'MThd': it is not a Standard MIDI File")
    if take is not None and (not isinstance(take, tuple) or len(take) != 2 or np.ndim(take[0]) != 1):
        raise TypeError("take must be (y, sr): the mono samples the pipeline analysed and their rate")


def _engravings(comparison, reference, written, musicxml: bytes) -> list[str]:
    """The engraved part; a second one without the marks to check by ear when there are such marks."""
    try:
        svgs = [engrave_svg(musicxml)]
        uncertain = "uncertain" in comparison.note_status or any(
            getattr(f, "status", "") == "check_by_ear" for f in comparison.findings)
        if uncertain:
            sure = annotate(comparison, reference, written, include_uncertain=False)
            svgs.append(engrave_svg(sure.musicxml, id_suffix="-s"))
        return svgs
    except (ValueError, RuntimeError) as exc:  # the engraving library refused the file: the piano roll still shows the part
        warnings.warn(f"the part could not be engraved for the report ({exc}); the page shows the piano roll only",
                      ReportWarning, stacklevel=3)
        return []
