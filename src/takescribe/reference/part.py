"""Reference parts: load one part of a MusicXML or MIDI score as timed notes.

A :class:`Reference` is the part the player was asked to play, laid out in
*performance order* (repeats expanded) with each note's position in quarter
notes, in seconds at the written tempo, and in bars and beats.

Conventions
-----------
- Positions are quarter notes from the start of the expanded score
  (``onset_quarters``); times are seconds at the written tempo map
  (``onset``/``offset``); pitches are MIDI numbers (A4 = 69 = 440 Hz, ISO 16).
- ``measure`` is the 1-based number of the bar in performance order (a pickup
  bar is bar 1); ``measure_label`` is the number printed in the score, so a
  repeated bar 5 played twice has two ``measure`` values and one label "5".
- ``beat`` is 1-based and counts the unit of the time signature's denominator
  (6/8 has six beats of an eighth note). In a pickup bar the beats are counted
  from the end, as players count them (a one-quarter pickup in 4/4 is beat 4).
- Without any tempo mark the written tempo is 120 quarter notes per minute,
  the default of the Standard MIDI File specification (and of music21).
- Tied notes are merged into one note. Chords give one note per pitch.
- Grace notes are kept with ``is_grace=True``: they sound for
  :data:`GRACE_QUARTERS` (a 32nd note; at most half of the following note)
  taken from the start of the note they ornament, which starts that much later
  (common practice, no source; acciaccatura and appoggiatura are treated alike).
- Ornaments (trills, mordents, turns) are kept as the written main note.
- Untrusted files: XML is checked with defusedxml before music21 sees it
  (no external entities, no entity expansion); ``.mxl`` archives are opened
  here with a size limit (:data:`MAX_XML_BYTES`) so a zip bomb cannot exhaust
  memory; member names that are absolute or contain ``..`` are refused. Every
  failure to unpack one (damaged, encrypted, unknown compression) is a
  :class:`~takescribe.errors.ScoreError`.
- Damaged values are refused before they can hang the reader: a MIDI time
  signature outside 1..64 over 1, 2, 4, ..., 64, a MIDI part longer than
  :data:`MAX_BARS` bars, a Set Tempo of 0, a MusicXML bar of more than 64 beats
  (music21 slows down steeply with the number of beats). A MusicXML tempo mark
  that is not a positive number is ignored with a :class:`ScoreWarning`.
"""

from __future__ import annotations

import errno
import io
import posixpath
import re
import warnings
import zipfile
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Sequence

import numpy as np

from ..errors import ScoreError, ScoreWarning  # ScoreWarning re-exported: its home before the warning tree
from ..midifile import pair_notes, warn_paired
from ..limits import LIMITS, check_note_count, check_span
from ..notes import Note

__all__ = [
    "ScoreNote",
    "Reference",
    "ScoreWarning",
    "load_reference",
    "load_part",
    "LoadedPart",
    "list_parts",
    "validate_reference",
    "DEFAULT_BPM",
    "GRACE_QUARTERS",
    "MAX_XML_BYTES",
    "MUSICXML_SUFFIXES",
    "MIDI_SUFFIXES",
]

DEFAULT_BPM = 120.0
GRACE_QUARTERS = 0.125
MAX_XML_BYTES = 50 * 1024 * 1024
MAX_MIDI_BYTES = 20 * 1024 * 1024
# bars laid out for a file without barlines (MIDI): 100 000 bars of 4/4 at 120 bpm are 55 hours,
# far beyond any part, so more means a damaged file (and would otherwise exhaust memory)
MAX_BARS = 100_000
MUSICXML_SUFFIXES = (".musicxml", ".xml", ".mxl")
MIDI_SUFFIXES = (".mid", ".midi")

_EPS = 1e-9
_SHARP_NAMES = ("C", "C#", "D", "D#", "E", "F", "F#", "G", "G#", "A", "A#", "B")
_FLAT_NAMES = ("C", "Db", "D", "Eb", "E", "F", "Gb", "G", "Ab", "A", "Bb", "B")


@dataclass(frozen=True, slots=True)
class ScoreNote:
    """One written note of a reference part.

    Attributes
    ----------
    pitch : int
        MIDI note number.
    onset_quarters, duration_quarters : float
        Position and length in quarter notes in the expanded score.
    onset, offset : float
        Seconds at the written tempo map.
    measure : int
        1-based bar number in performance order.
    measure_label : str
        The bar number printed in the score.
    beat : float
        1-based position in beats of the time signature.
    staff : int
        Staff within the part (1 or 2 for piano).
    voice : int
        Voice number within the staff.
    spelling : str
        Written pitch name with octave, e.g. ``"F#4"``, ``"Bb3"``.
    index : int
        Position in :attr:`Reference.notes`.
    is_grace : bool
        A grace note (see the module conventions).
    """

    pitch: int
    onset_quarters: float
    duration_quarters: float
    onset: float
    offset: float
    measure: int
    measure_label: str
    beat: float
    staff: int = 1
    voice: int = 1
    spelling: str = ""
    index: int = 0
    is_grace: bool = False


