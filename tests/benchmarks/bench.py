"""Benchmark of takescribe on the fixture corpus: accuracy and speed.

Usage::

    python tests/benchmarks/bench.py [--split tuning|heldout|all] [--json out.json] [--force] [--quick] [--speed]
    python tests/benchmarks/bench.py --corpus /tmp/big --split tuning   # the large corpus (build_corpus.py --large)
    python tests/benchmarks/bench.py --engine-only [--json out.json]
    python tests/benchmarks/bench.py --memory-only [--json out.json]
    python tests/benchmarks/bench.py --rooms [--room-mode auto] [--split tuning] [--world /work/cache/world]

Accuracy: every piece of the split is transcribed blind and score-informed (with its
reference MusicXML) through :func:`takescribe.jobs.pipeline.transcribe_take`, and scored
against its MAPS ground truth with :func:`takescribe.evaluation.metrics.evaluate_notes`
(mir_eval conventions: onset F-measure with a 50 ms window, onset+offset
F-measure, frame accuracy on a 10 ms grid). Printed per piece, per category
(polyphonic piano, melody, adverse conditions) and as a one-line summary, with the
real-time factor RTF = processing seconds / audio seconds (processing = the
transcription of the loaded take, alignment included for informed runs; file
reading excluded). A short warm-up transcription runs first and its time is reported
apart as the cold start (librosa's imports and compilation).

``--quick`` takes one piece per category. ``--speed`` adds, in the same run:

(a) RTF of the whole pipeline, blind and score-informed, on 1- and 10-minute takes
    made by concatenating the corpus piano pieces (audio) and their parts (scores);
(b) our engine against scikit-learn's ``non_negative_factorization`` (solver 'mu',
    KL, dictionary fixed via ``update_H=False`` on the transposed problem, same
    start, same iterations) on the same matrices: time ratio, final-cost difference;
(c) our engine's float32 FLOP rate as a fraction of a plain numpy float32 product of
    the same size, timed in this run: dense-equivalent (4·F·K·T flops per H-only KL
    iteration) and useful (the flops of the banded tiles the engine actually runs);
(d) peak resident memory (``resource.getrusage(RUSAGE_SELF).ru_maxrss`` in a fresh
    subprocess per take length and mode) for reading from a FLAC file and transcribing
    1-, 10- and 60-minute takes (the concatenated piano pieces of (a)), blind and
    score-informed, and the 60-to-10-minute ratio.

``--rooms`` adds the rooms section (:mod:`rooms`: the split's piano and melody pieces in five
simulated rooms, RT60 0.3-2.5 s, without and with dereverberation, with its own dry reference
for the speed ratio); ``--rooms-only`` runs it without the accuracy section.

``--engine-only`` runs (b) and (c) alone (about a minute), ``--memory-only`` runs (d) alone
(several minutes), without the accuracy runs.

Nothing here is collected by pytest (the file name has no ``test_`` prefix).
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import os
import platform
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
CORPUS = ROOT / "fixtures" / "corpus"
CATEGORY_LABELS = {"piano": "polyphonic piano", "melody": "melody", "adverse": "adverse conditions"}
METRICS = ("onset.f_measure", "onset_offset.f_measure", "frame.accuracy")
SHORT = {"onset.f_measure": "onset F", "onset_offset.f_measure": "on+off F", "frame.accuracy": "frame acc"}


def _imports():
    from takescribe.evaluation.metrics import evaluate_notes
    from takescribe.export.noteio import read_maps
    from takescribe.jobs.pipeline import load_take, transcribe_take
    from takescribe.reference.part import load_reference

    return evaluate_notes, read_maps, load_take, transcribe_take, load_reference


# ----------------------------------------------------------------------------- accuracy


def run_piece(entry: dict) -> dict:
    """Blind and informed runs of one corpus piece, with scores and RTF."""
    evaluate_notes, read_maps, load_take, transcribe_take, load_reference = _imports()
    files = entry["files"]
    y, sr = load_take(CORPUS / files["audio"])
    seconds = len(y) / sr
    truth = read_maps(CORPUS / files["notes"])
    reference = load_reference(CORPUS / files["score"])
    row = {"name": entry["name"], "split": entry["split"], "category": entry["category"], "audio_seconds": seconds}
    for mode in ("blind", "informed"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t0 = time.perf_counter()
            result, _ = transcribe_take(y, sr, instrument=entry["instrument_program"],
                                        reference=reference if mode == "informed" else None)
            elapsed = time.perf_counter() - t0
        scores = evaluate_notes(truth, result.notes)
        row[mode] = {**{m: float(scores[m]) for m in METRICS}, "seconds": elapsed, "rtf": elapsed / seconds,
                     "notes": len(result.notes)}
    return row


def summarize(rows: list[dict]) -> dict:
    """Mean scores and pooled RTF (sum of seconds / sum of audio seconds) per category and overall."""
    out = {}
    groups = {c: [r for r in rows if r["category"] == c] for c in CATEGORY_LABELS}
    groups["all"] = rows
    for name, group in groups.items():
        if not group:
            continue
        audio = sum(r["audio_seconds"] for r in group)
        out[name] = {mode: {**{m: float(np.mean([r[mode][m] for r in group])) for m in METRICS},
                            "rtf": sum(r[mode]["seconds"] for r in group) / audio}
                     for mode in ("blind", "informed")}
        out[name]["pieces"] = len(group)
    return out


def print_accuracy(rows: list[dict], summary: dict) -> None:
    head = f"{'piece':32s} {'mode':8s} " + " ".join(f"{SHORT[m]:>9s}" for m in METRICS) + f" {'RTF':>7s}"
    print(head)
    print("-" * len(head))
    for r in rows:
        for mode in ("blind", "informed"):
            print(f"{r['name'] if mode == 'blind' else '':32s} {mode:8s} "
                  + " ".join(f"{r[mode][m]:9.3f}" for m in METRICS) + f" {r[mode]['rtf']:7.3f}")
    print()
    print(f"{'category':32s} {'mode':8s} " + " ".join(f"{SHORT[m]:>9s}" for m in METRICS) + f" {'RTF':>7s}")
    for name, block in summary.items():
        label = CATEGORY_LABELS.get(name, "all pieces") + f" ({block['pieces']})"
        for mode in ("blind", "informed"):
            print(f"{label if mode == 'blind' else '':32s} {mode:8s} "
                  + " ".join(f"{block[mode][m]:9.3f}" for m in METRICS) + f" {block[mode]['rtf']:7.3f}")


# ----------------------------------------------------------------------------- long takes


def concatenated_take(minutes: float, *, gap: float = 1.0):
    """A long piano take and its part: the corpus piano pieces one after another, cycled.

    Each piece's audio is placed at an offset; its part's notes are shifted by the same
    seconds and by the matching number of quarters at the piece's first tempo, with a
    tempo change at each junction so score seconds and take seconds agree.
    """
    from takescribe.jobs.pipeline import load_take
    from takescribe.reference.part import Reference, load_reference

    entries = [e for e in json.loads((CORPUS / "index.json").read_text()) if e["category"] == "piano"]
    pieces = []
    for e in entries:
        y, sr = load_take(CORPUS / e["files"]["audio"])
        pieces.append((y, sr, load_reference(CORPUS / e["files"]["score"])))
    sr = pieces[0][1]
    total = int(minutes * 60 * sr)
    audio = np.zeros(total, np.float32)
    notes, tempo_map, signatures, measure_starts, labels = [], [], [], [], []
    offset_s, offset_q, measure = 0.0, 0.0, 0
    k = 0
    while True:
        y, _, ref = pieces[k % len(pieces)]
        k += 1
        start = int(round(offset_s * sr))
        if start >= total:
            break
        seg = y[: total - start]
        audio[start: start + len(seg)] += seg
        for q, b in ref.tempo_map:
            tempo_map.append((offset_q + q, b))
        for q, num, den in ref.time_signatures:
            signatures.append((offset_q + q, num, den))
        for n in ref.notes:
            notes.append(dataclasses.replace(n, onset_quarters=n.onset_quarters + offset_q, onset=n.onset + offset_s,
                                             offset=n.offset + offset_s, measure=n.measure + measure,
                                             measure_label=str(n.measure + measure), index=len(notes)))
        measure_starts.extend(offset_q + q for q in ref.measure_starts[:-1])
        labels.extend(str(measure + i + 1) for i in range(len(ref.measure_starts) - 1))
        measure += len(ref.measure_starts) - 1
        # the next piece starts after this one's audio and its part, plus a gap, at a whole quarter
        span_s = max(len(y) / sr, ref.quarters_to_seconds(ref.measure_starts[-1])) + gap
        last_bpm = ref.tempo_map[-1][1]
        end_q_piece = ref.measure_starts[-1]
        end_s_piece = ref.quarters_to_seconds(end_q_piece)
        span_q = end_q_piece + (span_s - end_s_piece) * last_bpm / 60.0
        offset_q += span_q
        offset_s += span_s
    notes = [n for n in notes if n.offset <= minutes * 60]
    notes = [dataclasses.replace(n, index=i) for i, n in enumerate(notes)]
    first = pieces[0][2]
    reference = Reference(notes=tuple(notes), tempo_map=tuple(tempo_map), time_signatures=tuple(signatures),
                          measure_starts=tuple(measure_starts) + (offset_q,), key_fifths=first.key_fifths,
                          part_name="concatenated piano pieces", instrument_name=first.instrument_name,
                          midi_program=0, source="bench:concatenated", measure_labels=tuple(labels))
    return audio, sr, reference


def speed_pipeline(minutes_list=(1, 10)) -> dict:
    from takescribe.jobs.pipeline import transcribe_take

    out = {}
    for minutes in minutes_list:
        y, sr, reference = concatenated_take(minutes)
        seconds = len(y) / sr
        row = {"audio_seconds": seconds}
        for mode in ("blind", "informed"):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                t0, c0 = time.perf_counter(), time.process_time()
                result, _ = transcribe_take(y, sr, instrument=0, reference=reference if mode == "informed" else None)
                elapsed, cpu = time.perf_counter() - t0, time.process_time() - c0
            row[mode] = {"seconds": elapsed, "rtf": elapsed / seconds, "cpu_seconds": cpu, "cpu_rtf": cpu / seconds,
                         "notes": len(result.notes), "timings": {k: float(v) for k, v in result.timings.items()}}
            print(f"  {minutes:3d} min {mode:8s}: {elapsed:7.1f} s wall (RTF {elapsed / seconds:.3f}),"
                  f" {cpu:7.1f} s CPU (RTF {cpu / seconds:.3f}); {len(result.notes)} notes", flush=True)
        out[f"{minutes}min"] = row
    return out


# ----------------------------------------------------------------------------- engine


def _problem():
    """The factorization of a corpus piano piece: normalised V and dictionary with noise templates."""
    from takescribe.transcription.dictionary import harmonic_dictionary
    from takescribe.jobs.pipeline import load_take
    from takescribe.features.spectrogram import compute_spectrogram
    from takescribe.transcription.blind import noise_templates, normalize_spectrogram

    y, sr = load_take(CORPUS / "tuning" / "piano_scales.flac")
    y = np.tile(y, 3)  # ~34 s: T large enough for steady timings
    spec = compute_spectrogram(y, sr)
    V, _ = normalize_spectrogram(spec.V)
    W = np.hstack([harmonic_dictionary(spec, instrument=0).W, noise_templates(V.shape[0], 3)]).astype(np.float32)
    return np.ascontiguousarray(V, dtype=np.float32), W


def _best_of(fn, repeats: int) -> float:
    best = np.inf
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        best = min(best, time.perf_counter() - t0)
    return best


def _one_thread(fn):
    from threadpoolctl import threadpool_limits

    with threadpool_limits(1, user_api="blas"):
        return fn()


def speed_engine(n_iter: int = 100, repeats: int = 7) -> dict:
    """Our engine against scikit-learn's MU solver at equal iterations, and its FLOP rate.

    Interleaved repeats of ours (banded tiling of W, the default), ours with the tiling
    switched off (dense products), ours on one thread, scikit-learn with its default BLAS
    threads and with one BLAS thread: other load on the machine then hits all alike. Ratios are the
    median of the per-round ratios (robust to a round slowed down by another job), with
    the best-of ratios kept in the JSON too. FLOP rates: "dense-equivalent" counts the
    4·F·K·T flops per H-only KL iteration that the issue defines (what a dense engine
    must do); "useful" counts the multiply-adds of our tiles only (2 flops each).
    """
    from sklearn.decomposition import non_negative_factorization
    from threadpoolctl import threadpool_limits

    from takescribe.transcription import nmf
    from takescribe.transcription.nmf import beta_divergence, decompose

    V, W = _problem()
    F, T = V.shape
    K = W.shape[1]
    H0 = np.full((K, T), np.sqrt(V.mean() / K), np.float32)
    ours = lambda: decompose(V, W, beta=1.0, n_iter=n_iter, tol=0, H_init=H0)  # noqa: E731
    plan_tiling = nmf._plan_tiling

    def ours_dense():
        nmf._plan_tiling = lambda W, n_frames: None  # the same engine with the banded tiling off
        try:
            return ours()
        finally:
            nmf._plan_tiling = plan_tiling

    # scikit-learn factorizes X ≈ A·B; with update_H=False B (our W.T) stays fixed and A (our H.T)
    # starts from the constant sqrt(mean(X) / n_components), the start we give ours above.
    theirs = lambda: non_negative_factorization(  # noqa: E731
        V.T, H=W.T.copy(), n_components=K, init="custom", update_H=False, solver="mu",
        beta_loss="kullback-leibler", max_iter=n_iter, tol=0, alpha_W=0.0, alpha_H=0.0)
    fit = ours()
    H_ours, H_dense = fit.H, ours_dense().H
    theirs_one = lambda: _one_thread(theirs)  # noqa: E731
    ours_one = lambda: _one_thread(ours)  # noqa: E731  (one BLAS thread: our engine runs one slab)
    runs = {"ours": ours, "ours_dense": ours_dense, "ours_one": ours_one, "sklearn": theirs, "sklearn_one": theirs_one}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        A = theirs()[0]
        # interleaved repeats, wall and CPU time (all threads) of each
        times = {name: [] for name in runs}
        for _ in range(repeats):
            for name, fn in runs.items():
                t0, c0 = time.perf_counter(), time.process_time()
                fn()
                times[name].append((time.perf_counter() - t0, time.process_time() - c0))
    wall = {k: np.array([w for w, _ in v]) for k, v in times.items()}
    cpu = {k: np.array([c for _, c in v]) for k, v in times.items()}
    best = {k: float(v.min()) for k, v in wall.items()}
    med = {k: float(np.median(v)) for k, v in wall.items()}

    def ratio(a, b, clock=wall):  # median over rounds of a's time / b's time
        return float(np.median(clock[a] / clock[b]))

    cost_ours = beta_divergence(V, W @ H_ours, 1.0)
    cost_dense = beta_divergence(V, W @ H_dense, 1.0)
    cost_theirs = beta_divergence(V, W @ A.T, 1.0)
    # plain numpy float32 product of the same size, default threads and one thread
    Hr = np.ascontiguousarray(H_ours)
    out = np.empty_like(V)
    mm = lambda: np.matmul(W, Hr, out=out)  # noqa: E731
    mm()
    t_mm = _best_of(mm, 20)
    with threadpool_limits(1, user_api="blas"):
        t_mm_one = _best_of(mm, 20)
    # the tiling our engine chose for this problem (planned per thread slab, as decompose does)
    threads = nmf._engine_threads(T)
    tiling = nmf._plan_tiling(W, -(-T // threads))
    useful_fraction = 1.0 if tiling is None else tiling.madds_per_frame / tiling.dense_madds_per_frame
    flops_iter = 4.0 * F * K * T  # dense-equivalent, as the issue defines it
    t_ours = med["ours"]
    dense_rate = flops_iter * n_iter / t_ours
    useful_rate = dense_rate * useful_fraction
    mm_rate, mm_one_rate = 2.0 * F * K * T / t_mm, 2.0 * F * K * T / t_mm_one
    result = {
        "shape": {"n_bins": F, "n_pitches": K, "n_frames": T}, "n_iter": n_iter, "repeats": repeats,
        "engine_threads": threads,
        "tiling": None if tiling is None else {
            "model_tiles": [[i0, i1, [[j0, j1] for j0, j1, _ in tiles]] for i0, i1, tiles in tiling.model],
            "adjoint_tiles": [[i0, i1, [[j0, j1] for j0, j1, _ in tiles]] for i0, i1, tiles in tiling.adjoint],
            "useful_fraction_of_dense_flops": useful_fraction},
        "median_seconds": med, "best_seconds": best,
        "median_cpu_seconds": {k: float(np.median(v)) for k, v in cpu.items()},
        "speedup_vs_sklearn": ratio("sklearn", "ours"),
        "speedup_vs_sklearn_one_thread": ratio("sklearn_one", "ours"),
        "one_thread_speedup_vs_sklearn_one_thread": ratio("sklearn_one", "ours_one"),
        "one_thread_speedup_vs_sklearn_one_thread_cpu": ratio("sklearn_one", "ours_one", cpu),
        "speedup_vs_sklearn_cpu": ratio("sklearn", "ours", cpu),
        "speedup_vs_sklearn_one_thread_cpu": ratio("sklearn_one", "ours", cpu),
        "speedup_vs_sklearn_best_of": best["sklearn"] / best["ours"],
        "dense_engine_speedup_vs_sklearn": ratio("sklearn", "ours_dense"),
        "tiling_speedup": ratio("ours_dense", "ours"),
        "tiling_speedup_cpu": ratio("ours_dense", "ours", cpu),
        "cost_ours": cost_ours, "cost_ours_dense": cost_dense, "cost_sklearn": cost_theirs,
        "cost_relative_difference": (cost_ours - cost_theirs) / cost_theirs,
        "cost_relative_difference_tiled_vs_dense": (cost_ours - cost_dense) / cost_dense,
        "ours_dense_equivalent_gflops": dense_rate / 1e9, "ours_useful_gflops": useful_rate / 1e9,
        "numpy_matmul_gflops": mm_rate / 1e9, "numpy_matmul_one_thread_gflops": mm_one_rate / 1e9,
        "dense_equivalent_fraction_of_matmul": dense_rate / mm_rate,
        "useful_fraction_of_matmul": useful_rate / mm_rate,
        "useful_fraction_of_one_thread_matmul": useful_rate / mm_one_rate,
        "ours_dense_equivalent_gflops_per_cpu_second": flops_iter * n_iter / float(np.median(cpu["ours"])) / 1e9,
    }
    print(f"  engine vs scikit-learn ({F}x{K}x{T}, {n_iter} KL iterations, {repeats} interleaved rounds, medians):"
          f" ours {t_ours:.3f} s (tiling off {med['ours_dense']:.3f} s), scikit-learn {med['sklearn']:.3f} s"
          f" (one BLAS thread {med['sklearn_one']:.3f} s): {result['speedup_vs_sklearn']:.2f}x"
          f" ({result['speedup_vs_sklearn_one_thread']:.2f}x); tiling off {result['dense_engine_speedup_vs_sklearn']:.2f}x;"
          f" tiling gain {result['tiling_speedup']:.2f}x")
    print(f"  both on one thread: ours {med['ours_one']:.3f} s, scikit-learn {med['sklearn_one']:.3f} s:"
          f" {result['one_thread_speedup_vs_sklearn_one_thread']:.2f}x"
          f" ({result['one_thread_speedup_vs_sklearn_one_thread_cpu']:.2f}x in CPU seconds; less sensitive to other load)")
    print(f"  final cost {cost_ours:.6g} vs scikit-learn {cost_theirs:.6g}"
          f" ({100 * result['cost_relative_difference']:+.4f} %), tiling off {cost_dense:.6g}"
          f" ({100 * result['cost_relative_difference_tiled_vs_dense']:+.2e} %)")
    print(f"  CPU seconds (median): ours {result['median_cpu_seconds']['ours']:.3f}, tiling off"
          f" {result['median_cpu_seconds']['ours_dense']:.3f}, scikit-learn {result['median_cpu_seconds']['sklearn']:.3f}"
          f" (one BLAS thread {result['median_cpu_seconds']['sklearn_one']:.3f}): {result['speedup_vs_sklearn_cpu']:.2f}x"
          f" ({result['speedup_vs_sklearn_one_thread_cpu']:.2f}x)")
    print(f"  tiles: {useful_fraction:.0%} of the dense multiply-adds"
          + ("" if tiling is None else f" ({sum(len(b[2]) for b in tiling.model)} tiles for W·H,"
                                       f" {sum(len(b[2]) for b in tiling.adjoint)} for Wᵀ·R)"))
    print(f"  FLOP rate: ours {dense_rate / 1e9:.1f} GFLOP/s dense-equivalent (4·F·K·T per iteration),"
          f" {useful_rate / 1e9:.1f} GFLOP/s useful (tile flops only); numpy matmul {mm_rate / 1e9:.1f} GFLOP/s"
          f" (dense-equivalent {100 * result['dense_equivalent_fraction_of_matmul']:.0f} %, useful"
          f" {100 * result['useful_fraction_of_matmul']:.0f} %), one thread {mm_one_rate / 1e9:.1f} GFLOP/s",
          flush=True)
    return result


# ----------------------------------------------------------------------------- memory

_MEMORY_CHILD = r"""
import json, pickle, resource, sys, time, warnings
from takescribe.jobs.pipeline import load_take, transcribe_take
minutes, mode, take, part = float(sys.argv[1]), sys.argv[2], sys.argv[3], sys.argv[4]
reference = pickle.loads(open(part, "rb").read()) if mode == "informed" else None
t0 = time.perf_counter()
with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    y, sr = load_take(take)  # the take as the command line reads it (long takes spill to a file)
    result, _ = transcribe_take(y, sr, instrument=0, reference=reference)
