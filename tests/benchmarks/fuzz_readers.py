"""Long fuzz run of every reader of user files (the default test suite runs a short one).

Usage::

    python tests/benchmarks/fuzz_readers.py                      # 20000 examples per reader input
    python tests/benchmarks/fuzz_readers.py --examples 2000 --only audio midi
    python tests/benchmarks/fuzz_readers.py --seed 7 --show 3

Each reader gets mutated valid files (and, for audio and note lists, random
input) from the same seeds and mutations as ``tests/test_fuzz_readers.py``. The
contract: a parsed result, or a :class:`~takescribe.errors.InputError` subclass
whose message names the file. Everything else is a failure; the script prints
the count per outcome, one line per distinct failure (exception type and the
innermost takescribe line) with a reproducing example, and exits with status 1
if there was any failure. An example running past ``--timeout`` CPU seconds counts as
a hang; the process's address space is capped (``--memory-limit-gb``) so a memory
blow-up shows up as a MemoryError rather than taking the machine down. Readers not written yet are reported as missing.

Mutated music21 parses are slow (about 40 ms each on a 2-core CPU): the
MusicXML inputs take most of the time.
"""

from __future__ import annotations

import argparse
import collections
import sys
import tempfile
import time
import traceback
import warnings
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

import test_fuzz_readers as fuzz  # noqa: E402  (seeds and mutations shared with the tests)

from takescribe.errors import InputError, TakescribeError  # noqa: E402


def _random_text(rng: np.random.Generator) -> bytes:
    alphabet = np.array(list("0123456789.-+eE\t \n,;#abcXYZ") + ["\u00e9", "\u266f", "\x00", "\r"])
    return "".join(rng.choice(alphabet, size=int(rng.integers(0, 300)))).encode("utf-8")


def _random_audio(rng: np.random.Generator) -> bytes:
    prefix = fuzz.MAGICS[rng.integers(len(fuzz.MAGICS))]
    return prefix + rng.integers(0, 256, size=int(rng.integers(0, 1024)), dtype=np.uint8).tobytes()


def inputs():
    """(label, module, function, file name (or one per seed), generator of (bytes, seed name, description))."""
    audio_names = sorted(fuzz.AUDIO_SEEDS)

    def mutated(seed_bytes_by_name, names):
        def generate(rng):
            name = names[rng.integers(len(names))]
            mutations = fuzz.random_mutations(rng)
            return fuzz.apply_mutations(seed_bytes_by_name[name], mutations), name, f"seed={name} mutations={mutations}"
        return generate

    audio_file = {n: "take" + fuzz.AUDIO_SUFFIX[n] for n in audio_names}
    yield ("audio/mutated", "audio", "load_audio", audio_file, mutated(fuzz.AUDIO_SEEDS, audio_names))
    yield ("audio/random", "audio", "load_audio", "noise.wav", lambda rng: (_random_audio(rng), None, "random bytes"))
    maps = {"maps": fuzz.MAPS_TEXT.encode()}
    yield ("maps/mutated", "noteio", "read_maps", "notes.txt", mutated(maps, ["maps"]))
    yield ("maps/random", "noteio", "read_maps", "random.txt", lambda rng: (_random_text(rng), None, "random text"))
    midi = {"midi": fuzz.MIDI_SEED}
    yield ("midi/mutated", "midi", "read_midi_notes", "part.mid", mutated(midi, ["midi"]))
    yield ("score/midi", "score", "load_reference", "part.mid", mutated(midi, ["midi"]))
    xml = {"musicxml": fuzz.MUSICXML_TEXT.encode()}
    yield ("score/musicxml", "score", "load_reference", "part.musicxml", mutated(xml, ["musicxml"]))
    mxl = {"mxl": fuzz.MXL_SEED}
    yield ("score/mxl", "score", "load_reference", "part.mxl", mutated(mxl, ["mxl"]))


def _where(exc: BaseException) -> str:
    frames = [f for f in traceback.extract_tb(exc.__traceback__) if "takescribe" in f.filename]
    frame = frames[-1] if frames else traceback.extract_tb(exc.__traceback__)[-1]
    return f"{Path(frame.filename).name}:{frame.lineno}"


def run(label, reader, file_name, generate, *, n_examples, rng, folder, show, timeout):
    counts: collections.Counter = collections.Counter()
    failures: dict[str, list[str]] = collections.defaultdict(list)
    started = time.perf_counter()
    for _ in range(n_examples):
        data, seed_name, description = generate(rng)
        name = file_name[seed_name] if isinstance(file_name, dict) else file_name
        path = folder / name
        path.write_bytes(data)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            try:
                with fuzz.time_limit(timeout):
                    reader(path)
                counts["ok"] += 1
            except TakescribeError as exc:
                if not isinstance(exc, InputError):
                    key = f"{type(exc).__name__} is not bad input"
                elif path.name not in str(exc) or "\n" in str(exc):
                    key = f"{type(exc).__name__} message does not name the file on one line"
                else:
                    counts[type(exc).__name__] += 1
                    continue
                counts["FAILED"] += 1
                failures[key].append(f"{description}: {exc}")
            except (Exception, fuzz.ReaderTimeout) as exc:  # the point of the run: anything untyped fails
                counts["FAILED"] += 1
                failures[f"{type(exc).__name__} at {_where(exc)}"].append(f"{description}: {str(exc)[:200]}")
    elapsed = time.perf_counter() - started
    outcome_text = ", ".join(f"{k} {v}" for k, v in counts.most_common())
    print(f"{label:16s} {n_examples:6d} examples {elapsed:7.1f} s  {outcome_text}")
    for key, examples in sorted(failures.items(), key=lambda kv: -len(kv[1])):
        print(f"    FAIL x{len(examples)}: {key}")
        for example in examples[:show]:
            print(f"        {example}")
    return counts["FAILED"]


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--examples", type=int, default=20000, help="examples per reader input (default 20000)")
    parser.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    parser.add_argument("--only", nargs="*", default=None,
                        help="labels or label prefixes to run (audio, maps, midi, score, score/mxl...)")
    parser.add_argument("--show", type=int, default=2, help="examples printed per distinct failure")
    parser.add_argument("--timeout", type=float, default=fuzz.READER_SECONDS,
                        help="CPU seconds one example may take before it counts as a hang (default %(default)s)")
    parser.add_argument("--memory-limit-gb", type=float, default=6.0,
                        help="address-space limit of this process, so a memory blow-up raises MemoryError "
                             "instead of exhausting the machine (POSIX; 0: none; default %(default)s)")
    args = parser.parse_args(argv)
    if args.memory_limit_gb > 0:
        try:
            import resource

            limit = int(args.memory_limit_gb * 1024**3)
            resource.setrlimit(resource.RLIMIT_AS, (limit, limit))
        except (ImportError, ValueError, OSError) as exc:
            print(f"memory limit not set ({exc})")
    rng = np.random.default_rng(args.seed)
    total_failed = 0
    with tempfile.TemporaryDirectory(prefix="takescribe-fuzz-") as tmp:
        folder = Path(tmp)
        for label, module, function, file_name, generate in inputs():
            if args.only and not any(label == o or label.startswith(o + "/") for o in args.only):
                continue
            reader = fuzz.find_reader(module, function)
            if reader is None:
                print(f"{label:16s} missing: takescribe.{module}.{function} does not exist yet")
                continue
            total_failed += run(label, reader, file_name, generate, n_examples=args.examples, rng=rng,
                                folder=folder, show=args.show, timeout=args.timeout)
    print(f"total failures: {total_failed}")
    return 1 if total_failed else 0


if __name__ == "__main__":
    sys.exit(main())