@dataclass(frozen=True, slots=True)
class Reference:
    """One part of a score in performance order.

    Attributes
    ----------
    notes : tuple of ScoreNote
        Sorted by onset, then pitch; ``notes[k].index == k``.
    tempo_map : tuple of (float, float)
        ``(quarters, bpm)`` pairs (quarter notes per minute), first at 0.
    time_signatures : tuple of (float, int, int)
        ``(quarters, numerator, denominator)``, first at 0.
    measure_starts : tuple of float
        Quarter position of each bar in performance order, plus the end.
    key_fifths : int
        Key signature as fifths (-7..7), 0 when unknown.
    mode : str or None
        ``"major"``/``"minor"`` when the score says so.
    part_name, instrument_name : str
    midi_program : int or None
        General MIDI program 0..127.
    source : str
        The file the part was read from.
    measure_labels : tuple of str
        Printed bar number of each bar in performance order.
    title, composer : str
        From the MusicXML header ("" when absent).
    transposition : int
        Semitones from written to sounding pitch of a transposing part (``<transpose>``:
        -2 for a B-flat clarinet); notes, spellings and key are at sounding pitch.
    """

    notes: tuple[ScoreNote, ...]
    tempo_map: tuple[tuple[float, float], ...]
    time_signatures: tuple[tuple[float, int, int], ...]
    measure_starts: tuple[float, ...]
    key_fifths: int = 0
    mode: str | None = None
    part_name: str = ""
    instrument_name: str = ""
    midi_program: int | None = None
    source: str = ""
    measure_labels: tuple[str, ...] = ()
    title: str = ""
    composer: str = ""
    transposition: int = 0

    # --- time conversions -------------------------------------------------
    def _tempo_arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        starts_q = np.array([q for q, _ in self.tempo_map], dtype=float)
        sec_per_quarter = 60.0 / np.array([b for _, b in self.tempo_map], dtype=float)
        starts_s = np.concatenate([[0.0], np.cumsum(np.diff(starts_q) * sec_per_quarter[:-1])])
        return starts_q, starts_s, sec_per_quarter

    def quarters_to_seconds(self, q):
        """Seconds at the written tempo of quarter positions ``q`` (scalar or array)."""
        starts_q, starts_s, spq = self._tempo_arrays()
        q_arr = np.asarray(q, dtype=float)
        k = np.clip(np.searchsorted(starts_q, q_arr, side="right") - 1, 0, len(starts_q) - 1)
        out = starts_s[k] + (q_arr - starts_q[k]) * spq[k]
        return float(out) if np.ndim(out) == 0 else out

    def seconds_to_quarters(self, t):
        """Quarter positions of times ``t`` seconds at the written tempo (inverse of the above)."""
        starts_q, starts_s, spq = self._tempo_arrays()
        t_arr = np.asarray(t, dtype=float)
        k = np.clip(np.searchsorted(starts_s, t_arr, side="right") - 1, 0, len(starts_s) - 1)
        out = starts_q[k] + (t_arr - starts_s[k]) / spq[k]
        return float(out) if np.ndim(out) == 0 else out

    def measure_beat(self, q) -> tuple:
        """``(measure, beat)`` of quarter positions ``q``: 1-based bar in performance order, 1-based beat."""
        q_arr = np.asarray(q, dtype=float)
        starts = np.asarray(self.measure_starts, dtype=float)
        m = np.clip(np.searchsorted(starts, q_arr + _EPS, side="right") - 1, 0, max(len(starts) - 2, 0))
        ts_q = np.array([s[0] for s in self.time_signatures], dtype=float)
        ts_num = np.array([s[1] for s in self.time_signatures], dtype=float)
        ts_den = np.array([s[2] for s in self.time_signatures], dtype=float)
        k = np.clip(np.searchsorted(ts_q, starts[m] + _EPS, side="right") - 1, 0, len(ts_q) - 1)
        beat_quarters = 4.0 / ts_den[k]
        bar_quarters = ts_num[k] * beat_quarters
        length = np.diff(starts)[m] if len(starts) > 1 else bar_quarters
        # a short first bar is a pickup: count its beats from the end of a full bar
        pickup = np.where((m == 0) & (length < bar_quarters - _EPS), bar_quarters - length, 0.0)
        beat = 1.0 + (q_arr - starts[m] + pickup) / beat_quarters
        measure = m + 1
        if np.ndim(q_arr) == 0:
            return int(measure), float(beat)
        return measure.astype(int), beat

    @property
    def duration(self) -> float:
        """Length in seconds at the written tempo (end of the last bar or note)."""
        end_q = max(self.measure_starts[-1] if self.measure_starts else 0.0,
                    max((n.onset_quarters + n.duration_quarters for n in self.notes), default=0.0))
        return float(self.quarters_to_seconds(end_q))

    def to_notes(self) -> list[Note]:
        """The part as :class:`takescribe.notes.Note` (seconds at the written tempo, velocity 80)."""
        return [Note(n.onset, n.offset, n.pitch, 80) for n in self.notes if n.offset > n.onset]


def validate_reference(reference: object, *, name: str = "reference") -> Reference:
    """Check that ``reference`` is a usable :class:`Reference`; return it."""
    if not isinstance(reference, Reference):
        raise TypeError(f"{name} must be a Reference (from load_reference), got {type(reference).__name__}")
    if len(reference.notes) == 0:
        raise ScoreError(f"{name} ({reference.source or 'no file'}) has no notes; choose a part with notes")
    return reference


