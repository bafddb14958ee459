"""Validate the recording check (takescribe.audio.check) on the world corpus' known conditions.

Usage::

    python tests/benchmarks/bench_check.py --corpus /work/cache/world [--split heldout] [--json out.json]

For every take of the split it runs :func:`check_recording` on the audio (AAC decoded by PyAV)
and compares with what the corpus builder planted:

- reverberation: the estimate against the RT60 that pyroomacoustics' ``measure_rt60`` found
  on the simulated room response (``condition_params.rt60_s``), for room, distant and hall
  takes; dry takes (every other condition but the phone) report what the check says
  (instrument releases, no room);
- bandwidth: phone takes against the band limit of the chain (``band_hz[1]``), others
  (wide band) against the Nyquist frequency;
- SNR: noise takes against the planted SNR (``snr_db``);
- clipping: each clean take clipped at 0.5 of its peak (hard, below full scale) against the
  same take unclipped;
- limits: how often each kind of finding is limited, per condition.

Tune ``CheckSettings`` on ``--split tuning`` only; report ``--split heldout``.
"""

from __future__ import annotations

import argparse
import json
import sys
from collections import defaultdict
from pathlib import Path

import numpy as np
import soundfile as sf

from takescribe.audio.check import check_recording, clipped_fraction

ROOMS = ("room", "distant", "hall")


def load(path: Path) -> tuple[np.ndarray, int]:
    if path.suffix == ".m4a":
        import av

        chunks = []
        with av.open(str(path)) as c:
            sr = c.streams.audio[0].rate
            for frame in c.decode(audio=0):
                chunks.append(frame.to_ndarray().mean(axis=0))
        return np.concatenate(chunks).astype(np.float64), sr
    y, sr = sf.read(str(path), dtype="float64")
    return y, sr


def run(corpus: Path, split: str) -> dict:
    manifest = json.loads((corpus / "manifest.json").read_text())
    rows = []
    for t in manifest["takes"]:
        if t["split"] != split:
            continue
        y, sr = load(corpus / t["files"]["audio"])
        c = check_recording(y, sr)
        row = {"id": t["id"], "condition": t["condition"], "instrument": t["instrument"],
               "rt60_est": c.rt60_s, "n_decays": c.n_decays, "snr_est": c.snr_db,
               "bandwidth_est": c.bandwidth_hz, "noise_floor_db": c.noise_floor_db,
               "clipped": c.clipped_fraction, "limited": sorted(c.limited_kinds()),
               "rt60_ref": t["condition_params"].get("rt60_s"), "snr_ref": t["condition_params"].get("snr_db"),
               "band_ref": (t["condition_params"].get("band_hz") or [None, sr / 2])[1]}
        if t["condition"] == "clean":
            yc = np.clip(y, -0.5 * np.abs(y).max(), 0.5 * np.abs(y).max())
            row["clipped_when_clipped"] = clipped_fraction(yc)
            row["clipped_reference"] = float(np.mean(np.abs(y) >= 0.5 * np.abs(y).max()))
        rows.append(row)
    return summarize(rows, split)


def _stats(err: np.ndarray) -> dict:
    if not len(err):
        return {"n": 0}
    return {"n": int(len(err)), "median_abs": round(float(np.median(np.abs(err))), 3),
            "p90_abs": round(float(np.percentile(np.abs(err), 90)), 3),
            "bias": round(float(np.median(err)), 3)}


def summarize(rows: list[dict], split: str) -> dict:
    out: dict = {"split": split, "takes": len(rows)}
    rev = [r for r in rows if r["condition"] in ROOMS]
    est = [r for r in rev if r["rt60_est"] is not None]
    out["rt60"] = {
        "coverage": f"{len(est)}/{len(rev)}",
        "relative_error": _stats(np.array([r["rt60_est"] / r["rt60_ref"] - 1 for r in est])),
        "per_condition": {c: _stats(np.array([r["rt60_est"] - r["rt60_ref"] for r in est if r["condition"] == c]))
                          for c in ROOMS},
        "hall_ge_2s_flagged_lengths": f"{sum('held_short' in r['limited'] for r in rev if r['rt60_ref'] >= 2.0)}"
                                      f"/{sum(r['rt60_ref'] >= 2.0 for r in rev)}",
    }
    dry = [r for r in rows if r["condition"] not in ROOMS + ("phone",)]
    dry_est = np.array([r["rt60_est"] for r in dry if r["rt60_est"] is not None])
    out["rt60_dry"] = {"coverage": f"{len(dry_est)}/{len(dry)}",
                       "median_s": round(float(np.median(dry_est)), 3) if len(dry_est) else None,
                       "p90_s": round(float(np.percentile(dry_est, 90)), 3) if len(dry_est) else None,
                       "lengths_limited": f"{sum('held_short' in r['limited'] for r in dry)}/{len(dry)}"}
    phone = [r for r in rows if r["condition"] == "phone"]
    out["bandwidth_phone"] = _stats(np.array([r["bandwidth_est"] - r["band_ref"] for r in phone]))
    wide = [r for r in rows if r["condition"] != "phone"]
    out["bandwidth_wide_below_8k"] = f"{sum(r['bandwidth_est'] < 8000 for r in wide)}/{len(wide)}"
    out["bandwidth_phone_below_9k"] = f"{sum(r['bandwidth_est'] < 9000 for r in phone)}/{len(phone)}"
    noise = [r for r in rows if r["condition"] == "noise"]
    out["snr_noise"] = _stats(np.array([r["snr_est"] - r["snr_ref"] for r in noise]))
    clean = [r for r in rows if "clipped_when_clipped" in r]
    out["clipping"] = {
        "clean_max_fraction": max((r["clipped"] for r in clean), default=None),
        "clipped_detected": f"{sum(r['clipped_when_clipped'] > 0.001 for r in clean)}/{len(clean)}",
        "relative_error": _stats(np.array([r["clipped_when_clipped"] / max(r["clipped_reference"], 1e-9) - 1
                                           for r in clean])),
    }
    limits: dict = defaultdict(lambda: defaultdict(int))
    for r in rows:
        limits[r["condition"]]["takes"] += 1
        for k in r["limited"]:
            limits[r["condition"]][k] += 1
    out["limits_per_condition"] = {c: dict(v) for c, v in sorted(limits.items())}
    out["rows"] = rows
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--corpus", type=Path, default=Path("/work/cache/world"))
    ap.add_argument("--split", choices=("tuning", "heldout"), default="heldout")
    ap.add_argument("--json", type=Path, default=None)
    ap.add_argument("--rows", action="store_true", help="print every take")
    args = ap.parse_args(argv)
    res = run(args.corpus, args.split)
    if args.rows:
        for r in res["rows"]:
            print(f"{r['id']:34s} {r['condition']:8s} {r['instrument'][:8]:8s} rt60 {r['rt60_ref'] or 0:5.2f} "
                  f"est {r['rt60_est'] if r['rt60_est'] is not None else float('nan'):5.2f} ({r['n_decays']:2d}) "
                  f"bw {r['bandwidth_est']:7.0f} ref {r['band_ref']:6.0f} snr {r['snr_est']:6.1f} "
                  f"ref {r['snr_ref'] if r['snr_ref'] is not None else float('nan'):5.1f} {','.join(r['limited'])}")
    summary = {k: v for k, v in res.items() if k != "rows"}
    print(json.dumps(summary, indent=1))
    if args.json:
        args.json.write_text(json.dumps(res, indent=1))
    return 0


if __name__ == "__main__":
    sys.exit(main())
