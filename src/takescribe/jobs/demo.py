"""The bundled demo: two students of an invented music school, compared with their parts.

``takescribe demo -o demo-output`` runs the whole pipeline on takes that ship with the
package, so a new user sees a practice report before recording anything.

The scenario is invented: the *Quillfield Community Music School* does not exist, its
students are known only by invented first names and both pieces were written for the demo
(``fixtures/build_demo.py`` rebuilds the bundle). Each take has a handful of planted
mistakes (a wrong note, a missed note, a hesitation, a rushed passage, and for the violin a
stray extra note), listed in the bundle's ``planted.json``.

Bundle (package data, ``takescribe/data/demo/``)
------------------------------------------------
``scenario.json`` names the school and the students; per student folder (``piano/``,
``violin/``): ``take.flac`` (mono 22050 Hz), ``part.musicxml`` (the reference part),
``played.txt`` (what was played, MAPS-style ground truth) and ``planted.json`` (the planted
mistakes; format in ``fixtures/build_demo.py``).

Output
------
Per student folder in ``output_dir``: the report folder contents of
:func:`takescribe.pipeline.compare_file` (``report.html``, ``findings.json``,
``annotated.musicxml``, ``take.mid``) plus ``draft.mid`` (the transcription, performed
timing) and ``draft.musicxml`` (the transcription notated with the part as guide, as
``takescribe transcribe take --score part --musicxml draft.musicxml`` writes it).
"""

from __future__ import annotations

import contextlib
import json
import shutil
import tempfile
import time
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from typing import Callable, Iterator

from ..errors import InputError
from ..notation import notate, write_musicxml
from ..jobs.pipeline import REPORT_FILES, compare_file, format_findings_counts, load_take, write_draft_midi
from ..safeio import check_writable, ensure_folder

__all__ = ["DEMO_STUDENTS", "DRAFT_FILES", "DemoStudent", "DemoResult", "run_demo", "demo_bundle",
           "load_scenario", "format_demo_summary", "CAUTION"]

DEMO_STUDENTS = ("piano", "violin")
DRAFT_FILES = ("draft.mid", "draft.musicxml")
BUNDLE_FILES = ("take.flac", "part.musicxml", "played.txt", "planted.json")
CAUTION = "Findings support a teacher's judgement; they are not a grade."


@dataclass(frozen=True)
class DemoStudent:
    """What the demo found for one student.

    Attributes
    ----------
    folder : str
        ``"piano"`` or ``"violin"`` (also the output sub-folder).
    student, instrument, piece : str
        Invented first name, instrument name, piece title.
    notes_in_part, notes_played_correctly : int
        From the comparison summary.
    counts : dict
        Findings per kind (only kinds with at least one finding).
    findings : tuple of dict
        The findings as in ``findings.json``.
    report_html : Path
    written : tuple of Path
        Every file written for this student.
    duration : float
        Seconds of audio in the take.
    seconds : float
        Wall-clock seconds the analysis took.
    """

    folder: str
    student: str
    instrument: str
    piece: str
    notes_in_part: int
    notes_played_correctly: int
    counts: dict
    findings: tuple
    report_html: Path
    written: tuple
    duration: float
    seconds: float


@dataclass(frozen=True)
class DemoResult:
    """What :func:`run_demo` produced: the school, one :class:`DemoStudent` each, the folder."""

    school: str
    output_dir: Path
    students: tuple


@contextlib.contextmanager
def demo_bundle() -> Iterator[Path]:
    """The folder of the bundled demo files, as a real path for the duration of the block.

    The package is normally installed as plain files, and the folder is used in place;
    from a zipped installation the bundle is copied to a temporary folder first.

    Raises
    ------
    InputError
        When the bundle is missing from the installation (a packaging mistake).
    """
    root = resources.files("takescribe") / "data" / "demo"
    if isinstance(root, Path):
        _check_bundle(root)
        yield root
        return
    with tempfile.TemporaryDirectory(prefix="takescribe-demo-") as tmp:
        out = Path(tmp)
        for name in ("scenario.json",) + tuple(f"{s}/{f}" for s in DEMO_STUDENTS for f in BUNDLE_FILES):
            src = root.joinpath(*name.split("/"))
            if not src.is_file():
                raise InputError(f"demo bundle: {name} is missing from this installation of takescribe;"
                                 " reinstall the package (pip install --force-reinstall takescribe)")
            (out / name).parent.mkdir(parents=True, exist_ok=True)
            with src.open("rb") as fi, open(out / name, "wb") as fo:
                shutil.copyfileobj(fi, fo)
        yield out