elapsed = time.perf_counter() - t0
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
hwm = int(next(line for line in open("/proc/self/status") if line.startswith("VmHWM")).split()[1])
print(json.dumps({"minutes": minutes, "mode": mode, "peak_rss_kb": peak, "vm_hwm_kb": hwm, "seconds": elapsed,
                  "audio_mb": len(y) * 4 / 2**20, "spilled": not y.flags.writeable, "notes": len(result.notes)}))
"""


def speed_memory(minutes_list=(1, 10, 60)) -> dict:
    """Peak RSS of reading and transcribing 1-, 10- and 60-minute takes from a file, blind and informed."""
    import pickle
    import tempfile

    import soundfile as sf

    out = {}
    with tempfile.TemporaryDirectory(prefix="takescribe-bench-") as folder:
        for minutes in minutes_list:
            y, sr, reference = concatenated_take(minutes)
            take, part = Path(folder) / f"take{minutes}.flac", Path(folder) / f"part{minutes}.pickle"
            sf.write(take, y, sr, subtype="PCM_16")
            part.write_bytes(pickle.dumps(reference))
            del y, reference
            for mode in ("blind", "informed"):
                # Linux keeps the larger of ru_maxrss and the exec'ing process's peak across execve, so
                # a child exec'd straight from this (large) process would report our peak: a shell in
                # between forks the child from a small process.
                proc = subprocess.run(["/bin/sh", "-c", '"$0" -c "$1" "$2" "$3" "$4" "$5"; exit $?', sys.executable,
                                       _MEMORY_CHILD, str(minutes), mode, str(take), str(part)],
                                      capture_output=True, text=True, cwd=ROOT)
                key = f"{minutes}min_{mode}"
                if proc.returncode != 0:
                    out[key] = {"error": proc.stderr.strip().splitlines()[-1:]}
                    print(f"  {minutes} min {mode}: failed: {proc.stderr.strip()[-300:]}")
                    continue
                row = json.loads(proc.stdout.strip().splitlines()[-1])
                row["peak_rss_mb"] = row["peak_rss_kb"] / 1024  # ru_maxrss is in kilobytes on Linux
                row["vm_hwm_mb"] = row["vm_hwm_kb"] / 1024
                out[key] = row
                print(f"  {minutes:3d} min {mode:8s}: peak RSS {row['peak_rss_mb']:.0f} MB (VmHWM"
                      f" {row['vm_hwm_mb']:.0f} MB; audio {row['audio_mb']:.0f} MB"
                      f"{', kept in a temporary file' if row['spilled'] else ' in memory'}); {row['seconds']:.1f} s",
                      flush=True)
    for mode in ("blind", "informed"):
        ten, hour = out.get(f"10min_{mode}", {}), out.get(f"60min_{mode}", {})
        if "peak_rss_mb" in ten and "peak_rss_mb" in hour:
            out[f"ratio_60_to_10_{mode}"] = hour["peak_rss_mb"] / ten["peak_rss_mb"]
            print(f"  {mode}: 60 min / 10 min peak RSS = {out[f'ratio_60_to_10_{mode}']:.2f}", flush=True)
    return out


# ----------------------------------------------------------------------------- rooms


def _rooms_section(args) -> dict:
    """The rooms section (see :mod:`rooms`), one report per split."""
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    import rooms

    out = {}
    for split in (("tuning", "heldout") if args.split == "all" else (args.split,)):
        entries = rooms.room_entries(CORPUS, split, quick=args.quick)
        print(f"\nrooms ({split}): {len(entries)} pieces x {len(rooms.ROOMS)} rooms, room={args.room_mode}", flush=True)
        out[split] = rooms.run_rooms(CORPUS, entries, room_mode=args.room_mode)
        rooms.print_rooms(out[split])
        if args.world is not None:
            print(f"\nrooms of the world corpus ({split}), room={args.room_mode}", flush=True)
            out[f"world_{split}"] = rooms.run_world(args.world, split, room_mode=args.room_mode)
            rooms.print_rooms(out[f"world_{split}"])
    return out


# ----------------------------------------------------------------------------- world corpus (issue #20)


def run_world_take(folder: Path, take: dict, *, melodic=None) -> dict:
    """Blind transcription of one world-corpus take: onset F, onset+offset F, onset bias, RTF."""
    from takescribe.evaluation.matching import match_notes
    from takescribe.notes import notes_to_arrays

    evaluate_notes, read_maps, load_take, _, _ = _imports()
    from takescribe.transcription.blind import transcribe
    from takescribe.transcription.blocks import LONG_TAKE_SECONDS

    y, sr = load_take(folder / take["files"]["audio"])
    truth = read_maps(folder / take["files"]["played"])
    assert len(y) <= LONG_TAKE_SECONDS * sr, "world takes are short: one pass"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        notes = transcribe(y, sr, instrument=take["program"], melodic=melodic).notes
        elapsed = time.perf_counter() - t0
    scores = evaluate_notes(truth, notes)
    ri, rp, _ = notes_to_arrays(truth)
    ei, ep, _ = notes_to_arrays(notes)
    pairs = match_notes(ri, rp, ei, ep, offset_ratio=None) if len(notes) and len(truth) else []
    errors = [ei[j, 0] - ri[i, 0] for i, j in pairs]
    return {k: take[k] for k in ("id", "split", "family", "instrument", "condition")} | {
        "onset_f": float(scores["onset.f_measure"]), "onset_offset_f": float(scores["onset_offset.f_measure"]),
        "onset_bias_s": float(np.median(errors)) if errors else float("nan"), "seconds": elapsed,
        "audio_seconds": len(y) / sr}


def print_world(rows: list[dict]) -> dict:
    """Means per family, per instrument (melodies) and per condition; pooled RTF."""
    out = {}
    for key in ("family", "instrument", "condition"):
        print(f"\n{key:24s} {'takes':>5s} {'onset F':>8s} {'min':>6s} {'on+off F':>9s} {'bias ms':>8s} {'RTF':>6s}")
        groups = {}
        for r in rows:
            if key != "instrument" or r["family"] == "melody":
                groups.setdefault(r[key], []).append(r)
        for name, group in sorted(groups.items()):
            line = {"takes": len(group), "onset_f": float(np.mean([r["onset_f"] for r in group])),
                    "min_onset_f": float(np.min([r["onset_f"] for r in group])),
                    "onset_offset_f": float(np.mean([r["onset_offset_f"] for r in group])),
                    "onset_bias_ms": 1000 * float(np.nanmedian([r["onset_bias_s"] for r in group])),
                    "rtf": sum(r["seconds"] for r in group) / sum(r["audio_seconds"] for r in group)}
            out[f"{key}:{name}"] = line
            print(f"{name:24s} {line['takes']:5d} {line['onset_f']:8.3f} {line['min_onset_f']:6.3f}"
                  f" {line['onset_offset_f']:9.3f} {line['onset_bias_ms']:8.1f} {line['rtf']:6.3f}", flush=True)
    return out


def world_section(folder: Path, split: str) -> dict:
    """Blind figures on the world corpus (fixtures/build_world.py), one split."""
    takes = [t for t in json.loads((folder / "manifest.json").read_text())["takes"]
             if split == "all" or t["split"] == split]
    print(f"world corpus: {len(takes)} takes ({split}), blind", flush=True)
    rows = [run_world_take(folder, t) for t in takes]
    return {"split": split, "takes": rows, "groups": print_world(rows)}


# ----------------------------------------------------------------------------- main


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--split", choices=("tuning", "heldout", "all"), default="all")
    parser.add_argument("--json", help="write the figures to this JSON file")
    parser.add_argument("--force", action="store_true", help="overwrite --json if it exists")
    parser.add_argument("--quick", action="store_true", help="one piece per category")
    parser.add_argument("--corpus", type=Path, default=None,
                        help="accuracy on another corpus folder with the same layout, e.g. the large one built by "
                             "fixtures/build_corpus.py --large --out DIR (extra tuning material)")
    parser.add_argument("--speed", action="store_true", help="add the speed section (several minutes)")
    parser.add_argument("--world-accuracy", action="store_true",
                        help="with --world DIR: blind figures per family, instrument and condition (issue #20)")
    parser.add_argument("--engine-only", action="store_true",
                        help="run only the engine part of the speed section (engine vs scikit-learn, FLOP rate)")
    parser.add_argument("--memory-only", action="store_true",
                        help="run only the peak-memory part of the speed section (several minutes)")
    parser.add_argument("--rooms", action="store_true", help="add the rooms section (simulated rooms, dereverberation)")
    parser.add_argument("--rooms-only", action="store_true", help="run only the rooms section")
    parser.add_argument("--world", type=Path, default=None,
                        help="rooms section: also the room, distant and hall takes of the world corpus in this folder")
    parser.add_argument("--room-mode", choices=("reverberant", "auto"), default="reverberant",
                        help="rooms section: dereverberate always, or when the recording check finds reverberation")
    args = parser.parse_args(argv)
    if args.corpus is not None:
        global CORPUS
        if not (args.corpus / "index.json").is_file():
            print(f"bench: {args.corpus} has no index.json (build one with fixtures/build_corpus.py --large --out DIR)",
                  file=sys.stderr)
            return 2
        CORPUS = args.corpus
    if args.json:
        from takescribe.errors import OutputError
        from takescribe.safeio import check_writable

        try:
            check_writable(args.json, force=args.force)
        except OutputError as exc:
            print(f"bench: {exc}", file=sys.stderr)
            return 4

    if args.engine_only or args.memory_only:
        part = "engine" if args.engine_only else "memory"
        print(f"speed: {part}; {os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f}", flush=True)
        report = {"machine": {"python": platform.python_version(), "cpus": os.cpu_count(),
                              "load_average": os.getloadavg(), "platform": platform.platform()},
                  "speed": {part: speed_engine() if args.engine_only else speed_memory()}}
        report["machine"]["load_average_end"] = os.getloadavg()
        if args.json:
            from takescribe.safeio import write_text

            write_text(args.json, json.dumps(report, indent=1, default=float) + "\n", force=args.force)
            print(f"wrote {args.json}")
        return 0

    if args.rooms_only:
        report = {"machine": {"python": platform.python_version(), "cpus": os.cpu_count(),
                              "load_average": os.getloadavg(), "platform": platform.platform()},
                  "rooms": _rooms_section(args)}
        report["machine"]["load_average_end"] = os.getloadavg()
        if args.json:
            from takescribe.safeio import write_text

            write_text(args.json, json.dumps(report, indent=1, default=float) + "\n", force=args.force)
            print(f"wrote {args.json}")
        return 0

    entries = json.loads((CORPUS / "index.json").read_text())
    if args.split != "all":
        entries = [e for e in entries if e["split"] == args.split]
    if args.quick:
        entries = [next(e for e in entries if e["category"] == c) for c in CATEGORY_LABELS
                   if any(e["category"] == c for e in entries)]
    machine = {"python": platform.python_version(), "cpus": os.cpu_count(), "load_average": os.getloadavg(),
               "platform": platform.platform()}
    print(f"takescribe benchmark: {len(entries)} pieces ({args.split}); {os.cpu_count()} CPUs,"
          f" load average {os.getloadavg()[0]:.1f}", flush=True)

    # warm-up: the first transcription of a process pays librosa's imports and compilation
    _, _, load_take, transcribe_take, _ = _imports()
    t0 = time.perf_counter()
    y, sr = load_take(CORPUS / entries[0]["files"]["audio"])
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        transcribe_take(y[: 2 * sr], sr, instrument=entries[0]["instrument_program"])
    cold = time.perf_counter() - t0
    print(f"cold start (first 2 s transcription of the process): {cold:.1f} s\n", flush=True)

    t_all = time.perf_counter()
    rows = [run_piece(e) for e in entries]
    summary = summarize(rows)
    print_accuracy(rows, summary)
    whole = summary["all"]
    print(f"\nsummary: {len(rows)} pieces; onset F blind {whole['blind']['onset.f_measure']:.3f}, informed"
          f" {whole['informed']['onset.f_measure']:.3f}; RTF blind {whole['blind']['rtf']:.3f}, informed"
          f" {whole['informed']['rtf']:.3f}; {time.perf_counter() - t_all:.0f} s", flush=True)
    report = {"machine": machine, "split": args.split, "cold_start_seconds": cold, "pieces": rows,
              "categories": summary}
    if args.world is not None and args.world_accuracy:
        report["world"] = world_section(args.world, args.split)
    if args.rooms:
        report["rooms"] = _rooms_section(args)
    if args.speed:
        print("\nspeed: whole pipeline on long takes (concatenated piano pieces and parts)", flush=True)
        report["speed"] = {"pipeline": speed_pipeline()}
        print("speed: engine", flush=True)
        report["speed"]["engine"] = speed_engine()
        print("speed: peak memory (fresh subprocess per length)", flush=True)
        report["speed"]["memory"] = speed_memory()
        report["machine"]["load_average_end"] = os.getloadavg()
    if args.json:
        from takescribe.safeio import write_text

        write_text(args.json, json.dumps(report, indent=1, default=float) + "\n", force=args.force)
        print(f"wrote {args.json}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
