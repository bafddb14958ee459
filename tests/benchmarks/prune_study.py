"""How much work would active-set pruning of H skip? (issue #7, engine-speed target)

Usage::

    python tests/benchmarks/prune_study.py [--takes N]

The idea under study: after a warm-up of ``prune_after`` KL multiplicative updates
(W fixed), cut the frames into blocks of ``block`` frames and, in each block, set to
zero the pitch rows of H whose largest activation in the block is below ``level`` times
a reference (the block's largest pitch activation, or the largest of the whole H),
then run the products of that block on the kept rows only (``W[:, kept] @ H[kept]``
and ``W[:, kept].T @ R``). Multiplicative updates never revive a zero, so the pruned
rows stay out; the sets are re-checked every ``prune_after`` iterations. The noise
templates are always kept.

The updates here are a plain float32 numpy loop (the same rule as
:func:`takescribe.transcription.nmf.decompose`: ``H ← H ⊙ Wᵀ(V / max(WH, eps)) / (Σ_f W + mask term)``),
so the numbers do not depend on the engine's tiling. For each setting it prints

- ``kept``: the fraction of (pitch row, block) pairs still computed after the last
  pruning (what a pruned engine's gathered products would run, noise rows aside);
- ``madds``: the multiply-adds of the whole run relative to dense products (warm-up
  iterations at full size), to compare with the engine's banded tiles, which already
  run ~62 % of the dense multiply-adds on every iteration;
- ``banded``: the same for an ideal product that also runs each kept template over its
  own band of rows only (first to last non-zero bin; no cost per BLAS call), a bound
  on what pruning combined with banded tiles could reach;
- ``cost``: the change of the final KL cost D(V | W H) (full W, final H,
  :func:`takescribe.transcription.nmf.beta_divergence`) against the same loop without pruning.

Matrices: the engine benchmark's problem (``bench._problem``: a corpus piano take, 298
bins × 91 templates × ~2900 frames, constant start, 100 iterations, as in
``bench.speed_engine``) and the factorizations the pipeline runs on corpus takes
(captured from :func:`takescribe.transcription.blind.transcribe`: blind and score-informed,
first pass and the pass after template adaptation, with their masks, run here for all
of their 60 iterations where the pipeline may stop earlier at its tolerance).

Nothing here is collected by pytest (the file name has no ``test_`` prefix).
"""

from __future__ import annotations

import argparse
import json
import sys
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))
from bench import CORPUS, _problem  # noqa: E402

N_NOISE = 3  # the noise templates the transcription appends to W (always kept)


def _start(V, W, options):
    """H and the mask term as :func:`takescribe.transcription.nmf.decompose` builds them from its options."""
    K, T = W.shape[1], V.shape[1]
    eps = np.finfo(np.float32).eps
    if options.get("H_init") is not None:
        H = np.array(options["H_init"], np.float32)
    else:
        rng = np.random.default_rng(options.get("seed", 0))
        H = np.abs(rng.standard_normal((K, T))).astype(np.float32) * np.float32(np.sqrt(max(float(V.mean()), eps) / K))
    mask, mask_term = options.get("mask"), None
    if mask is not None:
        mask = np.asarray(mask, np.float32)
        H *= np.maximum(mask, np.float32(1e-3))
        if options.get("mask_penalty", 0.0) > 0:
            mask_term = (options["mask_penalty"] * (1.0 - np.minimum(mask, 1.0))).astype(np.float32)
    if options.get("H_init") is None:
        H = np.maximum(H, eps)
    return H, mask_term