# --------------------------------------------------------------------------
# shared helpers
# --------------------------------------------------------------------------
def _brief(exc: BaseException, limit: int = 200) -> str:
    """``Type: message`` of ``exc`` on one line, cut to ``limit`` characters (errors print one line)."""
    text = " ".join(str(exc).split())
    if len(text) > limit:
        text = text[: limit - 3] + "..."
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


def _spell(midi: int, fifths: int) -> str:
    names = _FLAT_NAMES if fifths < 0 else _SHARP_NAMES
    return f"{names[midi % 12]}{midi // 12 - 1}"


@dataclass
class _RawNote:
    pitch: int
    q: float
    dur: float
    staff: int
    voice: int
    spelling: str
    is_grace: bool = False
    tie: str | None = None
    chord_with_previous: bool = False


@dataclass
class _RawPart:
    name: str
    instrument_name: str
    midi_program: int | None
    notes: list
    tempo_map: list
    time_signatures: list
    measure_starts: list
    measure_labels: list
    key_fifths: int
    mode: str | None


def _merge_ties(raw: list[_RawNote]) -> list[_RawNote]:
    """Merge tied notes (same staff and pitch, each starting where the previous ends)."""
    raw = sorted(raw, key=lambda r: (r.staff, r.q, r.pitch))
    out: list[_RawNote] = []
    open_ties: dict[tuple[int, int], _RawNote] = {}
    for r in raw:
        key = (r.staff, r.pitch)
        held = open_ties.get(key)
        # as music21's stripTies: a held tie also absorbs an abutting note of the same pitch that
        # lacks the "stop" (a tie written into a second ending after a repeat is expanded)
        if r.tie != "start" and held is not None and abs(held.q + held.dur - r.q) < 1e-6:
            held.dur += r.dur
            if r.tie == "stop":
                del open_ties[key]
            continue
        out.append(r)
        if r.tie in ("start", "continue"):
            open_ties[key] = r
        else:
            open_ties.pop(key, None)
    return out


def _place_graces(raw: list[_RawNote]) -> list[_RawNote]:
    """Give grace notes a short sounding length taken from the note they ornament."""
    graces: dict[tuple[int, int, float], list[_RawNote]] = {}
    mains: dict[tuple[int, int, float], list[_RawNote]] = {}
    for r in raw:
        key = (r.staff, r.voice, round(r.q, 6))
        (graces if r.is_grace else mains).setdefault(key, []).append(r)
    for key, group in graces.items():
        # a chord of grace notes shares one slot; consecutive grace notes follow each other
        chord_slots: list[list[_RawNote]] = []
        for g in group:
            if chord_slots and g.chord_with_previous:
                chord_slots[-1].append(g)
            else:
                chord_slots.append([g])
        n_slots = len(chord_slots)
        targets = mains.get(key) or []
        if targets:
            shortest = min(t.dur for t in targets)
            g = min(GRACE_QUARTERS, shortest / (2 * n_slots))
            for t in targets:
                t.q += n_slots * g
                t.dur -= n_slots * g
        else:
            g = GRACE_QUARTERS
        for k, slot in enumerate(chord_slots):
            for r in slot:
                r.q = key[2] + k * g
                r.dur = g
    return raw


def _check_time_signature(numerator: int, denominator: int, source: Path) -> None:
    # SMF 1.0 stores the denominator as a power of two; 1..64 covers every written meter
    # (whole note to 64th; common practice, no source), as does a numerator of 1..64
    if not 1 <= numerator <= 64 or denominator not in (1, 2, 4, 8, 16, 32, 64):
        den = str(denominator) if denominator < 10**6 else f"2**{denominator.bit_length() - 1}"
        raise ScoreError(
            f"{source}: impossible time signature {numerator}/{den} (expected 1..64 over 1, 2, 4, ..., 64); "
            "the file is probably damaged; re-export it"
        )


def _measure_grid(time_signatures: list, end_q: float, *, source: Path = Path("?")) -> tuple[list[float], list[str]]:
    """Bar starts from time signatures up to ``end_q`` (for files without bars, e.g. MIDI).

    Raises :class:`ScoreError` for an impossible time signature or more than :data:`MAX_BARS` bars.
    """
    ts = sorted(time_signatures)
    for _, numerator, denominator in ts:
        _check_time_signature(int(numerator), int(denominator), source)
    starts: list[float] = []
    q = 0.0
    k = 0
    while q < end_q - _EPS or not starts:
        if len(starts) >= MAX_BARS:
            raise ScoreError(
                f"{source}: the part would last more than {MAX_BARS} bars (its last note ends "
                f"{end_q:.0f} quarter notes in); the file is probably damaged; re-export it"
            )
        while k + 1 < len(ts) and ts[k + 1][0] <= q + _EPS:
            k += 1
        starts.append(q)
        bar = ts[k][1] * 4.0 / ts[k][2]
        nxt = q + bar
        # a time signature change in the middle of a bar starts a new bar there
        if k + 1 < len(ts) and q + _EPS < ts[k + 1][0] < nxt - _EPS:
            nxt = ts[k + 1][0]
        q = nxt
    starts.append(q)
    return starts, [str(i + 1) for i in range(len(starts) - 1)]


