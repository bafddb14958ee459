"""Typed errors of takescribe: one root, one subclass per kind of failure.

Every subclass also inherits the matching builtin, so ``except ValueError``
and ``except OSError`` keep working for callers who do not know our names.

Exit codes used by the command line (documented in the README):

====  ==========================================================
code  meaning
====  ==========================================================
0     success
1     bad input (a file that cannot be read, a score that does not
      fit the take, an option value out of range)
2     usage error (unknown option, missing argument; argparse)
3     internal error (a bug: please report it with ``--debug``)
4     output refused (the file exists and ``--force`` was not given,
      or the folder cannot be written, or the disk is full)
130   interrupted by SIGINT (Ctrl-C)
143   interrupted by SIGTERM
====  ==========================================================
"""

from __future__ import annotations

__all__ = [
    "TakescribeError",
    "InputError",
    "AudioError",
    "ScoreError",
    "NoteListError",
    "DictionaryError",
    "OutputError",
    "EXIT_OK",
    "EXIT_BAD_INPUT",
    "EXIT_USAGE",
    "EXIT_INTERNAL",
    "EXIT_OUTPUT",
    "TakescribeWarning",
    "AudioWarning",
    "ScoreWarning",
    "AlignmentWarning",
    "NotationWarning",
    "ComparisonWarning",
    "ReportWarning",
    "EvaluationWarning",
    "Interrupted",
]

EXIT_OK = 0
EXIT_BAD_INPUT = 1
EXIT_USAGE = 2
EXIT_INTERNAL = 3
EXIT_OUTPUT = 4


class TakescribeError(Exception):
    """Root of every error takescribe raises on purpose."""

    exit_code = EXIT_BAD_INPUT


class InputError(TakescribeError, ValueError):
    """A value or file given by the user cannot be used."""


class AudioError(InputError):
    """An audio file is missing, unreadable, corrupt or unusable."""


class ScoreError(InputError):
    """A reference part (MusicXML or MIDI) is missing, unreadable or unusable."""


class NoteListError(InputError):
    """A note list (MAPS-style text, MIDI) cannot be read."""


class DictionaryError(InputError):
    """A pitch-template dictionary file is unreadable or does not fit."""


class OutputError(TakescribeError, OSError):
    """An output cannot be written (exists without ``--force``, no permission)."""

    exit_code = EXIT_OUTPUT


# --------------------------------------------------------------------------- warnings
# One tree: ``warnings.filterwarnings("ignore", category=TakescribeWarning)`` silences every
# warning the package gives on purpose, and each stage's class narrows it.


class TakescribeWarning(UserWarning):
    """Root of every warning takescribe gives on purpose (something the user should know)."""


class AudioWarning(TakescribeWarning):
    """The take can be used, but something in it limits what can be heard (rate, level, clipping)."""


class ScoreWarning(TakescribeWarning):
    """A part or note file can be used, but some of it was skipped or interpreted (ornaments, percussion)."""


class AlignmentWarning(TakescribeWarning):
    """The part and the take line up poorly (low confidence, pauses, jumps)."""


class NotationWarning(TakescribeWarning):
    """The draft notation had to simplify (meter guessed, values forced to the grid)."""


class ComparisonWarning(TakescribeWarning):
    """The comparison could judge less than usual (no notes heard, kinds not judged)."""


class ReportWarning(TakescribeWarning):
    """The report had to fall back (audio embedded at a lower quality, part rebuilt from notes)."""


class EvaluationWarning(TakescribeWarning):
    """A metric is undefined for the inputs (an empty reference or estimate)."""


class Interrupted(KeyboardInterrupt):
    """SIGINT or SIGTERM arrived: the run stops, cleaning up as it unwinds.

    A :class:`KeyboardInterrupt` (not an :class:`Exception`), so no ``except Exception``
    of a job swallows it; the exit code is the shell's ``128 + signal number``.

    Attributes
    ----------
    signum : int
    note : str or None
        What is on disk after the interruption, set by the job that knows it.
    """

    def __init__(self, signum: int, note: str | None = None) -> None:
        super().__init__(signum)
        self.signum = int(signum)
        self.note = note

    @property
    def exit_code(self) -> int:
        return 128 + self.signum