def run(V, W, H, mask_term, n_iter, *, level=0.0, block=128, prune_after=10, reference="block"):
    """KL updates of H (W fixed), pruning as described above when ``level > 0``.

    Returns ``(H, kept, madds, banded)``: the final H, the fraction of (pitch row, block)
    pairs computed after the last pruning, and the multiply-adds of the run relative to
    dense products, for products on the kept rows (``madds``) and for an ideal product
    that also runs each kept template over its own band of rows only (``banded``: from
    its first to its last non-zero bin, no cost per call).
    """
    H = H.copy()
    eps = np.float32(np.finfo(np.float32).eps)
    colsum = W.sum(axis=0)[:, None]
    den = colsum if mask_term is None else colsum + mask_term
    den = np.maximum(den, eps)
    K, T = H.shape
    P = K - N_NOISE
    nonzero = W != 0
    band = np.where(nonzero.any(axis=0), W.shape[0] - np.argmax(nonzero[::-1], axis=0) - np.argmax(nonzero, axis=0), 0)
    alive = np.ones((K, T), bool)  # (row, frame) pairs computed
    kept, madds, banded = 1.0, 0.0, 0.0
    for it in range(n_iter):
        if level > 0 and it > 0 and it % prune_after == 0:
            pairs = []
            top = H[:P].max()
            for start in range(0, T, block):
                Hb = H[:P, start:start + block]
                ref = Hb.max() if reference == "block" else top
                Hb[Hb.max(axis=1) < level * ref] = 0.0
                rows = Hb.max(axis=1) > 0
                alive[:P, start:start + block] = rows[:, None]
                pairs.append(float(np.mean(rows)))
            kept = float(np.mean(pairs))
        madds += (kept * P + N_NOISE) / K
        banded += float(band @ alive.sum(axis=1)) / (W.shape[0] * K * T)
        Lam = np.maximum(W @ H, eps)
        H *= (W.T @ (V / Lam)) / den
    n = max(n_iter, 1)
    return H, kept, madds / n, banded / n


def _report(label, V, W, H, mask_term, n_iter, settings):
    from takescribe.transcription.nmf import beta_divergence

    exact, _, _, banded = run(V, W, H, mask_term, n_iter)
    cost = beta_divergence(V, W @ exact, 1.0)
    cells = [f"unpruned: banded {banded:.2f}"]
    for setting in settings:
        pruned, kept, madds, banded = run(V, W, H, mask_term, n_iter, **setting)
        change = (beta_divergence(V, W @ pruned, 1.0) - cost) / cost
        cells.append(f"{setting['level']:g}/{setting.get('block', 128)}/{setting.get('reference', 'block')[0]}:"
                     f" kept {kept:.2f} madds {madds:.2f} banded {banded:.2f} cost {100 * change:+.3f} %")
    print(f"{label:34s} " + " | ".join(cells), flush=True)


def pipeline_factorizations(n_takes: int):
    """The factorizations the transcription runs on ``n_takes`` corpus takes, blind and informed."""
    import takescribe.transcription.blind as transcription
    from takescribe.jobs.pipeline import load_take, transcribe_take
    from takescribe.reference.part import load_reference

    entries = json.loads((CORPUS / "index.json").read_text())
    entries = entries[:: max(1, len(entries) // max(n_takes, 1))][:n_takes]
    captured = []
    decompose = transcription.decompose

    def spy(V, W, **options):
        captured.append((np.array(V, np.float32), np.array(W, np.float32), dict(options)))
        return decompose(V, W, **options)

    transcription.decompose = spy
    try:
        for entry in entries:
            y, sr = load_take(CORPUS / entry["files"]["audio"])
            reference = load_reference(CORPUS / entry["files"]["score"])
            for mode in ("blind", "informed"):
                captured.clear()
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    transcribe_take(y, sr, instrument=entry["instrument_program"],
                                    reference=reference if mode == "informed" else None)
                for i, call in enumerate(captured):
                    yield f"{entry['name'][:22]} {mode} pass {i + 1}", call
    finally:
        transcription.decompose = decompose


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--takes", type=int, default=8, help="corpus takes whose factorizations are studied")
    args = parser.parse_args(argv)
    print("level/block/reference (b = the block's largest pitch activation, g = the whole H's):")
    V, W = _problem()
    K = W.shape[1]
    H0 = np.full((K, V.shape[1]), np.sqrt(V.mean() / K), np.float32)
    bench_settings = [dict(level=level, block=block, reference=reference)
                      for reference in ("block", "global") for level in (1e-3, 1e-2) for block in (32, 128)]
    for part in range(0, len(bench_settings), 4):
        _report("engine benchmark, 100 iterations", V, W, H0, None, 100, bench_settings[part:part + 4])
    pipeline_settings = [dict(level=1e-3), dict(level=1e-2)]
    for label, (V, W, options) in pipeline_factorizations(args.takes):
        H, mask_term = _start(V, W, options)
        _report(label, V, W, H, mask_term, options.get("n_iter", 60), pipeline_settings)
    return 0


if __name__ == "__main__":
    sys.exit(main())
