"""Glue: the stages of takescribe chained into the jobs the command line offers.

Each function here takes paths and options, calls the stage modules in data-flow
order, writes outputs through :mod:`takescribe.safeio` and returns values; no
argument parsing (that is :mod:`takescribe.cli`) and no signal processing of its own.

Every file job is all or nothing (:func:`takescribe.safeio.staged_outputs`): its outputs
are staged next to their targets before any analysis (which proves the places writable)
and moved into place only when all are complete; an error or a signal leaves nothing.
"""

from __future__ import annotations

import json
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from ..alignment.align import MISMATCH_CONFIDENCE, AlignmentWarning, align_reference
from ..comparison.compare import compare_notes
from ..audio.load import load_audio
from ..transcription.blocks import LONG_TAKE_SECONDS, transcribe_long
from ..transcription.dictionary import Dictionary, adapt_dictionary, harmonic_dictionary, load_dictionary, save_dictionary
from ..errors import InputError, ScoreError
from ..evaluation.metrics import evaluate_notes
from ..transcription.informed import faint_notes, informed_transcription, score_mask
from ..transcription.instruments import Instrument, resolve_instrument
from ..export.midi import MidiTrack, midi_bytes, write_midi
from ..transcription.nmf import decompose
from ..features.onsets import onset_strength
from ..notation import grid_from_reference, notate, write_musicxml
from ..notation.model import performed_conductor
from ..export.noteio import read_notes, write_maps
from ..report.practice import ReportDetails, write_report
from ..report.voice import part_voice
from ..audio.decode import take_tags
from ..interrupts import fault_point
from ..limits import check_frame_cost
from ..safeio import staged_outputs, write_bytes, write_text
from ..reference.part import load_part, load_reference
from ..features.dereverb import room_signal
from ..features.spectrogram import ANALYSIS_SR, compute_spectrogram
from ..transcription.blind import Transcription, TranscriptionSettings, normalize_spectrogram, transcribe

__all__ = ["TranscribeOutputs", "CompareOutputs", "compare_file", "compare_into", "compare_take", "transcribe_into", "REPORT_FILES", "transcribe_file", "transcribe_take", "evaluate_files", "learn_dictionary_file",
           "load_take", "notate_take", "format_findings_counts", "draft_midi_tracks", "write_draft_midi"]


# ----------------------------------------------------------------------------- file-level jobs


@dataclass(frozen=True)
class TranscribeOutputs:
    """What :func:`transcribe_file` produced.

    Attributes
    ----------
    transcription : Transcription
    written : list of Path
        Files written, in order.
    reference : takescribe.score.Reference or None
    alignment : takescribe.align.Alignment or None
    notation : takescribe.notation.Notation or None
    """

    transcription: Transcription
    written: list
    reference: object = None
    alignment: object = None
    notation: object = None


def _check_outputs(paths, *, force: bool) -> None:
    """Refuse, before any work, outputs that exist (unless ``force``) or collide."""
    from ..safeio import check_writable

    seen = set()
    for path in paths:
        if path is None:
            continue
        resolved = Path(path).resolve()
        if resolved in seen:
            raise InputError(f"{path}: the same file is given for two outputs; choose distinct names")
        seen.add(resolved)
        check_writable(path, force=force)


def _check_not_input(outputs, inputs) -> None:
    """An output must never be one of the inputs (inputs are never modified)."""
    ins = {Path(p).resolve() for p in inputs if p is not None}
    for path in outputs:
        if path is not None and Path(path).resolve() in ins:
            raise InputError(f"{path}: output would overwrite an input file; choose another output name")


def load_take(path, *, progress: Callable[[str], None] | None = None) -> tuple[np.ndarray, int]:
    """Read a take at the analysis rate (see :func:`takescribe.audio.load_audio`).

    A take long enough to go block by block (:data:`takescribe.blocks.LONG_TAKE_SECONDS`)
    is spilled to a temporary file and mapped read-only, so memory does not grow with it.
    """
    if progress:
        progress(f"reading {Path(path).name}")
    fault_point("reading")
    return load_audio(path, sr=ANALYSIS_SR, spill_seconds=LONG_TAKE_SECONDS)