def _check_bundle(root: Path) -> None:
    for name in ("scenario.json",) + tuple(f"{s}/{f}" for s in DEMO_STUDENTS for f in BUNDLE_FILES):
        if not (root / name).is_file():
            raise InputError(f"demo bundle: {root / name} is missing from this installation of takescribe;"
                             " reinstall the package (pip install --force-reinstall takescribe)")


def load_scenario(bundle: Path) -> dict:
    """``scenario.json`` of a bundle folder (see :func:`demo_bundle`)."""
    path = Path(bundle) / "scenario.json"
    try:
        return json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError) as exc:
        raise InputError(f"{path}: cannot read the demo scenario ({exc}); reinstall takescribe") from exc


def run_demo(output_dir, *, force: bool = False, progress: Callable[[str], None] | None = None) -> DemoResult:
    """Compare both demo students' takes with their parts and write reports and drafts.

    Parameters
    ----------
    output_dir : path-like
        Folder to write into (created when missing); gets ``piano/`` and ``violin/``.
    force : bool
        Overwrite files of an earlier run.
    progress : callable, optional
        Called with short stage messages.

    Returns
    -------
    DemoResult

    Raises
    ------
    OutputError
        When an output file exists and ``force`` is false (checked before any work).
    InputError
        When the bundled files are missing from the installation.

    Examples
    --------
    >>> result = run_demo("demo-output")                            # doctest: +SKIP
    >>> print(format_demo_summary(result))                          # doctest: +SKIP
    """
    output_dir = Path(output_dir)
    for folder in DEMO_STUDENTS:
        for name in REPORT_FILES + DRAFT_FILES:
            check_writable(output_dir / folder / name, force=force)
    students = []
    with demo_bundle() as bundle:
        scenario = load_scenario(bundle)
        by_folder = {entry["folder"]: entry for entry in scenario["students"]}
        for folder in DEMO_STUDENTS:
            entry = by_folder[folder]
            students.append(_run_student(bundle / folder, output_dir / folder, entry, force=force,
                                         progress=progress))
    return DemoResult(school=scenario["school"], output_dir=output_dir, students=tuple(students))


def _run_student(source: Path, out: Path, entry: dict, *, force: bool,
                 progress: Callable[[str], None] | None) -> DemoStudent:
    start = time.perf_counter()
    say = (lambda message: progress(f"{entry['folder']}: {message}")) if progress else None
    ensure_folder(out)
    take, part = source / "take.flac", source / "part.musicxml"
    outputs = compare_file(take, part, out, force=force, progress=say, student=entry["student"], title=entry["piece"])
    # The draft is the transcription compare_file already made with the part as guide;
    # notated here exactly as transcribe_file(take, score_path=part, ...) would, without
    # a second factorization.
    if say:
        say("notation of the draft")
    y, sr = load_take(take)
    result = outputs.transcription
    notation = notate(result.notes, reference=outputs.reference, alignment=outputs.alignment,
                      instrument_name=result.instrument.gm_name, midi_program=result.instrument.program,
                      measured_offsets=not result.instrument.decaying, title=Path(take).stem)
    written = [Path(p) for p in outputs.written.values()]
    written.append(Path(write_draft_midi(out / "draft.mid", result, notation=notation, force=force)))
    written.append(Path(write_musicxml(notation, out / "draft.musicxml", force=force)))
    summary = outputs.comparison.summary
    counts = {kind: n for kind, n in summary.get("counts", {}).items() if n}
    return DemoStudent(
        folder=entry["folder"], student=entry["student"], instrument=entry["instrument"], piece=entry["piece"],
        notes_in_part=int(summary.get("notes_in_part", 0)),
        notes_played_correctly=int(summary.get("notes_played_correctly", 0)),
        counts=counts, findings=tuple(f.to_dict() for f in outputs.comparison.findings),
        report_html=Path(outputs.written["report.html"]), written=tuple(written),
        duration=float(len(y) / sr), seconds=time.perf_counter() - start,
    )


def format_demo_summary(result: DemoResult) -> str:
    """A few lines for the terminal: per student, findings per kind (no grade-like figure) and the report."""
    lines = [f"Demo: two students of the {result.school} (an invented school; pieces written for the demo)."]
    for s in result.students:
        lines.append(f"- {s.student}, {s.instrument.lower()}, \"{s.piece}\": {format_findings_counts(s.counts)}.")
        lines.append(f"  Open the report: {s.report_html}")
    lines.append(CAUTION)
    return "\n".join(lines)