def _build_reference(raw: _RawPart, source: Path) -> Reference:
    if not raw.notes:
        raise ScoreError(
            f"{source}: part {raw.name!r} has no notes; choose another part (see list_parts) or check the file"
        )
    tempo_map = sorted({round(q, 9): (float(q), float(b)) for q, b in raw.tempo_map}.values())
    if not tempo_map or tempo_map[0][0] > _EPS:
        tempo_map.insert(0, (0.0, DEFAULT_BPM))
    tempo_map = [tm for k, tm in enumerate(tempo_map) if k == 0 or tm[1] != tempo_map[k - 1][1]]
    tsigs = sorted({round(q, 9): (float(q), int(n), int(d)) for q, n, d in raw.time_signatures}.values())
    if not tsigs or tsigs[0][0] > _EPS:
        tsigs.insert(0, (0.0, 4, 4))
    skeleton = Reference(
        notes=(), tempo_map=tuple(tempo_map), time_signatures=tuple(tsigs),
        measure_starts=tuple(float(x) for x in raw.measure_starts),
    )
    kept = [r for r in raw.notes if r.dur > _EPS]
    kept.sort(key=lambda r: (r.q, r.pitch, r.staff, r.voice))
    q_on = np.array([r.q for r in kept])
    q_off = q_on + np.array([r.dur for r in kept])
    t_on = np.atleast_1d(skeleton.quarters_to_seconds(q_on))
    t_off = np.atleast_1d(skeleton.quarters_to_seconds(q_off))
    measures, beats = skeleton.measure_beat(q_on)
    measures = np.atleast_1d(measures)
    beats = np.atleast_1d(beats)
    labels = list(raw.measure_labels)
    notes = []
    for i, r in enumerate(kept):
        m = int(measures[i])
        notes.append(ScoreNote(
            pitch=int(r.pitch), onset_quarters=float(r.q), duration_quarters=float(r.dur),
            onset=float(t_on[i]), offset=float(t_off[i]), measure=m,
            measure_label=labels[m - 1] if 0 < m <= len(labels) else str(m),
            beat=float(beats[i]), staff=int(r.staff), voice=int(r.voice), spelling=r.spelling,
            index=i, is_grace=bool(r.is_grace),
        ))
    return Reference(
        notes=tuple(notes), tempo_map=tuple(tempo_map), time_signatures=tuple(tsigs),
        measure_starts=tuple(float(x) for x in raw.measure_starts), key_fifths=int(raw.key_fifths),
        mode=raw.mode, part_name=raw.name, instrument_name=raw.instrument_name,
        midi_program=raw.midi_program, source=str(source), measure_labels=tuple(labels),
    )


def _select(names: Sequence[str], part: object, source: Path) -> int:
    listing = ", ".join(f"{i}: {n!r}" for i, n in enumerate(names))
    if part is None:
        if len(names) > 1:
            warnings.warn(
                f"{source}: has {len(names)} parts ({listing}); using the first, {names[0]!r}. "
                "Choose another with part=<name or number>.",
                ScoreWarning, stacklevel=3,
            )
        return 0
    if isinstance(part, bool) or not isinstance(part, (int, np.integer, str)):
        raise TypeError(f"part must be a part name, a 0-based index or None, got {type(part).__name__}")
    if isinstance(part, str) and part.strip().isdigit():
        part = int(part.strip())
    if isinstance(part, (int, np.integer)):
        if not 0 <= int(part) < len(names):
            raise ScoreError(
                f"{source}: there is no part number {int(part)}; the parts are {listing} (numbers start at 0)"
            )
        return int(part)
    hits = [i for i, n in enumerate(names) if n.strip().lower() == part.strip().lower()]
    if not hits:
        raise ScoreError(f"{source}: there is no part named {part!r}; the parts are {listing}")
    if len(hits) > 1:
        raise ScoreError(
            f"{source}: several parts are named {part!r} ({listing}); choose one by its number"
        )
    return hits[0]


# --------------------------------------------------------------------------
# MusicXML
# --------------------------------------------------------------------------
def _read_limited(fh, limit: int, what: str) -> bytes:
    """Read ``fh`` to the end, refusing more than ``limit`` bytes (the caller maps read errors)."""
    chunks = []
    total = 0
    while True:
        chunk = fh.read(1 << 20)
        if not chunk:
            break
        total += len(chunk)
        if total > limit:
            raise ScoreError(
                f"{what}: larger than {limit // (1024 * 1024)} MB once unpacked; refusing to read it "
                "(a damaged or malicious file?). Export the part alone and try again."
            )
        chunks.append(chunk)
    return b"".join(chunks)


def _safe_member(name: str, source: Path) -> str:
    if name.startswith(("/", "\\")) or re.match(r"^[A-Za-z]:", name) or ".." in name.replace("\\", "/").split("/"):
        raise ScoreError(f"{source}: the archive names an unsafe member {name!r} (absolute or with '..'); refusing it")
    return name


