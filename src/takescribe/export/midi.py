"""Standard MIDI Files in and out: notes in seconds <-> ticks through a tempo map.

Conventions
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
- **Seconds to ticks** go through the stored tempo map: each tempo change is
  placed on the nearest tick, and a time ``t`` in the segment starting at tick
  ``k0`` (whose exact start is ``t0`` seconds under the stored tempi) becomes
  ``k0 + round((t - t0) * 1e6 / us_per_beat * ticks_per_beat)``, rounding
  half up. Reading back is therefore exact to half a tick
  (``30 / (bpm * ticks_per_beat)`` s: 0.52 ms at 120 bpm and 480 ticks).
- **Writing**: at one tick, meta events come first, then program changes, then
  note-offs, then note-ons, each group by channel then pitch. A note that
  rounds to zero ticks lasts one tick. When two notes of one pitch overlap on
  one channel (in any tracks), the earlier one is shortened to end where the
  later starts (two that start on the same tick merge into the longer), so a
  note-on is never sent for a key that is still down. Channel 9 (channel 10 to
  musicians) is the General MIDI percussion channel and is never used for
  these pitched tracks; tracks without a channel get the lowest free one of
  0..8, 10..15.
- **Reading** (:func:`pair_notes` is the one reader of note events, used here and by
  :mod:`takescribe.reference.part` for MIDI parts): every track; tempo changes from any
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
  first (the rule used for piano datasets by Hawthorne et al. 2018, from
  memory), per channel across tracks.

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
from collections import deque
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Sequence

import mido

import warnings

from .. import safeio
from ..errors import InputError, NoteListError, ScoreWarning
from ..limits import check_note_count, check_span
from ..notes import Note, sort_notes, validate_notes

__all__ = [
    "PERCUSSION_CHANNEL",
    "MidiTrack",
    "write_midi",
    "midi_bytes",
    "read_midi_notes",
    "pair_notes",
    "PairedNotes",
    "read_midi_tempo_map",
    "read_midi_time_signatures",
]

#: General MIDI percussion channel (0-based; "channel 10" to musicians).
PERCUSSION_CHANNEL = 9
_PITCHED_CHANNELS = tuple(c for c in range(16) if c != PERCUSSION_CHANNEL)
_DEFAULT_US_PER_BEAT = 500_000  # SMF default when no tempo event: 120 bpm

# event priority at one tick (lower first)
_META, _PROGRAM, _NOTE_OFF, _NOTE_ON = 0, 1, 2, 3


@dataclass(frozen=True, slots=True)
class MidiTrack:
    """One pitched part to write as a MIDI track.

    Parameters
    ----------
    name : str
        Track name (meta event ``FF 03``).
    notes : sequence of Note
        Notes in seconds; stored as a tuple.
    program : int
        General MIDI program, 0..127 (0 = Acoustic Grand Piano).
    channel : int or None
        MIDI channel 0..15 except 9 (percussion); None picks a free one.
    """

    name: str
    notes: tuple[Note, ...]
    program: int = 0
    channel: int | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.name, str):
            raise TypeError(f"track name must be a str, got {type(self.name).__name__}")
        object.__setattr__(self, "notes", tuple(validate_notes(self.notes, name=f"track {self.name!r} notes")))
        if isinstance(self.program, bool) or not isinstance(self.program, int) or not 0 <= self.program <= 127:
            raise ValueError(f"track {self.name!r}: program must be in range 0..127, got {self.program!r}")
        if self.channel is not None:
            if isinstance(self.channel, bool) or not isinstance(self.channel, int) or not 0 <= self.channel <= 15:
                raise ValueError(f"track {self.name!r}: channel must be in range 0..15, got {self.channel!r}")
            if self.channel == PERCUSSION_CHANNEL:
                raise ValueError(
                    f"track {self.name!r}: channel 9 is the General MIDI percussion channel; "
                    "pitched tracks use 0..8 or 10..15 (or None to pick one)"
                )


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


def _validate_tempo_map(tempo_map) -> list[tuple[float, int]]:
    entries = list(tempo_map)
    if not entries:
        raise ValueError("tempo_map must have at least one (time_seconds, bpm) entry, starting at 0.0")
    out = []
    previous = -math.inf
    for i, entry in enumerate(entries):
        try:
            time, bpm = (float(x) for x in entry)
        except (TypeError, ValueError):
            raise ValueError(f"tempo_map[{i}] must be a (time_seconds, bpm) pair, got {entry!r}") from None
        if i == 0 and time != 0.0:
            raise ValueError(f"tempo_map must start at 0.0 s, got {time} s for its first entry")
        if not (math.isfinite(time) and time > previous):
            raise ValueError(f"tempo_map times must increase, got {time} s after {previous} s (entry {i})")
        us = int(round(60e6 / bpm)) if math.isfinite(bpm) and bpm > 0 else 0
        if not 1 <= us <= 0xFFFFFF:
            raise ValueError(f"tempo_map[{i}]: bpm must be in range 3.58..60e6 (SMF tempo field), got {bpm}")
        out.append((time, us))
        previous = time
    return out


def _validate_time_signatures(time_signatures) -> list[tuple[float, int, int]]:
    out = []
    for i, entry in enumerate(time_signatures):
        try:
            time, numerator, denominator = entry
        except (TypeError, ValueError):
            raise ValueError(f"time_signatures[{i}] must be (time_seconds, numerator, denominator), got {entry!r}") from None
        if not (isinstance(numerator, int) and 1 <= numerator <= 255):
            raise ValueError(f"time_signatures[{i}]: numerator must be an int in range 1..255, got {numerator!r}")
        if not (isinstance(denominator, int) and 1 <= denominator <= 128 and denominator & (denominator - 1) == 0):
            raise ValueError(
                f"time_signatures[{i}]: denominator must be a power of two 1..128 (SMF stores its log2), got {denominator!r}"
            )
        if not (math.isfinite(float(time)) and float(time) >= 0):
            raise ValueError(f"time_signatures[{i}]: time must be >= 0 s, got {time!r}")
        out.append((float(time), numerator, denominator))
    return sorted(out, key=lambda e: e[0])


# --------------------------------------------------------------------------- writing


def _assign_channels(tracks: Sequence[MidiTrack]) -> list[int]:
    taken = {t.channel for t in tracks if t.channel is not None}
    free = [c for c in _PITCHED_CHANNELS if c not in taken]
    channels = []
    for track in tracks:
        if track.channel is not None:
            channels.append(track.channel)
        elif free:
            channels.append(free.pop(0))
        else:
            raise ValueError(
                f"track {track.name!r}: no free pitched channel left (15 available); "
                "give tracks that may share a channel an explicit channel"
            )
    programs: dict[int, tuple[int, str]] = {}
    for track, channel in zip(tracks, channels):
        if channel in programs and programs[channel][0] != track.program:
            raise ValueError(
                f"tracks {programs[channel][1]!r} and {track.name!r} share channel {channel} "
                f"with different programs ({programs[channel][0]} and {track.program}); give them different channels"
            )
        programs[channel] = (track.program, track.name)
    return channels


def _note_ticks(tracks: Sequence[MidiTrack], channels: list[int], tempo: _TempoMap) -> list[list[tuple]]:
    """Per track, (on_tick, off_tick, pitch, velocity) with same-key overlaps resolved per channel."""
    by_key: dict[tuple[int, int], list[list]] = {}
    for t, (track, channel) in enumerate(zip(tracks, channels)):
        for note in track.notes:
            on = tempo.seconds_to_tick(note.onset)
            off = max(tempo.seconds_to_tick(note.offset), on + 1)
            by_key.setdefault((channel, note.pitch), []).append([on, off, note.velocity, t])
    per_track: list[list[tuple]] = [[] for _ in tracks]
    for (channel, pitch), items in by_key.items():
        items.sort(key=lambda e: (e[0], e[1], e[3]))
        kept: list[list] = []
        for item in items:
            if kept and kept[-1][0] == item[0]:
                kept[-1] = item  # same start: keep the longer (sorted last)
                continue
            if kept and kept[-1][1] > item[0]:
                kept[-1][1] = item[0]  # key still down: release it where the next strike starts
            kept.append(item)
        for on, off, velocity, t in kept:
            per_track[t].append((on, off, pitch, velocity))
    return per_track


def _to_mido_track(events: list[tuple[int, int, int, int, object]]) -> mido.MidiTrack:
    """Sort (tick, priority, channel, pitch, message) and convert to delta times."""
    events.sort(key=lambda e: e[:4])
    track = mido.MidiTrack()
    now = 0
    for tick, _, _, _, msg in events:
        track.append(msg.copy(time=tick - now))
        now = tick
    track.append(mido.MetaMessage("end_of_track", time=0))
    return track


def midi_bytes(
    tracks: Sequence[MidiTrack],
    *,
    tempo_map: Sequence[tuple[float, float]] = ((0.0, 120.0),),
    time_signatures: Sequence[tuple[float, int, int]] = ((0.0, 4, 4),),
    ticks_per_beat: int = 480,
    midi_type: int = 1,
    title: str = "",
) -> bytes:
    """Serialise tracks to Standard MIDI File bytes (see :func:`write_midi`)."""
    tracks = list(tracks)
    for i, track in enumerate(tracks):
        if not isinstance(track, MidiTrack):
            raise TypeError(f"tracks[{i}] must be a MidiTrack, got {type(track).__name__}")
    if midi_type not in (0, 1):
        raise ValueError(f"midi_type must be 0 (one track) or 1 (conductor + one track per part), got {midi_type!r}")
    if isinstance(ticks_per_beat, bool) or not isinstance(ticks_per_beat, int) or not 1 <= ticks_per_beat <= 0x7FFF:
        raise ValueError(f"ticks_per_beat must be an int in range 1..32767, got {ticks_per_beat!r}")
    tempo_entries = _validate_tempo_map(tempo_map)
    signature_entries = _validate_time_signatures(time_signatures)

    tempo = _TempoMap(ticks_per_beat)
    tempo.us_per_beat[0] = tempo_entries[0][1]
    for time, us in tempo_entries[1:]:
        tempo.add(tempo.seconds_to_tick(time), us)

    conductor: list[tuple] = [(0, _META, -1, -1, mido.MetaMessage("track_name", name=title))]
    for tick, us in zip(tempo.ticks, tempo.us_per_beat):
        conductor.append((tick, _META, 1, 0, mido.MetaMessage("set_tempo", tempo=us)))
    for time, numerator, denominator in signature_entries:
        tick = tempo.seconds_to_tick(time)
        conductor.append(
            (tick, _META, 0, 0, mido.MetaMessage("time_signature", numerator=numerator, denominator=denominator))
        )

    channels = _assign_channels(tracks)
    note_ticks = _note_ticks(tracks, channels, tempo)
    part_events: list[list[tuple]] = []
    for track, channel, notes in zip(tracks, channels, note_ticks):
        events: list[tuple] = [
            (0, _PROGRAM, channel, 0, mido.Message("program_change", channel=channel, program=track.program))
        ]
        for on, off, pitch, velocity in notes:
            events.append((on, _NOTE_ON, channel, pitch, mido.Message("note_on", channel=channel, note=pitch, velocity=velocity)))
            events.append((off, _NOTE_OFF, channel, pitch, mido.Message("note_off", channel=channel, note=pitch, velocity=0)))
        part_events.append(events)

    midi = mido.MidiFile(type=midi_type, ticks_per_beat=ticks_per_beat)
    if midi_type == 1:
        midi.tracks.append(_to_mido_track(conductor))
        for track, events in zip(tracks, part_events):
            events.append((0, _META, -1, -1, mido.MetaMessage("track_name", name=track.name)))
            midi.tracks.append(_to_mido_track(events))
    else:
        merged = conductor + [e for events in part_events for e in events]
        midi.tracks.append(_to_mido_track(merged))
    buffer = io.BytesIO()
    midi.save(file=buffer)
    return buffer.getvalue()


def write_midi(
    path: str | os.PathLike,
    tracks: Sequence[MidiTrack],
    *,
    tempo_map: Sequence[tuple[float, float]] = ((0.0, 120.0),),
    time_signatures: Sequence[tuple[float, int, int]] = ((0.0, 4, 4),),
    ticks_per_beat: int = 480,
    midi_type: int = 1,
    title: str | None = None,
    force: bool = False,
) -> Path:
    """Write notes (in seconds) as a Standard MIDI File.

    Parameters
    ----------
    path : path-like
        Destination (``.mid``).
    tracks : sequence of MidiTrack
        The parts; notes in seconds.
    tempo_map : sequence of (time_seconds, bpm)
        Tempo changes; the first at 0.0 s; times increasing.
    time_signatures : sequence of (time_seconds, numerator, denominator)
        Time signature changes; denominators are powers of two.
    ticks_per_beat : int
        Division: ticks per quarter note, 1..32767.
    midi_type : {0, 1}
        1: a conductor track (name, tempi, time signatures) then one track per
        part (name, program change, notes). 0: all in one track.
    title : str or None
        Name of the conductor (first) track, which readers show as the title;
        default: the file name without suffix.
    force : bool
        Replace an existing file.

    Returns
    -------
    Path
        ``path``.

    Raises
    ------
    ValueError
        On a bad option value (message names the allowed range).
    OutputError
        When ``path`` exists and ``force`` is false, or cannot be written.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from takescribe.notes import Note
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "tune.mid"
    >>> _ = write_midi(out, [MidiTrack("flute", [Note(0.0, 0.5, 72)], program=73)])
    >>> read_midi_notes(out)
    [Note(onset=0.0, offset=0.5, pitch=72, velocity=80)]
    """
    data = midi_bytes(
        tracks,
        tempo_map=tempo_map,
        time_signatures=time_signatures,
        ticks_per_beat=ticks_per_beat,
        midi_type=midi_type,
        title=Path(path).stem if title is None else title,
    )
    return safeio.write_bytes(path, data, force=force)


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
