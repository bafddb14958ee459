"""Command line: parses arguments, calls :mod:`takescribe.pipeline`, reports; nothing else.

Exit codes: 0 success, 1 bad input, 2 usage error, 3 internal error, 4 output
refused (exists without ``--force``, not writable, disk full), 130 interrupted by
SIGINT (Ctrl-C), 143 by SIGTERM, 141 when the reader of the output went away
(``takescribe evaluate ... | head``), quietly, as a program ended by SIGPIPE.
"""

from __future__ import annotations

import argparse
import errno
import os
import signal
import sys
import time
import traceback
import warnings
from pathlib import Path

from . import __version__
from .errors import EXIT_INTERNAL, EXIT_OK, EXIT_USAGE, Interrupted, TakescribeError
from .interrupts import arm_faults, handle_signals, signal_name
from .safeio import committed_outputs, scratch_folder, write_error

__all__ = ["main", "build_parser"]

PRIVACY_NOTE = "All processing happens on this computer; nothing is uploaded."


class Progress:
    """Stage messages on stderr with the elapsed time (silent with ``--quiet``)."""

    def __init__(self, quiet: bool = False) -> None:
        self.quiet = quiet
        self.start = time.perf_counter()

    def __call__(self, message: str) -> None:
        if not self.quiet:
            print(f"takescribe [{time.perf_counter() - self.start:6.1f} s] {message}", file=sys.stderr, flush=True)


def _add_room(p: argparse.ArgumentParser) -> None:
    p.add_argument("--room", choices=("dry", "auto", "reverberant"), default="dry",
                   help="reverberant: remove the room's reverberation before transcribing (WPE); auto: only when the"
                        " take sounds strongly reverberant; dry: never (default)")