def _read_mxl(path: Path) -> bytes:
    """The score member of a compressed MusicXML archive, every failure a :class:`ScoreError`."""
    try:
        return _read_mxl_member(path)
    except ScoreError:
        raise
    except MemoryError:
        raise
    except NotImplementedError as exc:
        # (a RuntimeError subclass, so caught first) an unknown compression method, or a newer
        # zip version than Python's zipfile reads
        raise ScoreError(
            f"{path}: the .mxl archive uses a zip feature that cannot be unpacked here ({_brief(exc)}); "
            "re-export it as uncompressed MusicXML (.musicxml)"
        ) from exc
    except RuntimeError as exc:
        # zipfile's only RuntimeError on reading is an encrypted member without a password
        if "encrypted" in str(exc) or "password" in str(exc):
            raise ScoreError(
                f"{path}: the .mxl archive is password-protected; export the score again without "
                "encryption, or as uncompressed MusicXML (.musicxml)"
            ) from exc
        raise ScoreError(
            f"{path}: cannot unpack the .mxl archive ({_brief(exc)}); re-export it as MusicXML (.musicxml)"
        ) from exc
    except OSError as exc:
        if exc.errno in (errno.ENOENT, errno.EACCES, errno.EPERM, errno.EISDIR):
            raise ScoreError(f"{path}: cannot be read ({exc.strerror}); check the path") from exc
        raise ScoreError(
            f"{path}: not a readable compressed MusicXML (.mxl) archive, it is damaged ({_brief(exc)}); "
            "re-export it as MusicXML"
        ) from exc
    except Exception as exc:  # zipfile.BadZipFile, zlib.error, EOFError, ValueError, struct.error, ...
        raise ScoreError(
            f"{path}: not a readable compressed MusicXML (.mxl) archive, it is damaged ({_brief(exc)}); "
            "re-export it as MusicXML"
        ) from exc


def _read_mxl_member(path: Path) -> bytes:
    import defusedxml.ElementTree as DET

    with zipfile.ZipFile(path) as zf:
        names = zf.namelist()
        for n in names:
            _safe_member(n, path)
        rootfile = None
        if "META-INF/container.xml" in names:
            with zf.open("META-INF/container.xml") as member:
                container = _read_limited(member, 1 << 20, f"{path}: META-INF/container.xml")
            try:
                croot = DET.fromstring(container, forbid_dtd=True)
            except Exception as exc:  # defusedxml and expat errors alike
                raise ScoreError(
                    f"{path}: META-INF/container.xml is not valid or safe XML ({_brief(exc)}); re-export the file"
                ) from exc
            for el in croot.iter():
                if isinstance(el.tag, str) and el.tag.rsplit("}", 1)[-1] == "rootfile" and el.get("full-path"):
                    rootfile = el.get("full-path")
                    break
        if rootfile is None:
            candidates = [n for n in names if not n.startswith("META-INF/") and n.lower().endswith((".xml", ".musicxml"))]
            if not candidates:
                raise ScoreError(f"{path}: the .mxl archive holds no MusicXML file; re-export the score")
            rootfile = candidates[0]
        rootfile = _safe_member(posixpath.normpath(rootfile), path)
        if rootfile not in names:
            raise ScoreError(f"{path}: the .mxl archive names {rootfile!r} as its score but does not contain it")
        if zf.getinfo(rootfile).file_size > MAX_XML_BYTES:
            raise ScoreError(
                f"{path}: {rootfile} would be larger than {MAX_XML_BYTES // (1024 * 1024)} MB once unpacked; "
                "refusing to read it (a damaged or malicious file?). Export the part alone and try again."
            )
        # the declared size can lie: _read_limited counts what is really inflated
        with zf.open(rootfile) as member:
            return _read_limited(member, MAX_XML_BYTES, f"{path}: {rootfile}")


def _check_xml(data: bytes, path: Path) -> str:
    import defusedxml.ElementTree as DET
    from defusedxml import DefusedXmlException

    try:
        root = DET.fromstring(data, forbid_dtd=False, forbid_entities=True, forbid_external=True)
    except DefusedXmlException as exc:
        raise ScoreError(
            f"{path}: refused: the XML declares entities or external references ({type(exc).__name__}), "
            "which MusicXML does not need and which can be used to attack a computer; re-export the score"
        ) from exc
    except Exception as exc:  # expat ParseError and friends
        raise ScoreError(f"{path}: not well-formed XML ({_brief(exc)}); is it a MusicXML file?") from exc
    tag = root.tag.rsplit("}", 1)[-1] if isinstance(root.tag, str) else ""
    if tag not in ("score-partwise", "score-timewise"):
        raise ScoreError(
            f"{path}: XML but not MusicXML (root element <{tag}>, expected <score-partwise> or "
            "<score-timewise>); export the score as MusicXML"
        )
    _check_meters(root, path)
    _check_size(root, tag, path)
    if tag == "score-timewise":
        # music21 reads partwise only; MusicXML defines the two as transpositions of each other
        return _timewise_to_partwise(root)
    for enc in ("utf-8", "utf-16"):
        try:
            text = data.decode(enc)
            break
        except UnicodeDecodeError:
            continue
    else:  # pragma: no cover - defusedxml already decoded it, so one of the above works
        raise ScoreError(f"{path}: cannot decode the XML text; save it as UTF-8")
    return text.lstrip("\ufeff")


def _local(el) -> str:
    return el.tag.rsplit("}", 1)[-1] if isinstance(el.tag, str) else ""


