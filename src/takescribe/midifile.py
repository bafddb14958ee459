"""Reading Standard MIDI Files: the one reader of note events, for reference parts and note lists.

Shared by :mod:`takescribe.reference.part` (MIDI parts) and :mod:`takescribe.export` (note
lists, :func:`read_midi_notes`), so that one file gives one answer whichever stage reads it;
writing lives in :mod:`takescribe.export.midi`.

Conventions
-----------
-----------
- Follows the Standard MIDI File 1.0 specification (MIDI Manufacturers
  Association, 1988/1996): header chunk ``MThd``, length 6, format, number of
  tracks, division (ticks per quarter note; SMPTE divisions are refused);
  tempo as microseconds per quarter note (meta event ``FF 51``), time
  signature ``FF 58``.
- Times are seconds, pitches MIDI numbers, tempi beats (quarter notes) per
  minute. A tempo is stored as a whole number of microseconds per quarter
  note, ``round(60e6 / bpm)``, so the tempo a reader sees can differ from the
  requested one by less than 1 µs per beat.
- **Reading** (:func:`pair_notes` is the one reader of note events, used by
  :func:`read_midi_notes` and :mod:`takescribe.reference.part`): every track; tempo changes from any
  track apply to all tracks (format 0 and 1; in format 2 each track keeps its own).

  - *Running status* (SMF 1.0, "MIDI events": a channel message may omit its status
    byte when it repeats the previous one) is decoded by mido's parser, so a file with
    and without it gives the same notes.
  - *Note-on with velocity 0 is a note-off* (MIDI 1.0 Detailed Specification 4.2,
    "Note On/Off").
  - *Channel 10* (index 9) carries General MIDI percussion (General MIDI System Level 1:
    key numbers there name drums, not pitches): its notes are left out, with a warning.
  - *Unreleased notes*: the specifications do not say; a note still sounding when its
    track ends is closed at the track's End of Track event (which SMF 1.0 requires at the
    end of every track), with a warning (common practice, no source).
  - Overlapping notes of one pitch and channel are closed first-in, first-out; notes of
    zero length (on and off on one tick) are dropped.
  - A file whose notes would last longer than :attr:`takescribe.limits.SizeLimits.max_span_seconds`
    (a huge delta time) or hold more than ``max_notes`` is refused before notes are built.
 With ``sustain=True`` the sustain pedal (controller 64, value >= 64
  = down) holds a note released while the pedal is down until the pedal is
  released or the same key is struck again on that channel, whichever comes

References
----------
.. [1] MIDI Manufacturers Association, "Standard MIDI Files 1.0", 1996.
.. [2] C. Hawthorne et al., "Onsets and Frames: Dual-Objective Piano
   Transcription", ISMIR 2018.
"""

from __future__ import annotations

import bisect
import io
import math
import os
import warnings
from collections import deque
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

import mido

from .errors import InputError, NoteListError, ScoreWarning
from .limits import check_note_count, check_span
from .notes import Note, sort_notes

__all__ = [
    "PERCUSSION_CHANNEL",
    "read_midi_notes",
    "pair_notes",
    "PairedNotes",
    "warn_paired",
    "read_midi_tempo_map",
    "read_midi_time_signatures",
]

#: General MIDI percussion channel (0-based; "channel 10" to musicians).
PERCUSSION_CHANNEL = 9
_DEFAULT_US_PER_BEAT = 500_000  # SMF default when no tempo event: 120 bpm


# --------------------------------------------------------------------------- tempo map


# --------------------------------------------------------------------------- tempo map


