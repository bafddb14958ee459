"""Reference parts from Standard MIDI Files: tracks to raw parts, through the one note reader.

Note events are paired by :func:`takescribe.midifile.pair_notes`, the reader of note lists too.
"""

from __future__ import annotations

import io
from pathlib import Path

from ..errors import ScoreError
from ..limits import check_note_count, check_span
from ..midifile import pair_notes, warn_paired
from .model import DEFAULT_BPM, MAX_MIDI_BYTES, _brief, _RawNote, _RawPart


# --------------------------------------------------------------------------
# MIDI
# --------------------------------------------------------------------------
_KEY_FIFTHS = {
    "Cb": -7, "Gb": -6, "Db": -5, "Ab": -4, "Eb": -3, "Bb": -2, "F": -1, "C": 0, "G": 1, "D": 2,
    "A": 3, "E": 4, "B": 5, "F#": 6, "C#": 7,
    "Abm": -7, "Ebm": -6, "Bbm": -5, "Fm": -4, "Cm": -3, "Gm": -2, "Dm": -1, "Am": 0, "Em": 1,
    "Bm": 2, "F#m": 3, "C#m": 4, "G#m": 5, "D#m": 6, "A#m": 7,
}


def _read_midi(path: Path):
    import mido

    try:
        with open(path, "rb") as fh:
            data = fh.read(MAX_MIDI_BYTES + 1)
    except OSError as exc:
        raise ScoreError(f"{path}: cannot be read ({exc.strerror}); check the path") from exc
    if len(data) > MAX_MIDI_BYTES:
        raise ScoreError(f"{path}: larger than {MAX_MIDI_BYTES // (1024 * 1024)} MB; not a plausible part")
    try:
        return mido.MidiFile(file=io.BytesIO(data))
    except Exception as exc:  # mido raises OSError, EOFError, ValueError, KeyError on damaged files
        raise ScoreError(f"{path}: not a readable Standard MIDI File ({_brief(exc)}); re-export it") from exc


def _midi_parts(mid, path: Path) -> tuple[list[_RawPart], list, list, int, str | None]:
    if mid.type == 2:
        raise ScoreError(f"{path}: MIDI type 2 (independent sequences) is not supported; export as type 0 or 1")
    tpq = mid.ticks_per_beat
    # SMF 1.0 header: a division with bit 15 set counts SMPTE frames, not ticks per quarter note
    if not tpq or tpq <= 0 or tpq & 0x8000:
        raise ScoreError(f"{path}: SMPTE time division is not supported; export with ticks per quarter note")
    tempo_map, time_sigs = [], []
    key_fifths, mode = 0, None
    key_found = False
    parts: list[_RawPart] = []
    for t_index, track in enumerate(mid.tracks):
        tick = 0
        name, inst_name, program = None, None, None
        events = []
        for msg in track:
            tick += msg.time
            events.append((tick, msg))
            if msg.is_meta:
                if msg.type == "set_tempo":
                    if msg.tempo <= 0:
                        raise ScoreError(
                            f"{path}: a Set Tempo event of 0 microseconds per quarter note at tick {tick} "
                            "(an infinite tempo); the file is damaged; re-export it"
                        )
                    tempo_map.append((tick / tpq, 60e6 / msg.tempo))
                elif msg.type == "time_signature":
                    time_sigs.append((tick / tpq, msg.numerator, msg.denominator))
                elif msg.type == "key_signature" and not key_found:
                    key_fifths = _KEY_FIFTHS.get(msg.key, 0)
                    mode = "minor" if msg.key.endswith("m") else "major"
                    key_found = True
                elif msg.type == "track_name" and name is None and msg.name.strip():
                    name = msg.name.strip()
                elif msg.type == "instrument_name" and inst_name is None and msg.name.strip():
                    inst_name = msg.name.strip()
                continue
            if msg.type == "program_change" and program is None and msg.channel != 9:
                program = int(msg.program)
        paired = pair_notes(events)  # the one MIDI note reader (takescribe.midifile, Conventions)
        warn_paired(path, paired.percussion, paired.unreleased)
        spans = [(s, e, pitch, c) for s, e, c, pitch, _v in paired.spans if e > s]
        parts.append(_RawPart(
            name=name or f"Track {t_index + 1}", instrument_name=inst_name or (name or ""),
            midi_program=program,
            notes=[_RawNote(pitch=p, q=s / tpq, dur=(e - s) / tpq, staff=1, voice=1, spelling="")
                   for s, e, p, _c in spans],
            tempo_map=[], time_signatures=[], measure_starts=[], measure_labels=[], key_fifths=0, mode=None,
        ))
    return parts, tempo_map, time_sigs, key_fifths, mode


def _quarters_to_seconds(q: float, tempo_map: list) -> float:
    """Seconds at quarter ``q`` under ``(quarter, bpm)`` changes (120 bpm before the first)."""
    seconds, at, bpm = 0.0, 0.0, DEFAULT_BPM
    for start, new_bpm in sorted(tempo_map):
        if start >= q:
            break
        seconds += (start - at) * 60.0 / bpm
        at, bpm = start, new_bpm
    return seconds + (q - at) * 60.0 / bpm


def _midi_candidates(path: Path) -> tuple[list[_RawPart], list, list, int, str | None]:
    mid = _read_midi(path)
    parts, tempo_map, time_sigs, fifths, mode = _midi_parts(mid, path)
    with_notes = [p for p in parts if p.notes]
    if not with_notes:
        raise ScoreError(f"{path}: the MIDI file has no (pitched) notes; choose a file with the part in it")
    # limits by cost (takescribe.limits), before any bar grid or note is laid out
    end_q = max(r.q + r.dur for p in with_notes for r in p.notes)
    check_span(_quarters_to_seconds(end_q, tempo_map), path, what="the parts", error=ScoreError)
    check_note_count(sum(len(p.notes) for p in with_notes), path, error=ScoreError)
    return with_notes, tempo_map, time_sigs, fifths, mode