def transcribe_take(
    y: np.ndarray,
    sr: int,
    *,
    instrument: "str | int | Instrument | None" = None,
    reference=None,
    dictionary: Dictionary | None = None,
    settings: TranscriptionSettings | None = None,
    progress: Callable[[str], None] | None = None,
    alignment=None,
    room: str = "dry",
):
    """Blind or score-informed transcription of a loaded take.

    Returns ``(transcription, alignment)``; ``alignment`` is None without a reference.
    With a reference whose alignment confidence is below the mismatch level, a
    warning says so and the transcription falls back to blind mode (the part would
    mislead the factorization). ``room`` (dry, auto, reverberant) says whether the factorization
    sees the take dereverberated (:func:`takescribe.features.dereverb.room_signal`); the
    alignment always reads the take as recorded.
    """
    if instrument is None:
        program = getattr(reference, "midi_program", None)
        instrument = program if program is not None else "piano"
    # long takes go block by block so memory stays flat (see takescribe.blocks)
    long_take = len(y) > LONG_TAKE_SECONDS * sr
    blind = transcribe_long if long_take else transcribe
    fault_point("factorizing")
    y_room = room_signal(y, sr, room=room)
    if reference is None:
        return blind(y_room, sr, instrument=instrument, dictionary=dictionary, settings=settings,
                     progress=progress), None
    if alignment is None:
        if progress:
            progress("aligning the part with the take")
        alignment = align_reference(y, sr, reference, warn=False)
    if alignment.confidence < MISMATCH_CONFIDENCE:
        warnings.warn(
            f"the take does not seem to match the part (alignment confidence {alignment.confidence:.2f});"
            " transcribing without the part", AlignmentWarning, stacklevel=2)
        return blind(y_room, sr, instrument=instrument, dictionary=dictionary, settings=settings,
                     progress=progress), alignment
    if progress:
        progress("score-informed factorization")
    if long_take:
        result = transcribe_long(y_room, sr, reference=reference, alignment=alignment, instrument=instrument,
                                 dictionary=dictionary, settings=settings, progress=progress)
        return result, alignment
    result = informed_transcription(y_room, sr, reference, alignment=alignment, instrument=instrument,
                                    dictionary=dictionary, settings=settings, progress=progress)
    return result, alignment


def transcribe_file(
    take_path,
    *,
    midi_path=None,
    notes_path=None,
    musicxml_path=None,
    instrument=None,
    score_path=None,
    part=None,
    dictionary_path=None,
    tempo: float | None = None,
    time_signature=None,
    grid: str | None = None,
    midi_type: int = 1,
    quantized_midi: bool = False,
    force: bool = False,
    progress: Callable[[str], None] | None = None,
    room: str = "dry",
    transposition: int | None = None,
    concert_pitch: bool = False,
) -> TranscribeOutputs:
    """The ``transcribe`` job: a take (and optionally its part) to draft files.

    Outputs are checked and staged before any work (no overwrite without ``force``) and
    appear together, or not at all (:func:`takescribe.safeio.staged_outputs`). The MIDI draft keeps the performed timing (take seconds)
    unless ``quantized_midi``, which writes the notated rhythm with a tempo map that
    follows the take, one track per staff.
    """
    outputs = [midi_path, notes_path, musicxml_path]
    if not any(outputs):
        raise InputError("nothing to write: give -o draft.mid, --notes draft.txt or --musicxml draft.musicxml")
    _check_outputs(outputs, force=force)
    _check_not_input(outputs, [take_path, score_path, dictionary_path])
    with staged_outputs(force=force) as job:
        staged = {path: job.file(path) for path in outputs if path is not None}
        out = transcribe_into(take_path, staged, midi_path=midi_path, notes_path=notes_path,
                             musicxml_path=musicxml_path, instrument=instrument, score_path=score_path, part=part,
                             dictionary_path=dictionary_path, tempo=tempo, time_signature=time_signature, grid=grid,
                             midi_type=midi_type, quantized_midi=quantized_midi, progress=progress, room=room,
                             transposition=transposition, concert_pitch=concert_pitch)
    return out