def _check_size(root, tag: str, path: Path) -> None:
    """Refuse, before music21 sees it, a score whose reading would take minutes (:mod:`takescribe.limits`).

    One pass over the checked tree: measures per part and in all, and notes.
    """
    per_part: dict[str, int] = {}
    if tag == "score-partwise":
        for part in root:
            if _local(part) == "part":
                per_part[part.get("id", "")] = sum(_local(m) == "measure" for m in part)
    else:
        for measure in root:
            if _local(measure) == "measure":
                for part in measure:
                    if _local(part) == "part":
                        per_part[part.get("id", "")] = per_part.get(part.get("id", ""), 0) + 1
    largest = max(per_part.values(), default=0)
    total = sum(per_part.values())
    if largest > LIMITS.max_part_measures or total > LIMITS.max_score_measures:
        raise ScoreError(
            f"{path}: {largest} measures in one part, {total} in all; at most {LIMITS.max_part_measures} a part and"
            f" {LIMITS.max_score_measures} in all are read (the MusicXML reader slows with the square of the length);"
            " export the passage you practise")
    notes = sum(1 for el in root.iter() if _local(el) == "note")
    check_note_count(notes, path, error=ScoreError)


def _check_meters(root, path: Path) -> None:
    """Refuse time signatures with more than 64 beats before music21 sees them.

    music21's time to lay out a bar grows faster than linearly with the number of beats
    (a 1000-beat bar takes about half a minute), so a damaged ``<beats>`` could hang the reader.
    """
    for el in root.iter():
        if not isinstance(el.tag, str) or el.tag.rsplit("}", 1)[-1] != "beats":
            continue
        # MusicXML 4.0: <beats> is a string that may be composite, e.g. "3+2"
        # (long digit strings are capped before int(), which refuses more than 4300 digits)
        total = sum(int(d) if len(d) <= 6 else 10**6 for d in re.findall(r"\d+", el.text or "")[:65])
        if total > 64:
            raise ScoreError(
                f"{path}: a time signature of more than 64 beats (<beats>{(el.text or '').strip()[:20]}</beats>); "
                "at most 64 beats in a bar are read; the file is probably damaged; re-export it"
            )


def _timewise_to_partwise(root) -> str:
    """Rewrite a score-timewise tree as score-partwise text (as the MusicXML 4.0 timepart.xsl does)."""
    import xml.etree.ElementTree as ET

    out = ET.Element("score-partwise", dict(root.attrib))
    part_ids: list[str] = []
    parts: dict[str, ET.Element] = {}
    for child in root:
        if child.tag != "measure":
            out.append(child)
            continue
        for part in child.findall("part"):
            pid = part.get("id", "")
            if pid not in parts:
                part_ids.append(pid)
                parts[pid] = ET.Element("part", {"id": pid})
            measure = ET.SubElement(parts[pid], "measure", dict(child.attrib))
            measure.extend(list(part))
    for pid in part_ids:
        out.append(parts[pid])
    return ET.tostring(out, encoding="unicode")


def _parse_musicxml(path: Path):
    from music21 import converter

    if path.suffix.lower() == ".mxl":
        data = _read_mxl(path)
    else:
        try:
            with open(path, "rb") as fh:
                data = _read_limited(fh, MAX_XML_BYTES, str(path))
        except OSError as exc:
            raise ScoreError(f"{path}: cannot be read ({exc.strerror}); check the path") from exc
    text = _check_xml(data, path)
    try:
        score = converter.parseData(text, format="musicxml")
    except Exception as exc:  # music21 raises many kinds on odd files
        raise ScoreError(f"{path}: music21 could not read this MusicXML ({_brief(exc)}); re-export it") from exc
    return score


def _group_parts(score) -> list[tuple[str, list]]:
    """Parts of a music21 score, with the staves of one instrument (PartStaff) grouped."""
    groups: list[tuple[str, list]] = []
    index: dict[str, int] = {}
    for p in score.parts:
        pid = str(p.id)
        m = re.match(r"^(.*)-Staff\d+$", pid)
        key = m.group(1) if m else pid
        if key in index:
            groups[index[key]][1].append(p)
        else:
            index[key] = len(groups)
            name = (p.partName or "").strip() or (p.partAbbreviation or "").strip() or f"Part {len(groups) + 1}"
            groups.append((name, [p]))
    return groups


def _expand(score, path: Path):
    try:
        return score.expandRepeats()
    except Exception as exc:  # music21 repeat expansion fails on some hand-made scores
        warnings.warn(
            f"{path}: could not expand the repeats ({_brief(exc)}); using the written order, "
            "so bar numbers follow the page and repeated bars appear once",
            ScoreWarning, stacklevel=4,
        )
        return score


