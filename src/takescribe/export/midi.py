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
- **Reading** is :mod:`takescribe.midifile` (the one reader of note events, shared with
  :mod:`takescribe.reference.part`); its names are re-exported here.

References
----------
.. [1] MIDI Manufacturers Association, "Standard MIDI Files 1.0", 1996.
"""

from __future__ import annotations

import io
import math
import os
from dataclasses import dataclass
from pathlib import Path
from typing import Sequence

import mido

from .. import safeio
from ..midifile import (  # noqa: F401 - the reading names stay importable from here
    PERCUSSION_CHANNEL,
    PairedNotes,
    _TempoMap,
    pair_notes,
    read_midi_notes,
    read_midi_tempo_map,
    read_midi_time_signatures,
    warn_paired,
)
from ..notes import Note, validate_notes

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

_PITCHED_CHANNELS = tuple(c for c in range(16) if c != PERCUSSION_CHANNEL)

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