def transcribe_into(take_path, staged: dict, *, midi_path=None, notes_path=None, musicxml_path=None, instrument=None,
                    score_path=None, part=None, dictionary_path=None, tempo: float | None = None, time_signature=None,
                    grid: str | None = None, midi_type: int = 1, quantized_midi: bool = False,
                    progress: Callable[[str], None] | None = None, room: str = "dry",
                    transposition: int | None = None, concert_pitch: bool = False) -> TranscribeOutputs:
    """The work of :func:`transcribe_file`, writing each output to its staging path ``staged[path]``."""
    preset = resolve_instrument(instrument) if instrument is not None else None
    reference = load_reference(score_path, part=part) if score_path is not None else None
    dictionary = load_dictionary(dictionary_path) if dictionary_path is not None else None
    y, sr = load_take(take_path, progress=progress)
    result, alignment = transcribe_take(y, sr, instrument=preset, reference=reference, dictionary=dictionary,
                                        progress=progress, room=room)
    # always notated: the MIDI draft's meter and tempo changes are the notation's (one tempo map)
    if progress:
        progress("notation: meter, quantization, key, staves")
    notation = notate_take(result, take_path, y=y, sr=sr, reference=reference, alignment=alignment,
                           tempo=tempo, time_signature=time_signature, grid=grid, transposition=transposition)
    written = []
    if midi_path is not None:
        write_draft_midi(staged[midi_path], result, notation=notation, midi_type=midi_type, quantized=quantized_midi)
        written.append(Path(midi_path))
        fault_point("between-outputs")
    if notes_path is not None:
        write_maps(result.notes, staged[notes_path])
        written.append(Path(notes_path))
        fault_point("between-outputs")
    if musicxml_path is not None:
        write_musicxml(notation, staged[musicxml_path], concert_pitch=concert_pitch)
        written.append(Path(musicxml_path))
    return TranscribeOutputs(result, written, reference, alignment, notation)


def notate_take(result: Transcription, take_path, *, y=None, sr=None, reference=None, alignment=None,
                tempo: float | None = None, time_signature=None, grid: str | None = None,
                transposition: int | None = None):
    """The notated draft of a transcribed take (:func:`takescribe.notation.notate`).

    With a part, the part gives meter, bars and written values; without one, the take's
    onset evidence (from ``y``, ``sr``) gives the beat. The title falls back to the take's name.
    """
    onsets = onset_strength(y, sr) if reference is None and y is not None else None
    return notate(
        result.notes, reference=reference, alignment=alignment, onsets=onsets,
        instrument_name=result.instrument.gm_name, midi_program=result.instrument.program,
        tempo=tempo, time_signature=time_signature, grid=grid,
        measured_offsets=not result.instrument.decaying, title=Path(take_path).stem,
        transposition=transposition,
    )


def draft_midi_tracks(result: Transcription, *, notation=None, quantized: bool = False, grid=None):
    """Tracks, tempo map and time signatures of the draft MIDI file (performed timing unless
    ``quantized``; the conductor follows the notation's beat grid, or ``grid``)."""
    if quantized and notation is not None:
        tracks = [MidiTrack(name, tuple(notes), program=program) for name, notes, program in notation.midi_tracks()]
        return tracks, notation.tempo_map(), notation.time_signature_map()
    name = result.instrument.gm_name
    tracks = [MidiTrack(f"{name} (takescribe draft)", tuple(result.notes), program=result.instrument.program)]
    grid = notation.grid if notation is not None else grid
    if grid is not None:
        # the same meter and tempo changes as the notated draft, at the take's beats
        tempo_map, time_signatures = performed_conductor(grid)
        return tracks, tempo_map, time_signatures
    return tracks, [(0.0, 120.0)], [(0.0, 4, 4)]