def _musicxml_part(score, group_index: int, path: Path, written=None) -> _RawPart:
    from music21 import chord, key, meter, note, stream, tempo

    name, staves = _group_parts(score)[group_index]
    first = staves[0]
    measures = list(first.getElementsByClass(stream.Measure))
    measure_starts = [float(m.offset) for m in measures]
    if measures:
        last = measures[-1]
        bar_end = float(last.offset + max(last.duration.quarterLength, last.highestTime))
        measure_starts.append(bar_end)
    # music21 marks repeated bars with suffixes "a", "b"...; the label is the printed one
    printed_suffix = {}
    if written is not None:
        written_first = _group_parts(written)[group_index][1][0]
        printed_suffix = {m.number: (m.numberSuffix or "") for m in written_first.getElementsByClass(stream.Measure)}
    measure_labels = [f"{m.number}{printed_suffix.get(m.number, m.numberSuffix or '')}" for m in measures]

    # a printed metronome mark wins over a playback-only <sound tempo> at the same place:
    # the reference is timed at the *written* tempo
    tempo_marks: dict[float, tuple[int, float]] = {}
    for p in score.parts:
        for m in p.getElementsByClass(stream.Measure):
            for mm in m.recurse().getElementsByClass(tempo.MetronomeMark):
                try:
                    bpm = mm.getQuarterBPM()
                except (ArithmeticError, ValueError, TypeError):  # a mark of 0 per minute divides by zero
                    bpm = float("nan")
                if bpm is not None and not (np.isfinite(bpm) and bpm > 0):
                    warnings.warn(
                        f"{path}: ignoring a tempo mark of {mm.number} per minute in bar {m.number} "
                        "(not a positive number)", ScoreWarning, stacklevel=4,
                    )
                    bpm = None
                if bpm:
                    q = round(float(m.offset + mm.getOffsetInHierarchy(m)), 9)
                    printed = 0 if (mm.number is not None and mm.numberImplicit is False) else 1
                    if q not in tempo_marks or printed < tempo_marks[q][0]:
                        tempo_marks[q] = (printed, float(bpm))
    time_sigs = []
    key_fifths, mode = 0, None
    found_key = False
    for m in measures:
        for ts in m.getElementsByClass(meter.TimeSignature):
            time_sigs.append((float(m.offset + ts.offset), int(ts.numerator), int(ts.denominator)))
        if not found_key:
            for ks in m.recurse().getElementsByClass(key.KeySignature):
                key_fifths = int(ks.sharps)
                mode = getattr(ks, "mode", None) if isinstance(ks, key.Key) else None
                found_key = True
                break

    instrument = first.getInstrument(returnDefault=False)
    inst_name = (getattr(instrument, "instrumentName", None) or name) if instrument else name
    program = getattr(instrument, "midiProgram", None) if instrument else None

    raw: list[_RawNote] = []
    for staff_number, staff in enumerate(staves, start=1):
        for m in staff.getElementsByClass(stream.Measure):
            containers = [(int(v.id) if str(v.id).isdigit() else i + 1, v, float(v.offset))
                          for i, v in enumerate(m.voices)]
            containers.append((1, m, 0.0))
            for voice_number, container, c_off in containers:
                for el in container.getElementsByClass((note.Note, chord.Chord)):
                    if isinstance(el, (note.Unpitched,)) or el.__class__.__name__ == "PercussionChord":
                        continue
                    q = float(m.offset) + c_off + float(el.offset)
                    dur = float(el.quarterLength)
                    is_grace = bool(el.duration.isGrace)
                    members = list(el.notes) if isinstance(el, chord.Chord) else [el]
                    for k, n in enumerate(members):
                        tie = n.tie if n.tie is not None else (el.tie if isinstance(el, chord.Chord) else None)
                        spelling = n.pitch.nameWithOctave.replace("-", "b")
                        r = _RawNote(pitch=int(round(n.pitch.ps)), q=q, dur=dur, staff=staff_number,
                                     voice=voice_number, spelling=spelling, is_grace=is_grace,
                                     tie=tie.type if tie is not None else None)
                        if is_grace and k > 0:
                            r.chord_with_previous = True
                        raw.append(r)
    raw = [r for r in raw if 0 <= r.pitch <= 127]
    raw = _merge_ties([r for r in raw if not r.is_grace]) + [r for r in raw if r.is_grace]
    raw = _place_graces(raw)
    return _RawPart(
        name=name, instrument_name=str(inst_name), midi_program=int(program) if program is not None else None,
        notes=raw, tempo_map=sorted((q, b) for q, (_, b) in tempo_marks.items()), time_signatures=time_sigs,
        measure_starts=measure_starts, measure_labels=measure_labels, key_fifths=key_fifths, mode=mode,
    )


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


# --------------------------------------------------------------------------
# public entry points
# --------------------------------------------------------------------------
def _check_path(path) -> Path:
    if not isinstance(path, (str, Path)) and not hasattr(path, "__fspath__"):
        raise TypeError(f"path must be a file path, got {type(path).__name__}")
    path = Path(path)
    if not path.exists():
        raise ScoreError(f"{path}: no such file; check the path to the reference part")
    if path.is_dir():
        raise ScoreError(f"{path}: is a folder; give the MusicXML (.musicxml, .xml, .mxl) or MIDI (.mid) file")
    suffix = path.suffix.lower()
    if suffix not in MUSICXML_SUFFIXES + MIDI_SUFFIXES:
        raise ScoreError(
            f"{path}: unknown reference format {suffix or '(no suffix)'}; use MusicXML "
            "(.musicxml, .xml, .mxl) or MIDI (.mid, .midi)"
        )
    return path