class _TempoMap:
    """Piecewise-constant tempo: segments (start tick, start seconds, µs per beat)."""

    def __init__(self, ticks_per_beat: int, changes: Iterable[tuple[int, int]] = ()) -> None:
        self.ticks_per_beat = ticks_per_beat
        self.ticks = [0]
        self.seconds = [0.0]
        self.us_per_beat = [_DEFAULT_US_PER_BEAT]
        for tick, us in changes:
            self.add(tick, us)

    def add(self, tick: int, us_per_beat: int) -> None:
        """Append a tempo change at ``tick`` (ticks must not decrease)."""
        if tick == self.ticks[-1]:
            self.us_per_beat[-1] = us_per_beat
            return
        self.seconds.append(self.tick_to_seconds(tick))
        self.ticks.append(tick)
        self.us_per_beat.append(us_per_beat)

    def tick_to_seconds(self, tick: int) -> float:
        i = bisect.bisect_right(self.ticks, tick) - 1
        return self.seconds[i] + (tick - self.ticks[i]) * self.us_per_beat[i] / 1e6 / self.ticks_per_beat

    def seconds_to_tick(self, seconds: float) -> int:
        i = bisect.bisect_right(self.seconds, seconds) - 1
        exact = self.ticks[i] + (seconds - self.seconds[i]) * 1e6 / self.us_per_beat[i] * self.ticks_per_beat
        return int(math.floor(exact + 0.5))

    def as_bpm(self) -> tuple[tuple[float, float], ...]:
        return tuple((s, 60e6 / us) for s, us in zip(self.seconds, self.us_per_beat))



# --------------------------------------------------------------------------- reading


def _open_midi(path: str | os.PathLike) -> tuple[Path, mido.MidiFile]:
    path = Path(path)
    if not path.is_file():
        raise NoteListError(f"{path}: no such MIDI file; check the path")
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise NoteListError(f"{path}: cannot read ({exc.strerror})") from exc
    if data[:4] != b"MThd":
        raise NoteListError(f"{path}: not a Standard MIDI File (it does not start with 'MThd'); give a .mid file")
    if len(data) >= 14 and data[12] & 0x80:
        raise NoteListError(
            f"{path}: uses SMPTE time division, which is not supported; re-export it with ticks per quarter note"
        )
    try:
        midi = mido.MidiFile(file=io.BytesIO(data), clip=False)
    except EOFError as exc:
        raise NoteListError(f"{path}: MIDI file is truncated (a chunk ends early); re-export or re-download it") from exc
    except Exception as exc:  # mido raises many kinds (KeySignatureError, ValueError, ...) on bad bytes
        raise NoteListError(f"{path}: corrupt MIDI data ({type(exc).__name__}: {exc}); re-export the file") from exc
    if midi.type not in (0, 1, 2):
        raise NoteListError(f"{path}: unknown MIDI file format {midi.type} (the SMF spec defines 0, 1 and 2)")
    if midi.ticks_per_beat <= 0:
        raise NoteListError(f"{path}: division of {midi.ticks_per_beat} ticks per beat is invalid")
    return path, midi


def _absolute(track: mido.MidiTrack) -> list[tuple[int, mido.Message]]:
    now = 0
    out = []
    for msg in track:
        now += msg.time
        out.append((now, msg))
    return out


def _tempo_maps(midi: mido.MidiFile, tracks: list[list[tuple[int, mido.Message]]]) -> list[_TempoMap]:
    """One tempo map per track: shared in formats 0 and 1, own in format 2."""

    def build(sources: list[list[tuple[int, mido.Message]]]) -> _TempoMap:
        changes = [(tick, msg.tempo) for events in sources for tick, msg in events if msg.type == "set_tempo"]
        changes.sort(key=lambda c: c[0])  # stable: track order at equal ticks, last wins
        return _TempoMap(midi.ticks_per_beat, changes)

    if midi.type == 2:
        return [build([events]) for events in tracks]
    shared = build(tracks)
    return [shared] * len(tracks)