def write_draft_midi(path, result: Transcription, *, notation=None, midi_type: int = 1, quantized: bool = False,
                     force: bool = False) -> Path:
    """Write the draft MIDI file (see :func:`draft_midi_tracks`)."""
    tracks, tempo_map, time_signatures = draft_midi_tracks(result, notation=notation, quantized=quantized)
    return write_midi(path, tracks, tempo_map=tempo_map, time_signatures=time_signatures, midi_type=midi_type,
                      title="takescribe draft", force=force)


def evaluate_files(estimate_path, reference_path, *, json_path=None, sustain: bool = False, part=None,
                   force: bool = False) -> dict:
    """The ``evaluate`` job: scores of one note list against another (any supported format)."""
    _check_outputs([json_path], force=force)
    _check_not_input([json_path], [estimate_path, reference_path])
    with staged_outputs(force=force) as job:
        staged = job.file(json_path) if json_path is not None else None
        estimate = read_notes(estimate_path, sustain=sustain)
        reference = read_notes(reference_path, sustain=sustain, part=part)
        span = max([n.offset for n in estimate] + [n.offset for n in reference] + [0.0])
        check_frame_cost(span, f"{estimate_path} and {reference_path}")  # refused before the rolls are allocated
        scores = evaluate_notes(reference, estimate)
        if staged is not None:
            write_text(staged, json.dumps(scores, indent=2, sort_keys=True) + "\n")
    return scores


def learn_dictionary_file(recording_path, score_path, output_path, *, part=None, instrument=None,
                          n_iter: int = 40, force: bool = False,
                          progress: Callable[[str], None] | None = None) -> Dictionary:
    """The ``dictionary learn`` job: templates for the user's own instrument.

    The recording of a known passage (a chromatic scale is ideal: every pitch alone)
    is aligned with its part; the aligned part becomes a tight mask on H, so each
    template is fitted only where its pitch sounds. Only the partial amplitudes are
    learned (templates stay harmonic); pitches the passage never plays keep the preset.
    """
    _check_outputs([output_path], force=force)
    _check_not_input([output_path], [recording_path, score_path])
    with staged_outputs(force=force) as job:
        staged = job.file(output_path)
        learned = _learn_dictionary(recording_path, score_path, part=part, instrument=instrument, n_iter=n_iter,
                                    progress=progress)
        save_dictionary(learned, staged)
    return learned


def _learn_dictionary(recording_path, score_path, *, part, instrument, n_iter: int, progress) -> Dictionary:
    """The work of :func:`learn_dictionary_file`."""
    reference = load_reference(score_path, part=part)
    if instrument is None:
        instrument = reference.midi_program if reference.midi_program is not None else "piano"
    y, sr = load_take(recording_path, progress=progress)
    if progress:
        progress("aligning the passage with its part")
    alignment = align_reference(y, sr, reference)
    spectrogram = compute_spectrogram(y, sr)
    base = harmonic_dictionary(spectrogram, instrument=instrument)
    mask = score_mask(reference, alignment, base.pitches, spectrogram.frame_times, floor=0.0, tolerance=0.08)
    V, _ = normalize_spectrogram(spectrogram.V)
    if progress:
        progress("learning partial amplitudes")
    fit = decompose(V, base.W, beta=1.0, n_iter=n_iter, mask=mask, mask_penalty=1.0)
    H = fit.H * (mask > 0)
    return adapt_dictionary(V, base, H, n_iter=n_iter, beta=1.0, min_activation=1e-3)


REPORT_FILES = ("report.html", "findings.json", "annotated.musicxml", "take.mid")


