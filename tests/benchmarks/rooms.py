"""The rooms section of the benchmark (``bench.py --rooms``): takes in simulated rooms.

Each piano and melody piece of the chosen split of the fixture corpus is played in five
simulated shoebox rooms (pyroomacoustics image-source model, absorption from Sabine's
formula for a target RT60; the RT60 reported is the one measured on the simulated response
by ``pyroomacoustics.experimental.measure_rt60``, Schroeder backward integration, T30 as in
ISO 3382-1). The response is cut at its direct-path peak, so the ground truth's onsets do not
move, and the reverberant take is scaled to the dry take's peak.

Every take is transcribed blind and with its part (as ``bench.py`` does) three ways:
the dry take (today's chain: the reference for the speed ratio), the reverberant take as
the chain was (``room="dry"``: no dereverberation) and the reverberant take dereverberated
(``room`` of ``--room-mode``, ``reverberant`` by default: always, ``auto``: when the recording
check finds the room reverberant). Scores follow mir_eval conventions
(:func:`takescribe.evaluation.metrics.evaluate_notes`: onset F with a 50 ms window).

Room geometries differ between the splits (source and microphone placed by a seed of the
split), so held-out figures come from other pieces in other rooms of the same sizes.
"""

from __future__ import annotations

import json
import time
import warnings
from pathlib import Path

import numpy as np

ROOMS = (  # name, target RT60 (s), room size (m), microphone distance (m)
    ("small room, near", 0.3, (5.0, 4.0, 3.0), 1.0),
    ("small room, distant", 0.6, (7.0, 5.5, 3.0), 3.5),
    ("live room", 1.0, (10.0, 7.0, 3.5), 2.0),
    ("hall, near", 2.0, (22.0, 15.0, 9.0), 3.0),
    ("hall, distant", 2.5, (28.0, 20.0, 11.0), 8.0),
)
SPLIT_SEED = {"tuning": 1, "heldout": 2}
TAIL_SECONDS = 0.5


def room_response(rt60: float, size, distance: float, *, sr: int, seed: int) -> tuple[np.ndarray, float]:
    """Impulse response of a simulated room, cut at its direct-path peak (peak 1), and its measured RT60.

    The target given to Sabine's formula is corrected (up to three times) until the measured
    RT60 is within 5 % of ``rt60``.
    """
    import pyroomacoustics as pra

    rng = np.random.default_rng(seed)
    src = np.array([size[0] * (0.25 + 0.1 * rng.random()), size[1] * (0.4 + 0.2 * rng.random()), 1.2])
    angle = rng.uniform(-0.5, 0.5)
    mic = src + np.array([distance * np.cos(angle), distance * np.sin(angle), 0.3])
    target = rt60
    for _ in range(4):
        absorption, max_order = pra.inverse_sabine(target, size)
        room = pra.ShoeBox(list(size), fs=sr, materials=pra.Material(absorption), max_order=max_order)
        room.add_source(src)
        room.add_microphone(mic)
        room.compute_rir()
        h = np.asarray(room.rir[0][0], float)
        measured = float(pra.experimental.measure_rt60(h, fs=sr, decay_db=30))
        if abs(measured - rt60) <= 0.05 * rt60:
            break
        target *= rt60 / measured
    peak = int(np.argmax(np.abs(h)))
    return h[peak:] / abs(h[peak]), measured


def in_room(y: np.ndarray, h: np.ndarray, sr: int) -> np.ndarray:
    """``y`` convolved with ``h``, with a tail of :data:`TAIL_SECONDS`, at ``y``'s peak level."""
    from scipy.signal import fftconvolve

    wet = fftconvolve(y.astype(np.float64), h)[: len(y) + int(TAIL_SECONDS * sr)]
    return (wet * (np.abs(y).max() / max(np.abs(wet).max(), 1e-12))).astype(np.float32)