def _add_common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--force", action="store_true", help="overwrite existing output files")
    p.add_argument("--quiet", action="store_true", help="no progress messages")
    p.add_argument("--debug", action="store_true", help="show the full traceback on errors")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="takescribe",
        description="Transcribe instrument takes into draft MIDI/MusicXML and compare them with the part. "
        + PRIVACY_NOTE,
    )
    parser.add_argument("--version", action="version", version=f"takescribe {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    p = sub.add_parser("transcribe", help="turn a take into a draft MIDI file (and MusicXML, note list)")
    p.add_argument("take", help="audio file of the take (WAV, FLAC, OGG, ...)")
    p.add_argument("-o", "--output", dest="midi", help="draft MIDI file to write (.mid)")
    p.add_argument("--notes", help="also write the notes as MAPS-style text (onset, offset, MIDI pitch)")
    p.add_argument("--musicxml", help="also write a quantized MusicXML draft")
    p.add_argument("--instrument", help="GM program number or name (default: the part's, else piano)")
    p.add_argument("--score", help="reference part (MusicXML, .mxl or MIDI) to guide the transcription")
    p.add_argument("--part", help="part of --score by name or 0-based index")
    p.add_argument("--dictionary", help="calibrated dictionary from 'takescribe dictionary learn'")
    p.add_argument("--tempo", type=float, help="quarter notes per minute for the notation (default: estimated)")
    p.add_argument("--time-signature", help="e.g. 3/4 (default: the part's, else estimated)")
    p.add_argument("--grid", help="force one quantization grid, e.g. 16th, 8th, 8th-triplet")
    p.add_argument("--midi-type", type=int, choices=(0, 1), default=1, help="Standard MIDI File format (default 1)")
    p.add_argument("--quantized-midi", action="store_true",
                   help="write the notated rhythm to the MIDI file (default: the performed timing)")
    p.set_defaults(usage_error=p.error)
    _add_room(p)
    _add_common(p)

    p = sub.add_parser("evaluate", help="score a note list against a reference note list (mir_eval conventions)")
    p.add_argument("estimate", help="notes to score: MIDI, MusicXML or MAPS-style text")
    p.add_argument("reference", help="ground truth: MIDI, MusicXML or MAPS-style text")
    p.add_argument("--json", help="also write the scores as JSON")
    p.add_argument("--sustain", action="store_true", help="MIDI: let the sustain pedal extend note offsets")
    p.add_argument("--part", help="MusicXML/MIDI reference: part by name or index")
    _add_common(p)

    p = sub.add_parser("compare", help="compare a take with its part and write a practice report")
    p.add_argument("take", help="audio file of the take")
    p.add_argument("part_file", metavar="part", help="reference part (MusicXML, .mxl or MIDI)")
    p.add_argument("-o", "--output", required=True, help="report folder (created if missing)")
    p.add_argument("--part", dest="part_name", help="part by name or 0-based index")
    p.add_argument("--instrument", help="GM program number or name (default: the part's)")
    p.add_argument("--dictionary", help="calibrated dictionary from 'takescribe dictionary learn'")
    p.add_argument("--timing-tolerance", type=float, default=0.1,
                   help="seconds off the player's own pulse before a note counts as early/late (default 0.1)")
    p.add_argument("--duration-tolerance", type=float, default=0.5,
                   help="relative length difference before a note counts as held short/long (default 0.5)")
    p.add_argument("--allow-mismatch", action="store_true", help="compare even if the take does not seem to be the part")
    p.add_argument("--student", help="the player's name for the report's header (default: the take's artist tag)")
    p.add_argument("--title", help="the piece for the report's header (default: the score's title)")
    _add_room(p)
    _add_common(p)

    p = sub.add_parser("batch", help="transcribe every take in a folder (and compare those with a matching part)")
    p.add_argument("input_dir", help="folder of takes (audio files)")
    p.add_argument("-o", "--output", required=True, help="results folder, one subfolder per take (created if missing)")
    p.add_argument("--score-dir", dest="scores", metavar="DIR",
                   help="folder of parts: a part with the same name as a take is compared with it")
    p.add_argument("--instrument", help="GM program number or name of every take (default: the part's; a take with"
                   " neither is transcribed as piano, and the summary says so)")
    p.add_argument("--jobs", type=int, help="worker processes (default: the number of CPUs)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="run on a Dask distributed cluster (e.g. tcp://host:8786)")
    _add_common(p)

    p = sub.add_parser("dictionary", help="calibrated pitch templates for your own instrument")
    dsub = p.add_subparsers(dest="dictionary_command", metavar="ACTION")
    dsub.required = True
    q = dsub.add_parser("learn", help="learn templates from a recording of a known passage (e.g. a chromatic scale)")
    q.add_argument("recording", help="audio file of the passage")
    q.add_argument("--score", required=True, help="the passage's part (MusicXML or MIDI)")
    q.add_argument("--part", help="part by name or index")
    q.add_argument("--instrument", help="GM program number or name (default: the part's)")
    q.add_argument("-o", "--output", required=True, help="dictionary file to write (.npz)")
    _add_common(q)

    p = sub.add_parser("demo", help="try takescribe on two bundled student takes (no recording needed)")
    p.add_argument("-o", "--output", default="demo-output", help="folder for the demo reports (default demo-output)")
    _add_common(p)
    _add_desk_commands(sub)
    return parser


def _add_desk_commands(sub) -> None:
    """The ``desk`` and ``progress`` subcommands (see :mod:`takescribe.desk`)."""
    p = sub.add_parser("desk", help="open the teacher's desk in the browser (a local app; nothing leaves this computer)")
    p.add_argument("--library", default="~/takescribe-library", help="library folder (default ~/takescribe-library)")
    p.add_argument("--port", type=int, default=8765, help="port on 127.0.0.1 (default 8765; 0 picks a free one)")
    p.add_argument("--database", metavar="URL", help="database URL (default: SQLite in the library; or postgresql://...)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="run the analyses on a Dask cluster (e.g. tcp://host:8786)")
    p.add_argument("--workers", type=int, help="analyses at once on this computer (default: one per CPU)")
    p.add_argument("--watch", metavar="DIR", help="also add new recordings copied into this folder")
    p.add_argument("--no-browser", action="store_true", help="print the link instead of opening the browser")
    p.add_argument("--no-demo", action="store_true", help="start a new library empty (default: with the demo students)")
    _add_common(p)

    p = sub.add_parser("progress", help="progress across takes from a folder of report folders (HTML and JSON)")
    p.add_argument("reports", help="folder holding one report folder per take ('takescribe compare -o' output)")
    p.add_argument("-o", "--output", required=True, help="HTML page to write")
    p.add_argument("--json", help="also write the progress as JSON")
    _add_common(p)


def _run_desk(args: argparse.Namespace) -> int:
    import webbrowser

    from .desk import start_desk

    desk = start_desk(args.library, port=args.port, url=args.database, scheduler=args.scheduler,
                      workers=args.workers, watch=args.watch, seed=not args.no_demo)
    print(f"takescribe desk: {desk.url}\n(library {desk.library.root}; stop with Ctrl+C; {PRIVACY_NOTE})", flush=True)
    if not args.no_browser:
        webbrowser.open(desk.url)
    try:
        desk.thread.join()
    finally:
        desk.stop()
    return EXIT_OK


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    print(f"takescribe: warning: {message}", file=sys.stderr)


def _run(args: argparse.Namespace, progress: Progress) -> int:
    from .jobs import pipeline

    if args.command == "transcribe":
        out = pipeline.transcribe_file(
            args.take, midi_path=args.midi, notes_path=args.notes, musicxml_path=args.musicxml,
            instrument=args.instrument, score_path=args.score, part=args.part, dictionary_path=args.dictionary,
            tempo=args.tempo, time_signature=args.time_signature, grid=args.grid, midi_type=args.midi_type,
            quantized_midi=args.quantized_midi, force=args.force, progress=progress, room=args.room,
        )
        print(f"{len(out.transcription.notes)} notes; wrote " + ", ".join(str(p) for p in out.written))
        return EXIT_OK
    if args.command == "evaluate":
        scores = pipeline.evaluate_files(args.estimate, args.reference, json_path=args.json, sustain=args.sustain,
                                         part=args.part, force=args.force)
        print(pipeline.format_scores(scores))
        return EXIT_OK
    if args.command == "compare":
        out = pipeline.compare_file(
            args.take, args.part_file, args.output, part=args.part_name, instrument=args.instrument,
            dictionary_path=args.dictionary, timing_tolerance=args.timing_tolerance,
            duration_tolerance=args.duration_tolerance, allow_mismatch=args.allow_mismatch, force=args.force,
            progress=progress, student=args.student, title=args.title, room=args.room,
        )
        print(pipeline.format_comparison_summary(out))
        return EXIT_OK
    if args.command == "batch":
        from .jobs.batch import run_batch

        summary = run_batch(args.input_dir, args.output, score_dir=args.scores, jobs=args.jobs,
                            scheduler=args.scheduler, force=args.force, progress=not args.quiet,
                            instrument=args.instrument)
        print(summary.table())
        return summary.exit_code
    if args.command == "dictionary" and args.dictionary_command == "learn":
        learned = pipeline.learn_dictionary_file(args.recording, args.score, args.output, part=args.part,
                                                 instrument=args.instrument, force=args.force, progress=progress)
        print(f"wrote {args.output}: {learned.n_pitches} templates for {learned.instrument}")
        return EXIT_OK
    if args.command == "demo":
        from .jobs import demo

        print(demo.format_demo_summary(demo.run_demo(args.output, force=args.force, progress=progress)))
        return EXIT_OK
    if args.command == "desk":
        return _run_desk(args)
    if args.command == "progress":
        from .desk.progress import write_progress

        progress = write_progress(args.reports, args.output, json_path=args.json, force=args.force)
        print(f"{len(progress.takes)} takes; wrote {args.output}" + (f" and {args.json}" if args.json else ""))
        return EXIT_OK
    raise AssertionError(f"unhandled command {args.command}")


def _interrupted_message(exc: KeyboardInterrupt) -> str:
    """What an interruption left on disk, as the run knows it."""
    name = signal_name(getattr(exc, "signum", signal.SIGINT))
    note = getattr(exc, "note", None)
    if note is None:
        kept = committed_outputs()
        note = ("outputs finished before it are kept: " + ", ".join(str(p) for p in kept) if kept else
                "nothing was written: no partial output and no temporary file is left")
    return f"takescribe: interrupted by {name}; {note}"


def _quiet_broken_pipe() -> int:
    """The reader of stdout went away: stop quietly, as a program ended by SIGPIPE does."""
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())  # Python docs, "Note on SIGPIPE": no error at exit
    except (OSError, ValueError):
        pass
    return 128 + signal.SIGPIPE


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``takescribe`` console script; returns the exit code."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse: usage errors exit 2, --help/--version exit 0
        return int(exc.code) if isinstance(exc.code, int) else EXIT_USAGE
    if args.command == "transcribe" and not (args.midi or args.notes or args.musicxml):
        # a missing output is a usage error (exit 2), reported before any work
        try:
            args.usage_error("nothing to write: give -o draft.mid, --notes draft.txt or --musicxml draft.musicxml")
        except SystemExit as exc:
            return int(exc.code) if isinstance(exc.code, int) else EXIT_USAGE
    progress = Progress(quiet=getattr(args, "quiet", False))
    debug = getattr(args, "debug", False)
    previous = warnings.showwarning
    warnings.showwarning = _show_warning
    arm_faults()
    try:
        with handle_signals(), scratch_folder():
            return _run(args, progress)
    except BrokenPipeError:
        return _quiet_broken_pipe()
    except TakescribeError as exc:
        if debug:
            traceback.print_exc()
        print(f"takescribe: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt as exc:
        print(_interrupted_message(exc), file=sys.stderr)
        return exc.exit_code if isinstance(exc, Interrupted) else 128 + signal.SIGINT
    except OSError as exc:
        if exc.errno not in (errno.ENOSPC, errno.EDQUOT, errno.EROFS):
            return _internal_error(exc, debug)
        if debug:
            traceback.print_exc()
        error = write_error(exc.filename or "output", exc)
        print(f"takescribe: error: {error}", file=sys.stderr)
        return error.exit_code
    except Exception as exc:  # a bug: say so plainly, keep the traceback behind --debug
        return _internal_error(exc, debug)
    finally:
        warnings.showwarning = previous


def _internal_error(exc: BaseException, debug: bool) -> int:
    """A bug: say so plainly, keep the traceback behind --debug."""
    if debug:
        traceback.print_exc()
    print(f"takescribe: internal error ({type(exc).__name__}: {exc}); rerun with --debug and report it",
          file=sys.stderr)
    return EXIT_INTERNAL


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