@dataclass(frozen=True)
class CompareOutputs:
    """What :func:`compare_file` produced: the comparison, the transcription and the files."""

    comparison: object
    transcription: Transcription
    alignment: object
    reference: object
    written: dict


def compare_take(y: np.ndarray, sr: int, reference, *, instrument=None, dictionary: Dictionary | None = None,
                 timing_tolerance: float = 0.1, duration_tolerance: float = 0.5, allow_mismatch: bool = False,
                 source: str = "the take", progress: Callable[[str], None] | None = None, room: str = "dry"):
    """Transcribe a loaded take with its part and compare them; returns ``(comparison, transcription, alignment)``.

    Raises
    ------
    ScoreError
        When the alignment confidence says the take is not this part (unless ``allow_mismatch``):
        a page of wrong notes would wrong the student.
    """
    if progress:
        progress("aligning the part with the take")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", AlignmentWarning)
        alignment = align_reference(y, sr, reference)
    if alignment.confidence < MISMATCH_CONFIDENCE and not allow_mismatch:
        raise ScoreError(
            f"{source}: does not seem to be a performance of {Path(reference.source).name or 'the part'}"
            f" (alignment confidence {alignment.confidence:.2f}, below {MISMATCH_CONFIDENCE}); check that the take"
            " and the part (--part) belong together, or pass --allow-mismatch to compare anyway"
        )
    result, _ = transcribe_take(y, sr, instrument=instrument, reference=reference, dictionary=dictionary,
                                progress=progress, alignment=alignment, room=room)
    if progress:
        progress("comparing with the part")
    # a piano or plucked note's sound decays by itself: where the transcription ends it says
    # little about when the key was released, so lengths are not judged for such instruments
    comparison = compare_notes(reference, alignment, result.notes, timing_tolerance=timing_tolerance,
                               duration_tolerance=duration_tolerance,
                               judge_durations=not result.instrument.decaying,
                               faint_notes=faint_notes(result, reference, alignment), mask_partials=True)
    return comparison, result, alignment


def compare_file(take_path, score_path, output_folder, *, part=None, instrument=None, dictionary_path=None,
                 timing_tolerance: float = 0.1, duration_tolerance: float = 0.5, allow_mismatch: bool = False,
                 force: bool = False, progress: Callable[[str], None] | None = None,
                 student: str | None = None, title: str | None = None, room: str = "dry") -> CompareOutputs:
    """The ``compare`` job: a take and its part to a practice report folder (all files or none).

    ``student`` and ``title`` name the player and the piece in the report's header (default:
    the take's tags and the score's title).
    """
    folder = Path(output_folder)
    _check_outputs([folder / name for name in REPORT_FILES], force=force)
    _check_not_input([folder / name for name in REPORT_FILES], [take_path, score_path, dictionary_path])
    with staged_outputs(force=force) as job:
        out = compare_into(job.folder(folder), take_path, score_path, part=part, instrument=instrument,
                           dictionary_path=dictionary_path, timing_tolerance=timing_tolerance,
                           duration_tolerance=duration_tolerance, allow_mismatch=allow_mismatch, progress=progress,
                           student=student, title=title, room=room)
    return CompareOutputs(out.comparison, out.transcription, out.alignment, out.reference,
                          {name: folder / name for name in out.written})