def read_midi_tempo_map(path: str | os.PathLike) -> tuple[tuple[float, float], ...]:
    """Tempo changes of a MIDI file as ``(time_seconds, bpm)``, starting at 0.0.

    Tempo events of every track count (formats 0 and 1); a format 2 file gives
    the map of its first track. Without a tempo event at tick 0 the SMF default
    of 120 bpm applies there.

    Raises
    ------
    NoteListError
        When the file is missing, not MIDI, truncated or corrupt.
    """
    _, midi = _open_midi(path)
    tracks = [_absolute(t) for t in midi.tracks]
    if not tracks:
        return ((0.0, 60e6 / _DEFAULT_US_PER_BEAT),)
    return _tempo_maps(midi, tracks)[0].as_bpm()


def read_midi_time_signatures(path: str | os.PathLike) -> tuple[tuple[float, int, int], ...]:
    """Time signatures of a MIDI file as ``(time_seconds, numerator, denominator)``.

    Without any time signature event the SMF default of 4/4 at 0.0 s is
    returned. At one time the last event wins.

    Raises
    ------
    NoteListError
        When the file is missing, not MIDI, truncated or corrupt.
    """
    _, midi = _open_midi(path)
    tracks = [_absolute(t) for t in midi.tracks]
    if not tracks:
        return ((0.0, 4, 4),)
    tempo = _tempo_maps(midi, tracks)[0]
    found: dict[int, tuple[int, int]] = {}
    for events in tracks if midi.type != 2 else tracks[:1]:
        for tick, msg in events:
            if msg.type == "time_signature":
                found[tick] = (msg.numerator, msg.denominator)
    if not found:
        return ((0.0, 4, 4),)
    return tuple((tempo.tick_to_seconds(tick), n, d) for tick, (n, d) in sorted(found.items()))


@dataclass(frozen=True)
class PairedNotes:
    """Notes of one track in ticks, from :func:`pair_notes`.

    Attributes
    ----------
    spans : list of (on_tick, off_tick, channel, pitch, velocity)
        In order of release.
    percussion : int
        Notes left out because they are on channel 10.
    unreleased : int
        Notes closed at the end of the track.
    """

    spans: list
    percussion: int
    unreleased: int


def pair_notes(events: Sequence[tuple[int, mido.Message]], *, end_tick: int | None = None) -> PairedNotes:
    """Pair note-ons with note-offs in one track of absolute-tick events (module Conventions, Reading)."""
    open_notes: dict[tuple[int, int], deque] = {}
    spans: list[tuple[int, int, int, int, int]] = []
    percussion = 0
    end = events[-1][0] if events else 0 if end_tick is None else end_tick
    for tick, msg in events:
        kind = msg.type
        if kind not in ("note_on", "note_off"):
            continue
        if msg.channel == PERCUSSION_CHANNEL:
            percussion += kind == "note_on" and msg.velocity > 0
            continue
        if kind == "note_on" and msg.velocity > 0:
            open_notes.setdefault((msg.channel, msg.note), deque()).append((tick, msg.velocity))
        else:
            queue = open_notes.get((msg.channel, msg.note))
            if queue:
                on, velocity = queue.popleft()
                spans.append((on, tick, msg.channel, msg.note, velocity))
    unreleased = 0
    for (channel, pitch), queue in open_notes.items():
        for on, velocity in queue:
            spans.append((on, end, channel, pitch, velocity))
            unreleased += 1
    return PairedNotes(spans, percussion, unreleased)


def warn_paired(path, percussion: int, unreleased: int) -> None:
    """The warnings of :func:`pair_notes`' two departures from a plain reading."""
    if percussion:
        warnings.warn(f"{path}: {percussion} notes on channel 10 (General MIDI percussion) left out", ScoreWarning,
                      stacklevel=3)
    if unreleased:
        warnings.warn(f"{path}: {unreleased} notes are never released; they end where their track ends",
                      ScoreWarning, stacklevel=3)


def check_midi_span(path, midi: mido.MidiFile, tracks, tempo_maps) -> None:
    """Refuse a file whose last event lies beyond the span limit, before notes are built."""
    span = 0.0
    for events, tempo in zip(tracks, tempo_maps):
        if events:
            span = max(span, tempo.tick_to_seconds(events[-1][0]))
    check_span(span, path, what="its events", error=NoteListError)


