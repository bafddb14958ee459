"""Hostile sizes (#17): what a long take, a large part and a MIDI file with huge gaps cost.

Every run is the command line in a child process, measured by GNU time (peak RSS of the
child, wall seconds); the temporary folder (``TMPDIR``, a fresh one per run) is polled for
its peak size, nameless files held open there included (the spilled audio). Each figure is given as a ratio against a reference measured in the same run,
so the numbers travel between machines:

- **long take**: a take that plays the demo piano piece (16 bars) over and over for
  ``--minutes`` (default 120). Reference: the blind draft MIDI alone. Measured: blind with
  ``--musicxml``, and with the 16-bar part (``--score``) and ``--musicxml``. For the run with
  the part the exit code, the warnings and the bars and notes of the MusicXML are printed:
  a part much shorter than the take must be stated and the draft must cover the whole take.
- **parts**: MusicXML parts of 250 to 50,000 one-note measures, read by
  ``takescribe.reference.part.load_reference``. Reference: the 250-measure part. Parts
  within the limit (:data:`takescribe.limits.LIMITS`) must load in time linear in their
  size; larger ones must be refused at once, with the limit named.
- **MIDI gaps**: ``takescribe evaluate`` on two-note MIDI files 10 hours apart and on a
  102-byte file whose delta time is huge. Reference: the same command on a two-note file
  with no gap. Each must finish, or be refused, at the reference's cost.

Targets (issue #17): the 2-hour blind run with ``--musicxml`` under 600 MB peak; a
10,000-measure part loaded in seconds or refused at once. A benchmark, not a test: nothing
here asserts; it prints and (``--json``) writes what it measured.

Usage::

    python tests/benchmarks/bench_sizes.py [--minutes 120] [--work /work/cache/sizes] [--json sizes.json]
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import threading
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
DEMO = ROOT / "src" / "takescribe" / "data" / "demo" / "piano"
GNU_TIME = "/usr/bin/time"


# ----------------------------------------------------------------------------- measuring


def _folder_bytes(folder: Path) -> int:
    total = 0
    for dirpath, _, names in os.walk(folder):
        for name in names:
            try:
                total += os.lstat(os.path.join(dirpath, name)).st_blocks * 512
            except OSError:
                pass
    return total


def _nameless_bytes(pid: int, folder: Path) -> int:
    """Disk blocks of the files the run holds open in ``folder`` without a name (the spilled audio, O_TMPFILE)."""
    import psutil

    total = 0
    try:
        processes = [psutil.Process(pid)] + psutil.Process(pid).children(recursive=True)
    except psutil.Error:
        return 0
    for process in processes:
        try:
            for fd in os.listdir(f"/proc/{process.pid}/fd"):
                link = os.readlink(f"/proc/{process.pid}/fd/{fd}")
                if link.startswith(str(folder)) and link.endswith("(deleted)"):
                    total += os.stat(f"/proc/{process.pid}/fd/{fd}").st_blocks * 512
        except OSError:
            continue
    return total


def measure(args: list[str], *, work: Path, timeout: float = 7200.0) -> dict:
    """Run ``python -m takescribe.cli ARGS`` under GNU time with a fresh TMPDIR; peak RSS, seconds, temp bytes."""
    tmp = Path(tempfile.mkdtemp(prefix="tmpdir-", dir=work))
    stats = work / "time.txt"
    env = dict(os.environ, TMPDIR=str(tmp), PYTHONPATH=str(ROOT / "src"))
    peak_tmp = [0]
    done = threading.Event()

    def poll():   # named files in the temporary folder, and nameless ones held open there
        while not done.wait(0.5):
            peak_tmp[0] = max(peak_tmp[0], _folder_bytes(tmp) + _nameless_bytes(proc.pid, tmp))

    proc = subprocess.Popen([GNU_TIME, "-f", "%M %e", "-o", str(stats), sys.executable, "-m", "takescribe.cli", *args],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env, cwd=work)
    watcher = threading.Thread(target=poll, daemon=True)
    watcher.start()
    try:
        out, err = proc.communicate(timeout=timeout)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        done.set()
        watcher.join()
    left = _folder_bytes(tmp)
    shutil.rmtree(tmp, ignore_errors=True)
    rss_kb, seconds = stats.read_text().split()[-2:]
    return {"args": args, "exit": proc.returncode, "peak_rss_mb": int(rss_kb) / 1024, "seconds": float(seconds),
            "peak_tmp_mb": peak_tmp[0] / 2**20, "tmp_left_mb": left / 2**20,
            "stderr": err.strip()[-600:], "stdout": out.strip()[-300:]}


def _show(name: str, row: dict, reference: dict | None = None) -> None:
    ratio = ""
    if reference is not None and reference.get("exit") == 0:
        ratio = (f"  ({row['peak_rss_mb'] / reference['peak_rss_mb']:.2f}x RSS,"
                 f" {row['seconds'] / max(reference['seconds'], 1e-3):.2f}x time of the reference)")
    print(f"  {name:42s} exit {row['exit']}  peak RSS {row['peak_rss_mb']:7.0f} MB  {row['seconds']:8.1f} s"
          f"  temp peak {row['peak_tmp_mb']:7.0f} MB{ratio}", flush=True)
    if row["exit"] != 0 or "warning" in row["stderr"].lower():
        print("    " + row["stderr"].replace("\n", "\n    ")[-600:], flush=True)


# ----------------------------------------------------------------------------- long take


def long_take(minutes: float, work: Path) -> Path:
    """The demo piano take (16 bars) played again and again for ``minutes``, as 16-bit FLAC."""
    import soundfile as sf

    take = work / f"demo-piano-{minutes:g}min.flac"
    if take.exists():
        return take
    y, sr = sf.read(DEMO / "take.flac", dtype="float32")
    if y.ndim > 1:
        y = y.mean(axis=1)
    total = int(minutes * 60 * sr)
    gap = np.zeros(int(1.0 * sr), np.float32)   # a second between passes, as a player who starts again
    one = np.concatenate([y, gap])
    with sf.SoundFile(take, "w", samplerate=sr, channels=1, subtype="PCM_16") as fh:
        written = 0
        while written < total:
            block = one[: total - written]
            fh.write(block)
            written += len(block)
    return take


def _musicxml_size(path: Path) -> dict:
    """Bars and notes of a MusicXML draft, counted on its elements (MusicXML 4.0: <measure>, <note> without <rest/>)."""
    from lxml import etree

    if not path.exists():
        return {"bars": None, "notes": None}
    bars = notes = 0
    first_part = None
    for _, el in etree.iterparse(str(path), events=("end",), tag=("measure", "note", "part"), huge_tree=True):
        if el.tag == "part" and first_part is None:
            first_part = bars
        elif el.tag == "measure" and first_part is None:
            bars += 1
        elif el.tag == "note" and el.find("rest") is None:
            notes += 1
        if el.tag in ("measure", "part"):
            el.clear()
    return {"bars": bars, "notes": notes}


def _midi_notes(path: Path) -> int | None:
    if not path.exists():
        return None
    import mido

    return sum(1 for track in mido.MidiFile(path).tracks for m in track if m.type == "note_on" and m.velocity > 0)


def section_long_take(minutes: float, work: Path) -> dict:
    print(f"\nlong take: the demo piano piece (16 bars) repeated for {minutes:g} minutes", flush=True)
    take = long_take(minutes, work)
    out = {"minutes": minutes, "take_mb": take.stat().st_size / 2**20}
    runs = {
        "blind_midi_only": ["transcribe", str(take), "-o", "blind-ref.mid", "--force"],
        "blind_musicxml": ["transcribe", str(take), "-o", "blind.mid", "--musicxml", "blind.musicxml", "--force"],
        "part_musicxml": ["transcribe", str(take), "--score", str(DEMO / "part.musicxml"), "-o", "part.mid",
                          "--musicxml", "part.musicxml", "--force"],
    }
    for name, args in runs.items():
        row = measure(args, work=work)
        if name != "blind_midi_only":
            row.update(musicxml=_musicxml_size(work / args[args.index("--musicxml") + 1]),
                       midi_notes=_midi_notes(work / args[args.index("-o") + 1]))
        out[name] = row
        _show(name, row, out.get("blind_midi_only") if name != "blind_midi_only" else None)
        if "musicxml" in row:
            print(f"    MusicXML: {row['musicxml']['bars']} bars, {row['musicxml']['notes']} notes;"
                  f" MIDI: {row['midi_notes']} notes", flush=True)
    ref = out["blind_midi_only"]
    if ref["exit"] == 0:
        for name in ("blind_musicxml", "part_musicxml"):
            out[f"{name}_rss_ratio"] = out[name]["peak_rss_mb"] / ref["peak_rss_mb"]
            out[f"{name}_time_ratio"] = out[name]["seconds"] / ref["seconds"]
    hours = minutes / 60
    out["tmp_mb_per_hour"] = max(out[k]["peak_tmp_mb"] for k in runs) / hours
    print(f"  temporary space: {out['tmp_mb_per_hour']:.0f} MB per hour of take (the largest of the three runs);"
          f" left behind: {max(out[k]['tmp_left_mb'] for k in runs):.1f} MB", flush=True)
    return out


# ----------------------------------------------------------------------------- parts

_PART_HEAD = ('<?xml version="1.0" encoding="UTF-8"?>\n<!DOCTYPE score-partwise PUBLIC "-//Recordare//DTD MusicXML 4.0'
              ' Partwise//EN" "http://www.musicxml.org/dtds/partwise.dtd">\n<score-partwise version="4.0">'
              '<part-list><score-part id="P1"><part-name>Piano</part-name></score-part></part-list><part id="P1">')
_FIRST = ('<measure number="1"><attributes><divisions>1</divisions><key><fifths>0</fifths></key><time><beats>4</beats>'
          '<beat-type>4</beat-type></time><clef><sign>G</sign><line>2</line></clef></attributes>'
          '<note><pitch><step>C</step><octave>4</octave></pitch><duration>4</duration><type>whole</type></note></measure>')
_BAR = ('<measure number="{n}"><note><pitch><step>{step}</step><octave>4</octave></pitch><duration>4</duration>'
        '<type>whole</type></note></measure>')


def write_part(measures: int, path: Path) -> Path:
    """A one-part MusicXML 4.0 file of ``measures`` bars, one whole note each (invented, for sizes only)."""
    with open(path, "w", encoding="utf-8") as fh:
        fh.write(_PART_HEAD + _FIRST)
        for n in range(2, measures + 1):
            fh.write(_BAR.format(n=n, step="CDEFGAB"[n % 7]))
        fh.write("</part></score-partwise>\n")
    return path


_LOAD_CHILD = ("import sys, time\nfrom takescribe.reference.part import load_reference\nfrom takescribe.errors import"
               " TakescribeError\nt = time.perf_counter()\ntry:\n    r = load_reference(sys.argv[1])\n"
               "    print('loaded', len(r.notes), len(r.measure_starts) - 1)\nexcept TakescribeError as e:\n"
               "    print('refused:', e)\nprint('seconds', time.perf_counter() - t)\n")


def section_parts(work: Path, sizes=(250, 1_000, 2_000, 10_000, 50_000)) -> dict:
    print("\nparts: MusicXML parts of one-note measures, read by load_reference (child process)", flush=True)
    out = {}
    for measures in sizes:
        path = write_part(measures, work / f"part-{measures}.musicxml")
        row = _measure_python(_LOAD_CHILD, path, work)
        row["file_mb"] = path.stat().st_size / 2**20
        out[str(measures)] = row
        _show(f"{measures} measures ({row['file_mb']:.1f} MB), call {row['load_seconds']:.2f} s", row,
              out.get(str(sizes[0])) if measures != sizes[0] else None)
        print(f"    {row['outcome'][:160]}", flush=True)
        path.unlink()
    loaded = [(int(k), v["load_seconds"]) for k, v in out.items() if v["outcome"].startswith("loaded")]
    if len(loaded) >= 2:
        (m0, s0), (m1, s1) = loaded[0], loaded[-1]
        out["load_time_growth"] = {"measures_ratio": m1 / m0, "seconds_ratio": s1 / s0}
        print(f"  loading: {m1 / m0:.0f}x the measures took {s1 / s0:.1f}x the time (linear would be"
              f" {m1 / m0:.0f}x)", flush=True)
    return out


def _measure_python(code: str, arg: Path, work: Path) -> dict:
    """GNU time on ``python -c code arg``; the child prints its outcome and the seconds of the call itself."""
    stats = work / "time.txt"
    env = dict(os.environ, PYTHONPATH=str(ROOT / "src"))
    done = subprocess.run([GNU_TIME, "-f", "%M %e", "-o", str(stats), sys.executable, "-c", code, str(arg)],
                          capture_output=True, text=True, env=env, cwd=work, timeout=3600)
    lines = done.stdout.strip().splitlines()
    rss_kb, seconds = stats.read_text().split()[-2:]
    call = next((float(x.split()[1]) for x in lines if x.startswith("seconds ")), float("nan"))
    return {"exit": done.returncode, "peak_rss_mb": int(rss_kb) / 1024, "seconds": float(seconds),
            "load_seconds": call, "outcome": (lines[0] if lines else done.stderr.strip()[-300:]),
            "peak_tmp_mb": 0.0, "stderr": done.stderr.strip()[-300:]}


# ----------------------------------------------------------------------------- MIDI gaps


def _midi_file(path: Path, gap_ticks: int) -> Path:
    """A type-0 SMF with two notes ``gap_ticks`` apart (SMF 1.0: variable-length delta times, 480 ticks a quarter)."""
    import mido

    mid = mido.MidiFile(type=0, ticks_per_beat=480)
    track = mido.MidiTrack()
    track.append(mido.Message("note_on", note=60, velocity=80, time=0))
    track.append(mido.Message("note_off", note=60, velocity=0, time=480))
    track.append(mido.Message("note_on", note=64, velocity=80, time=gap_ticks))
    track.append(mido.Message("note_off", note=64, velocity=0, time=480))
    mid.tracks.append(track)
    mid.save(path)
    return path


def section_midi(work: Path) -> dict:
    print("\nMIDI gaps: takescribe evaluate FILE FILE", flush=True)
    ten_hours = int(10 * 3600 * 2 * 480)   # at the default 120 quarters a minute: 2 quarters a second
    files = {"no_gap": _midi_file(work / "nogap.mid", 0),
             "two_notes_10_hours_apart": _midi_file(work / "gap.mid", ten_hours),
             "huge_delta_0x0FFFFFFF": _midi_file(work / "huge.mid", 0x0FFFFFFF)}   # the largest SMF delta
    out = {}
    for name, path in files.items():
        row = measure(["evaluate", str(path), str(path)], work=work, timeout=3600)
        row["file_bytes"] = path.stat().st_size
        out[name] = row
        _show(f"{name} ({row['file_bytes']} bytes)", row, out.get("no_gap") if name != "no_gap" else None)
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--minutes", type=float, default=120.0, help="length of the long take (default 120)")
    ap.add_argument("--work", type=Path, default=None, help="folder for the generated files (default: a temporary one)")
    ap.add_argument("--json", type=Path, default=None, help="write the measurements here")
    ap.add_argument("--skip-long", action="store_true", help="parts and MIDI only")
    args = ap.parse_args(argv)
    if not Path(GNU_TIME).exists():
        print(f"GNU time is needed at {GNU_TIME} (Debian: apt-get install time)", file=sys.stderr)
        return 1
    work = args.work or Path(tempfile.mkdtemp(prefix="takescribe-sizes-"))
    work.mkdir(parents=True, exist_ok=True)
    result = {"parts": section_parts(work), "midi": section_midi(work)}
    if not args.skip_long:
        result["long_take"] = section_long_take(args.minutes, work)
    if args.json:
        args.json.write_text(json.dumps(result, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