def compare_into(folder: Path, take_path, score_path, *, part=None, instrument=None, dictionary_path=None,
                 timing_tolerance: float = 0.1, duration_tolerance: float = 0.5, allow_mismatch: bool = False,
                 progress: Callable[[str], None] | None = None, student: str | None = None,
                 title: str | None = None, room: str = "dry") -> CompareOutputs:
    """The work of :func:`compare_file`, writing the report into ``folder`` (a staging folder)."""
    loaded = load_part(score_path, part=part)
    reference = loaded.reference
    dictionary = load_dictionary(dictionary_path) if dictionary_path is not None else None
    y, sr = load_take(take_path, progress=progress)
    comparison, result, alignment = compare_take(
        y, sr, reference, instrument=instrument, dictionary=dictionary, timing_tolerance=timing_tolerance,
        duration_tolerance=duration_tolerance, allow_mismatch=allow_mismatch, source=str(take_path),
        progress=progress, room=room)
    last = max((n.offset for n in result.notes), default=0.0)
    grid = grid_from_reference(reference, alignment, last_seconds=last)
    tracks, tempo_map, time_signatures = draft_midi_tracks(result, grid=grid)
    draft = midi_bytes(tracks, tempo_map=tempo_map, time_signatures=time_signatures, title="takescribe draft")
    if progress:
        progress("writing the report")
    details = report_details(take_path, score_path, loaded, result, student=student, title=title)
    voice = part_voice(reference, comparison, instrument=result.instrument, dictionary=result.dictionary,
                       tuning=_dictionary_tuning(result.dictionary))
    written = write_report(folder, comparison, reference, written=loaded.written, take=(y, sr), details=details,
                           voice=voice, draft_notes=result.notes)
    fault_point("between-outputs")
    written["take.mid"] = write_bytes(folder / "take.mid", draft)
    return CompareOutputs(comparison, result, alignment, reference, written)


def report_details(take_path, score_path, loaded, result, *, student=None, title=None) -> ReportDetails:
    """Header of the report: options first, then what the files say (tags, score title, names)."""
    tags = take_tags(take_path)
    piece = title or loaded.title or loaded.reference.part_name or Path(score_path).stem
    return ReportDetails(student=student or tags.get("artist", ""), piece=piece,
                         instrument=loaded.reference.instrument_name or result.instrument.gm_name,
                         recorded=tags.get("date", ""), take_name=Path(take_path).name)


def _dictionary_tuning(dictionary) -> float:
    """Tuning offset (semitones) of a dictionary's frequency axis, whose first bin is A0 = MIDI 21."""
    if dictionary is None or len(getattr(dictionary, "frequencies", ())) == 0:
        return 0.0
    return float(12.0 * np.log2(float(dictionary.frequencies[0]) / 27.5))


def format_scores(scores: dict) -> str:
    """A short human-readable table of :func:`takescribe.evaluate.evaluate_notes` scores."""
    lines = [f"notes: {scores.get('n_reference', 0)} in the reference, {scores.get('n_estimate', 0)} in the estimate"]
    for key, label in (("onset", "onset only"), ("onset_offset", "onset and offset")):
        lines.append(
            f"{label:17s} precision {scores[key + '.precision']:.3f}  recall {scores[key + '.recall']:.3f}  "
            f"F-measure {scores[key + '.f_measure']:.3f}  overlap {scores[key + '.average_overlap_ratio']:.3f}")
    lines.append(f"{'frames (10 ms)':17s} precision {scores['frame.precision']:.3f}  recall {scores['frame.recall']:.3f}  "
                 f"accuracy {scores['frame.accuracy']:.3f}")
    return "\n".join(lines)


def format_findings_counts(counts: dict) -> str:
    """Findings by kind, in words: ``"3 findings: 2 wrong note, 1 late"`` (no share or score of any kind)."""
    present = {kind: int(n) for kind, n in counts.items() if n}
    if not present:
        return "no findings"
    total = sum(present.values())
    kinds = ", ".join(f"{n} {kind.replace('_', ' ')}" for kind, n in present.items())
    return f"{total} finding{'s' if total != 1 else ''}: {kinds}"


def format_comparison_summary(outputs: CompareOutputs) -> str:
    """A few lines for the terminal after ``compare``: findings by kind, where the report is, and
    that findings are suggestions (no grade-like figure: a share of notes right would read as one)."""
    counts = outputs.comparison.summary.get("counts", {})
    report = outputs.written.get("report.html")
    return (f"{format_findings_counts(counts)}.\nOpen the report: {report}\n"
            "Findings are suggestions for the teacher's judgement, not a grade.")