def read_midi_notes(path: str | os.PathLike, *, sustain: bool = False) -> list[Note]:
    """All notes of a MIDI file, in seconds.

    Parameters
    ----------
    path : path-like
        A Standard MIDI File (format 0, 1 or 2).
    sustain : bool
        Extend notes released while the sustain pedal is down (see Conventions).

    Returns
    -------
    list of Note
        Sorted by onset, pitch; empty when the file holds no notes.

    Raises
    ------
    NoteListError
        When the file is missing, not MIDI, truncated, corrupt, or uses SMPTE
        time division; the message names the file.
    """
    path, midi = _open_midi(path)
    tracks = [_absolute(t) for t in midi.tracks]
    tempo_maps = _tempo_maps(midi, tracks)
    check_midi_span(path, midi, tracks, tempo_maps)

    # raw notes: (track, channel, pitch, on_tick, off_tick, velocity)
    raw: list[list] = []
    pedal_changes: dict[tuple[int, int], list[tuple[int, bool]]] = {}  # (group, channel) -> changes
    track_ends = []
    percussion = unreleased = 0
    for t, events in enumerate(tracks):
        group = t if midi.type == 2 else 0  # which tracks share channels
        track_ends.append(events[-1][0] if events else 0)
        paired = pair_notes(events)
        percussion, unreleased = percussion + paired.percussion, unreleased + paired.unreleased
        raw += [[t, channel, pitch, on, off, velocity] for on, off, channel, pitch, velocity in paired.spans]
        for tick, msg in events:
            if msg.type == "control_change" and msg.control == 64:
                pedal_changes.setdefault((group, msg.channel), []).append((tick, msg.value >= 64))
        check_note_count(len(raw), path, error=NoteListError)
    warn_paired(path, percussion, unreleased)

    if sustain and pedal_changes:
        _apply_sustain(raw, pedal_changes, track_ends, midi.type == 2)

    notes = []
    for t, _, pitch, on, off, velocity in raw:
        if off <= on:
            continue
        tempo = tempo_maps[t]
        try:
            notes.append(Note(tempo.tick_to_seconds(on), tempo.tick_to_seconds(off), pitch, velocity))
        except InputError as exc:
            raise NoteListError(f"{path}: impossible note in the MIDI data ({exc}); re-export the file") from exc
    return sort_notes(notes)


def _apply_sustain(
    raw: list[list],
    pedal_changes: dict[tuple[int, int], list[tuple[int, bool]]],
    track_ends: list[int],
    per_track: bool,
) -> None:
    """Extend offsets of notes released under the pedal, in place."""
    # pedal state after all events up to and including a tick; changes sorted stably by tick
    timelines: dict[tuple[int, int], tuple[list[int], list[bool]]] = {}
    for key, changes in pedal_changes.items():
        changes = sorted(changes, key=lambda c: c[0])
        ticks, states = [], []
        for tick, down in changes:
            if ticks and ticks[-1] == tick:
                states[-1] = down
            else:
                ticks.append(tick)
                states.append(down)
        timelines[key] = (ticks, states)
    onsets: dict[tuple[int, int, int], list[int]] = {}
    for t, channel, pitch, on, _, _ in raw:
        onsets.setdefault((t if per_track else 0, channel, pitch), []).append(on)
    for value in onsets.values():
        value.sort()
    for note in raw:
        t, channel, pitch, on, off, _ = note
        group = t if per_track else 0
        timeline = timelines.get((group, channel))
        if timeline is None:
            continue
        ticks, states = timeline
        i = bisect.bisect_right(ticks, off) - 1
        if i < 0 or not states[i]:
            continue
        release = next((ticks[j] for j in range(i + 1, len(ticks)) if not states[j]), track_ends[t])
        same_key = onsets[(group, channel, pitch)]
        k = bisect.bisect_left(same_key, off)
        restrike = same_key[k] if k < len(same_key) else release
        note[4] = max(off, min(release, restrike))
