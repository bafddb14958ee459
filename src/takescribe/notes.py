"""Note events: the value that flows from note tracking to export, comparison and evaluation.

Conventions
-----------
- Times are seconds from the start of the take (``onset``, ``offset``).
- Pitches are MIDI note numbers (A4 = 69 = 440 Hz, ISO 16); Hz appear only at
  the mir_eval boundary (:mod:`takescribe.evaluate`).
- Velocity is a MIDI velocity 1..127.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Iterable, Sequence

import numpy as np

from .errors import InputError

__all__ = ["Note", "notes_to_arrays", "arrays_to_notes", "sort_notes", "validate_notes"]


@dataclass(frozen=True, slots=True, order=True)
class Note:
    """One note event.

    Parameters
    ----------
    onset : float
        Start time in seconds (>= 0).
    offset : float
        End time in seconds (> onset).
    pitch : int
        MIDI note number, 0..127.
    velocity : int
        MIDI velocity, 1..127 (default 80).
    """

    onset: float
    offset: float
    pitch: int
    velocity: int = 80

    def __post_init__(self) -> None:
        if not (np.isfinite(self.onset) and np.isfinite(self.offset)):
            raise InputError(f"note times must be finite, got onset={self.onset}, offset={self.offset}")
        if self.onset < 0:
            raise InputError(f"note onset must be >= 0 s, got {self.onset}")
        if not self.offset > self.onset:
            raise InputError(
                f"note offset must be after its onset, got onset={self.onset}, offset={self.offset}"
            )
        if not isinstance(self.pitch, (int, np.integer)) or not 0 <= int(self.pitch) <= 127:
            raise InputError(
                f"pitch must be a MIDI note number in range 0..127, got {self.pitch!r}"
            )
        if not isinstance(self.velocity, (int, np.integer)) or not 1 <= int(self.velocity) <= 127:
            raise InputError(f"velocity must be in range 1..127, got {self.velocity!r}")
        # store plain Python numbers so notes compare, hash and serialise predictably
        object.__setattr__(self, "onset", float(self.onset))
        object.__setattr__(self, "offset", float(self.offset))
        object.__setattr__(self, "pitch", int(self.pitch))
        object.__setattr__(self, "velocity", int(self.velocity))

    @property
    def duration(self) -> float:
        """Length in seconds."""
        return self.offset - self.onset


def sort_notes(notes: Iterable[Note]) -> list[Note]:
    """Notes in a deterministic order: by onset, then pitch, then offset, then velocity."""
    return sorted(notes, key=lambda n: (n.onset, n.pitch, n.offset, n.velocity))


def notes_to_arrays(notes: Sequence[Note]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Split notes into ``intervals (n, 2)`` seconds, ``pitches (n,)`` MIDI and ``velocities (n,)``."""
    if len(notes) == 0:
        return np.zeros((0, 2)), np.zeros(0), np.zeros(0, dtype=int)
    intervals = np.array([[n.onset, n.offset] for n in notes], dtype=float)
    pitches = np.array([n.pitch for n in notes], dtype=float)
    velocities = np.array([n.velocity for n in notes], dtype=int)
    return intervals, pitches, velocities


def arrays_to_notes(intervals: np.ndarray, pitches: np.ndarray, velocities: np.ndarray | None = None) -> list[Note]:
    """Inverse of :func:`notes_to_arrays`; pitches are rounded to the nearest MIDI number."""
    intervals = np.asarray(intervals, dtype=float).reshape(-1, 2)
    pitches = np.asarray(pitches)
    if velocities is None:
        velocities = np.full(len(pitches), 80)
    return [
        Note(float(a), float(b), int(round(float(p))), int(v))
        for (a, b), p, v in zip(intervals, pitches, velocities)
    ]


def validate_notes(notes: object, *, name: str = "notes") -> list[Note]:
    """Check that ``notes`` is a sequence of :class:`Note`; return it as a list."""
    if isinstance(notes, (str, bytes)) or not hasattr(notes, "__iter__"):
        raise TypeError(f"{name} must be a sequence of Note, got {type(notes).__name__}")
    out = list(notes)
    for i, n in enumerate(out):
        if not isinstance(n, Note):
            raise TypeError(f"{name}[{i}] must be a Note, got {type(n).__name__}")
    return out
