"""Three weekly takes of the demo's *Lantern Waltz* for the desk tests (invented, like the demo).

Usage (from the repository root)::

    python tests/desk_takes/build_desk_takes.py      # rewrites tests/desk_takes/*.ogg

The same student plays the same piece three weeks running, with fewer planted mistakes each
week and one trouble spot (the pause before bar 12) that keeps coming back, so the desk's
progress page has something to show. Rendered as the demo is (``fixtures/build_demo.py``:
humanized performance, fluidsynth with ``sf_GMbank.sf2``) and stored as mono OGG/Vorbis to
keep the files small (and to exercise the OGG upload path). File names carry the student, the
piece and the date, as a teacher's files often do, for the desk's name guess.
"""

from __future__ import annotations

import sys
from dataclasses import replace
from pathlib import Path

import soundfile as sf

HERE = Path(__file__).resolve().parent
ROOT = HERE.parents[1]
sys.path.insert(0, str(ROOT / "fixtures"))
sys.path.insert(0, str(ROOT / "src"))

import build_demo  # noqa: E402
import render  # noqa: E402

# (file name, seed, planted mistakes in build_demo's PLAN format)
WEEKS = (
    ("maren lantern waltz 2026-11-02.ogg", 31, (("wrong_pitch", 6, 1.0, +2), ("missed", 9, 2.0, None),
                                                 ("hesitation", 12, 1.0, 1.6))),
    ("maren lantern waltz 2026-11-09.ogg", 32, (("wrong_pitch", 3, 1.0, -1), ("hesitation", 12, 1.0, 1.4))),
    ("maren lantern waltz 2026-11-16.ogg", 33, (("hesitation", 12, 1.0, 1.2),)),
)


def main() -> int:
    piano = next(s for s in build_demo.students() if s.folder == "piano")
    latency = render.measure_latency(piano.soundfont, piano.spec.program)
    for name, seed, plan in WEEKS:
        student = replace(piano, seed=seed, plan=plan)
        notes, planted = build_demo.perform_student(student)
        import tempfile
        with tempfile.TemporaryDirectory() as tmp:
            mid = Path(tmp) / "take.mid"
            truth = render.write_performance_midi(mid, notes, program=0, tempo_qpm=student.spec.tempo_qpm,
                                                  time_signature=student.spec.time_signature,
                                                  key_fifths=student.spec.key_fifths)
            duration = round(max(n.offset for n in truth) + 0.8, 3)
            y = render.render_midi(mid, student.soundfont, trim_s=latency, duration_s=duration)
        sf.write(HERE / name, render.normalize_peak(y), render.SR, format="OGG", subtype="VORBIS")
        print(name, f"{len(y) / render.SR:.1f} s", [p["kind"] + "@" + str(p["measure"]) for p in planted])
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