def _score(truth, y, sr, entry, reference, *, room: str) -> dict:
    from takescribe.evaluation.metrics import evaluate_notes
    from takescribe.jobs.pipeline import transcribe_take

    out = {}
    for mode in ("blind", "informed"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            t0 = time.perf_counter()
            result, _ = transcribe_take(y, sr, instrument=entry["instrument_program"], room=room,
                                        reference=reference if mode == "informed" else None)
            elapsed = time.perf_counter() - t0
        scores = evaluate_notes(truth, result.notes)
        out[mode] = {"onset.f_measure": float(scores["onset.f_measure"]),
                     "onset.precision": float(scores["onset.precision"]),
                     "onset.recall": float(scores["onset.recall"]),
                     "onset_offset.f_measure": float(scores["onset_offset.f_measure"]),
                     "seconds": elapsed, "audio_seconds": len(y) / sr}
    return out


def run_rooms(corpus: Path, entries: list[dict], *, room_mode: str = "reverberant") -> dict:
    """Score every entry dry and in every room of :data:`ROOMS`, without and with dereverberation."""
    from takescribe.export.noteio import read_maps
    from takescribe.jobs.pipeline import load_take
    from takescribe.reference.part import load_reference

    rows = []
    responses = {}
    for entry in entries:
        files = entry["files"]
        y, sr = load_take(corpus / files["audio"])
        truth = read_maps(corpus / files["notes"])
        reference = load_reference(corpus / files["score"])
        dry = _score(truth, y, sr, entry, reference, room="dry")
        for k, (name, rt60, size, distance) in enumerate(ROOMS):
            key = (entry["split"], name)
            if key not in responses:
                responses[key] = room_response(rt60, size, distance, sr=sr, seed=100 * SPLIT_SEED[entry["split"]] + k)
            h, measured = responses[key]
            wet = in_room(y, h, sr)
            row = {"piece": entry["name"], "split": entry["split"], "category": entry["category"], "room": name, "rt60_s": measured,
                   "mic_distance_m": distance, "dry": dry,
                   "as_recorded": _score(truth, wet, sr, entry, reference, room="dry"),
                   "dereverberated": _score(truth, wet, sr, entry, reference, room=room_mode)}
            rows.append(row)
            print(f"  {entry['name']:28s} {name:20s} RT60 {measured:4.2f} s  blind "
                  f"{row['as_recorded']['blind']['onset.f_measure']:.3f} -> "
                  f"{row['dereverberated']['blind']['onset.f_measure']:.3f}   with part "
                  f"{row['as_recorded']['informed']['onset.f_measure']:.3f} -> "
                  f"{row['dereverberated']['informed']['onset.f_measure']:.3f}", flush=True)
    return {"room_mode": room_mode, "rows": rows, "summary": summarize_rooms(rows)}


def _pooled_rtf(cells: list[dict]) -> float:
    return sum(c["seconds"] for c in cells) / max(sum(c["audio_seconds"] for c in cells), 1e-9)


def summarize_rooms(rows: list[dict], *, dry_cells: dict | None = None, names=None) -> dict:
    """Mean onset F per room (and for rooms RT60 <= 1 s, halls >= 2 s) and pooled RTF ratios.

    ``dry_cells`` (take -> blind and informed scores) default to the rows' own dry takes."""
    names = names or [name for name, *_ in ROOMS]
    groups = {name: [r for r in rows if r["room"] == name] for name in names}
    groups["rooms RT60 <= 1 s"] = [r for r in rows if r["rt60_s"] <= 1.05]
    groups["halls RT60 >= 2 s"] = [r for r in rows if r["rt60_s"] >= 1.95]
    summary = {}
    for name, group in groups.items():
        if not group:
            continue
        block = {"takes": len(group), "rt60_s": float(np.mean([r["rt60_s"] for r in group])),
                 "mic_distance_m": sorted({r["mic_distance_m"] for r in group})}
        for way in ("as_recorded", "dereverberated"):
            for mode in ("blind", "informed"):
                block[f"{way}.{mode}.onset_f"] = float(np.mean([r[way][mode]["onset.f_measure"] for r in group]))
                block[f"{way}.{mode}.onset_offset_f"] = float(np.mean([r[way][mode]["onset_offset.f_measure"]
                                                                       for r in group]))
        summary[name] = block
    if dry_cells is None:
        dry_cells = {r["piece"]: r["dry"] for r in rows}
    for mode in ("blind", "informed"):
        dry = _pooled_rtf([c[mode] for c in dry_cells.values()])
        recorded = _pooled_rtf([r["as_recorded"][mode] for r in rows])
        derev = _pooled_rtf([r["dereverberated"][mode] for r in rows])
        summary[f"rtf.{mode}"] = {"dry_takes": dry, "rooms_as_recorded": recorded, "rooms_dereverberated": derev,
                                  "ratio_to_dry": derev / dry, "ratio_to_as_recorded": derev / recorded}
        summary[f"dry.{mode}.onset_f"] = float(np.mean([c[mode]["onset.f_measure"] for c in dry_cells.values()]))
    return summary


def print_rooms(report: dict) -> None:
    summary = report["summary"]
    print(f"\n{'room':22s} {'RT60':>5s} {'mic m':>6s}  {'blind':>13s}  {'with part':>13s}   (onset F: as recorded -> "
          f"dereverberated, room={report['room_mode']})")
    for name, block in summary.items():
        if not isinstance(block, dict) or "takes" not in block:
            continue
        mics = ",".join(f"{d:g}" for d in block["mic_distance_m"])
        print(f"{name:22s} {block['rt60_s']:5.2f} {mics:>6s}  "
              f"{block['as_recorded.blind.onset_f']:.3f} -> {block['dereverberated.blind.onset_f']:.3f}  "
              f"{block['as_recorded.informed.onset_f']:.3f} -> {block['dereverberated.informed.onset_f']:.3f}"
              f"   ({block['takes']} takes)")
    for mode in ("blind", "informed"):
        rtf = summary[f"rtf.{mode}"]
        print(f"RTF {mode:8s}: dry takes {rtf['dry_takes']:.3f}, rooms as recorded {rtf['rooms_as_recorded']:.3f},"
              f" dereverberated {rtf['rooms_dereverberated']:.3f} (x{rtf['ratio_to_dry']:.2f} of the dry takes,"
              f" x{rtf['ratio_to_as_recorded']:.2f} of the same takes without); dry onset F"
              f" {summary[f'dry.{mode}.onset_f']:.3f}", flush=True)


def room_entries(corpus: Path, split: str, *, quick: bool = False) -> list[dict]:
    """The piano and melody pieces of ``split`` (two of each with ``quick``)."""
    entries = [e for e in json.loads((corpus / "index.json").read_text())
               if e["category"] in ("piano", "melody") and (split == "all" or e["split"] == split)]
    if quick:
        entries = [e for c in ("piano", "melody") for e in [x for x in entries if x["category"] == c][:2]]
    return entries


# ----------------------------------------------------------------------------- the world corpus


WORLD_ROOMS = ("room", "distant", "hall")


def run_world(folder: Path, split: str, *, room_mode: str = "auto") -> dict:
    """The world corpus' room, distant and hall takes of ``split`` (``build_world.py``), as recorded
    and with ``room=room_mode``, blind and with the part; its clean takes of the split are the dry
    reference for the speed ratio. RT60 and microphone distance are the manifest's."""
    from takescribe.export.noteio import read_maps
    from takescribe.jobs.pipeline import load_take
    from takescribe.reference.part import load_reference

    takes = [t for t in json.loads((folder / "manifest.json").read_text())["takes"] if t["split"] == split
             and t["condition"] in WORLD_ROOMS + ("clean",)]
    rows, dry_cells = [], {}
    for take in takes:
        files = take["files"]
        y, sr = load_take(folder / files["audio"])
        truth = read_maps(folder / files["played"])
        reference = load_reference(folder / files["part"])
        entry = {"instrument_program": take["instrument"]}
        if take["condition"] == "clean":
            dry_cells[take["id"]] = _score(truth, y, sr, entry, reference, room="dry")
            continue
        params = take["condition_params"]
        row = {"piece": take["id"], "split": split, "category": take["family"], "instrument": take["instrument"],
               "room": take["condition"], "rt60_s": float(params["rt60_s"]),
               "mic_distance_m": float(params["mic_distance_m"]),
               "as_recorded": _score(truth, y, sr, entry, reference, room="dry"),
               "dereverberated": _score(truth, y, sr, entry, reference, room=room_mode)}
        rows.append(row)
        print(f"  {take['id']:34s} {take['condition']:8s} RT60 {row['rt60_s']:4.2f} s, mic {row['mic_distance_m']:4.2f} m"
              f"  blind {row['as_recorded']['blind']['onset.f_measure']:.3f} -> "
              f"{row['dereverberated']['blind']['onset.f_measure']:.3f}   with part "
              f"{row['as_recorded']['informed']['onset.f_measure']:.3f} -> "
              f"{row['dereverberated']['informed']['onset.f_measure']:.3f}", flush=True)
    for row in rows:
        row["dry"] = None
    return {"room_mode": room_mode, "rows": rows, "dry": dry_cells,
            "summary": summarize_rooms(rows, dry_cells=dry_cells, names=WORLD_ROOMS)}