def list_parts(path) -> list[str]:
    """Names of the parts in a MusicXML or MIDI file, in score order.

    Parameters
    ----------
    path : path-like
        ``.musicxml``, ``.xml``, ``.mxl``, ``.mid`` or ``.midi``.

    Returns
    -------
    list of str
        One name per part (the two staves of a piano are one part). MIDI tracks
        without pitched notes are left out; unnamed tracks are ``"Track N"``.

    Raises
    ------
    ScoreError
        If the file cannot be read safely or is not a score.
    """
    path = _check_path(path)
    if path.suffix.lower() in MIDI_SUFFIXES:
        return [p.name for p in _midi_candidates(path)[0]]
    return [name for name, _ in _group_parts(_parse_musicxml(path))]


@dataclass(frozen=True)
class LoadedPart:
    """A part read once: its notes in performance order and, for MusicXML, the notation.

    Attributes
    ----------
    reference : Reference
    written : music21.stream.Score or None
        The chosen part alone (its staves grouped), in written order, as parsed from the
        checked XML; None for MIDI. Later stages (the report) take it from here instead of
        reading the file again. Treat it as read-only: copy it before changing it.
    title : str
        The score's title (work or movement title) when the file gives one, else "".
    """

    reference: Reference
    written: object = None
    title: str = ""


def load_part(path, *, part: int | str | None = None) -> LoadedPart:
    """:func:`load_reference` that also keeps the parsed notation of the part (one read, same checks)."""
    path = _check_path(path)
    if path.suffix.lower() in MIDI_SUFFIXES:
        return LoadedPart(load_reference(path, part=part))
    from music21 import stream

    score = _parse_musicxml(path)
    groups = _group_parts(score)
    if not groups:
        raise ScoreError(f"{path}: the MusicXML file has no parts; export the score with its parts")
    index = _select([name for name, _ in groups], part, path)
    reference = _reference_from_score(score, index, path)
    written = stream.Score()
    for staff in groups[index][1]:
        written.insert(0, staff)
    metadata = getattr(score, "metadata", None)
    title = ""
    if metadata is not None:
        title = str(metadata.title or metadata.movementName or "").strip()
    return LoadedPart(reference, written, title)


def _reference_from_score(score, index: int, path: Path) -> Reference:
    header, score = _header_at_sounding_pitch(score, index)
    expanded = _expand(score, path)
    if len(_group_parts(expanded)) != len(_group_parts(score)):
        expanded = score
    return replace(_build_reference(_musicxml_part(expanded, index, path, written=score), path), **header)


def _header_at_sounding_pitch(score, index: int):
    """Title, composer and the chosen part's transposition; the score at sounding pitch
    (music21 moves the notes and key signatures of parts read with ``<transpose>``)."""
    md = score.metadata
    title = str((md.title or md.movementName or "") if md is not None else "").strip()
    composer = str((md.composer or "") if md is not None else "").strip()
    # a library's placeholders are no title (music21 writes them when a score has none)
    title = "" if title == "Music21 Fragment" else title
    composer = "" if composer == "Music21" else composer
    inst = _group_parts(score)[index][1][0].getInstrument(returnDefault=False)
    interval = getattr(inst, "transposition", None) if inst is not None else None
    semitones = int(interval.semitones) if interval is not None else 0
    if any(p.atSoundingPitch is False for p in score.parts):
        score = score.toSoundingPitch()
    return {"title": title, "composer": composer, "transposition": semitones}, score


def load_reference(path, *, part: int | str | None = None) -> Reference:
    """Load one part of a MusicXML or MIDI score in performance order.

    Parameters
    ----------
    path : path-like
        ``.musicxml``, ``.xml``, ``.mxl`` (read with music21) or ``.mid``/``.midi`` (read with mido).
    part : str, int or None
        Part name (case-insensitive) or 0-based number (an int or a string of
        digits). ``None`` takes the first part, with a :class:`ScoreWarning`
        when there are several.

    Returns
    -------
    Reference

    Raises
    ------
    ScoreError
        File missing, unreadable, unsafe (XML entities, zip bomb), not MusicXML
        or MIDI, unknown part (the message lists the parts), or a part with no notes.

    Examples
    --------
    >>> from music21 import corpus
    >>> ref = load_reference(corpus.getWork("bach/bwv66.6"), part="Soprano")  # doctest: +SKIP
    >>> ref.notes[0].spelling  # doctest: +SKIP
    'C#5'
    """
    path = _check_path(path)
    if path.suffix.lower() in MIDI_SUFFIXES:
        parts, tempo_map, time_sigs, fifths, mode = _midi_candidates(path)
        chosen = parts[_select([p.name for p in parts], part, path)]
        for r in chosen.notes:
            r.spelling = _spell(r.pitch, fifths)
        if not time_sigs:
            time_sigs = [(0.0, 4, 4)]  # SMF default when no time signature is given
        end_q = max(r.q + r.dur for r in chosen.notes)
        starts, labels = _measure_grid(time_sigs if time_sigs[0][0] <= _EPS else [(0.0, 4, 4)] + time_sigs, end_q,
                                       source=path)
        chosen.tempo_map = tempo_map
        chosen.time_signatures = time_sigs
        chosen.measure_starts = starts
        chosen.measure_labels = labels
        chosen.key_fifths = fifths
        chosen.mode = mode
        return _build_reference(chosen, path)

    score = _parse_musicxml(path)
    names = [name for name, _ in _group_parts(score)]
    if not names:
        raise ScoreError(f"{path}: the MusicXML file has no parts; export the score with its parts")
    return _reference_from_score(score, _select(names, part, path), path)
