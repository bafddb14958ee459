"""Products with a banded dictionary: W·H and Wᵀ·X skipping the exact zeros of harmonic templates.

Harmonic templates are zero below their fundamental and above their last partial, so a
dictionary of them is banded. :func:`_plan_tiling` cuts such a W into a few dense tiles (row
blocks × the column range they meet, the broadband columns apart), chosen once by a cost model
of BLAS calls, and each product runs one BLAS call per tile into its slice of the output.
Only exact zeros are skipped, so the result is the dense one up to the order of float
additions. A dictionary with under ``MIN_TILED_SAVING`` zeros (learned, random) keeps the
dense products. Measured on a piano take with the piano dictionary (298 bins × 91 templates):
the tiles hold ~63 % of the dense multiply-adds and the products take ~80 % of the dense time
(smaller BLAS calls run at a lower rate).

Used by :func:`takescribe.transcription.nmf.decompose`; private to it.
"""

from __future__ import annotations

import hashlib
import threading
from dataclasses import dataclass

import numpy as np

#: Per-call cost of one BLAS product and the one-thread float32 rate it is traded against
#: (OpenBLAS on the development machine: ~3 µs per call, ~45·10⁹ multiply-adds per second).
#: Only their ratio matters, and only roughly: it keeps tiles from getting so small that
#: call overheads eat what they save.
_CALL_SECONDS = 3e-6
_MADDS_PER_SECOND = 45e9
#: A tile is charged these many rows and columns beyond its shape: BLAS runs products with
#: few output rows or a short inner dimension below its peak rate (measured, one thread,
#: 1446 frames: 4-8 output rows × 190 at 40-65 % of the rate of 40 × 60; 40 × 3 at ~55 %).
_SHORT_ROWS = 6
_NARROW_COLUMNS = 3
#: Multiply-add equivalents per element of adding a partial product into its block.
_ACCUMULATE_COST = 4
#: The tiling must save at least this fraction of the dense multiply-adds (and some modelled
#: time), else the products stay dense.
MIN_TILED_SAVING = 0.25
#: Candidate block boundaries per axis (the planner's work grows with their square).
_MAX_BOUNDARIES = 12
#: Tallest block of the tiling.
_MAX_BLOCK_ROWS = 64


@dataclass(frozen=True)
class _Tiling:
    """Dense tiles covering the non-zero entries of a fixed dictionary W.

    ``model`` serves ``W @ X`` and ``adjoint`` serves ``W.T @ X``. Each is a tuple of
    output blocks ``(i0, i1, tiles)``: rows ``i0:i1`` of the product are the sum over
    ``tiles`` of ``A @ X[j0:j1]`` with ``A`` a contiguous copy of the block of W (or Wᵀ)
    at rows ``i0:i1``, columns ``j0:j1``. Every non-zero of W lies in exactly one tile of
    each, so the products equal the dense ones up to the order of float additions.
    """

    model: tuple
    adjoint: tuple
    accumulator_rows: int
    madds_per_frame: int
    dense_madds_per_frame: int


def _runs(support: np.ndarray, rows: int, call_cost: float) -> tuple[list[tuple[int, int]], float]:
    """Contiguous column runs covering ``support``, merged where a gap costs less than a tile; their cost."""
    edges = np.flatnonzero(np.diff(np.concatenate(([0], support.astype(np.int8), [0]))))
    tall = rows + _SHORT_ROWS
    merged: list[list[int]] = []
    for start, stop in zip(edges[::2].tolist(), edges[1::2].tolist()):
        if merged and (start - merged[-1][1]) * tall < call_cost + _NARROW_COLUMNS * tall + _ACCUMULATE_COST * rows:
            merged[-1][1] = stop
        else:
            merged.append([start, stop])
    if not merged:
        return [], float(rows)  # a block of zeros: one fill
    cost = sum(tall * (stop - start + _NARROW_COLUMNS) + call_cost for start, stop in merged)
    cost += _ACCUMULATE_COST * rows * (len(merged) - 1)
    return [(start, stop) for start, stop in merged], cost


def _plan_blocks(nonzero: np.ndarray, call_cost: float) -> tuple[list, float]:
    """Row blocks of ``nonzero`` (M, N) and their column runs minimising the modelled cost.

    Dynamic programming over block boundaries on a regular grid of at most
    ``_MAX_BOUNDARIES`` candidates; the cost of a block of m rows is, per run of width w,
    ``(m + _SHORT_ROWS)·(w + _NARROW_COLUMNS) + call_cost``, plus ``_ACCUMULATE_COST·m``
    per run after the first (its partial product is added into the block).
    """
    M, N = nonzero.shape
    counts = np.zeros((M + 1, N), np.int32)
    np.cumsum(nonzero, axis=0, out=counts[1:])
    step = max(1, -(-M // _MAX_BOUNDARIES))
    bounds = list(range(0, M, step)) + [M]
    best = [0.0] + [np.inf] * (len(bounds) - 1)
    choice: list = [None] * len(bounds)
    for j in range(1, len(bounds)):
        for i in range(j - 1, -1, -1):
            rows = bounds[j] - bounds[i]
            if rows > _MAX_BLOCK_ROWS and i < j - 1:
                break
            runs, cost = _runs(counts[bounds[j]] > counts[bounds[i]], rows, call_cost)
            if best[i] + cost < best[j]:
                best[j], choice[j] = best[i] + cost, (i, runs)
    blocks, j = [], len(bounds) - 1
    while j > 0:
        i, runs = choice[j]
        blocks.append((bounds[i], bounds[j], runs))
        j = i
    return blocks[::-1], best[-1]


#: Block plans already made, by (shape, non-zero pattern, frames rounded down to a power of two):
#: a transcription factorizes with the same dictionary pattern several times (first pass, adapted
#: templates, blocks of a long take); a plan takes a few milliseconds (~1.5 ms for 298 × 91).
_PLANS: dict = {}
_PLANS_LOCK = threading.Lock()
_MAX_PLANS = 16


def _plan_for(nonzero: np.ndarray, n_frames: int):
    """``(model blocks, adjoint blocks)`` for a pattern, or None when tiling cannot pay; cached."""
    F, K = nonzero.shape
    frames = 1 << (int(n_frames).bit_length() - 1)
    key = (F, K, frames, hashlib.blake2b(np.packbits(nonzero).tobytes(), digest_size=16).digest())
    with _PLANS_LOCK:
        if key in _PLANS:
            return _PLANS[key]
    call_cost = _CALL_SECONDS * _MADDS_PER_SECOND / frames  # in multiply-adds per frame
    model, model_cost = _plan_blocks(nonzero, call_cost)
    adjoint, adjoint_cost = _plan_blocks(nonzero.T, call_cost)
    dense_cost = (F + _SHORT_ROWS) * (K + _NARROW_COLUMNS) + (K + _SHORT_ROWS) * (F + _NARROW_COLUMNS) + 2 * call_cost
    madds = _area(model) + _area(adjoint)
    plan = None
    if madds <= (1.0 - MIN_TILED_SAVING) * 2 * F * K and model_cost + adjoint_cost < dense_cost:
        plan = (model, adjoint)
    with _PLANS_LOCK:
        if len(_PLANS) >= _MAX_PLANS:
            _PLANS.pop(next(iter(_PLANS)))
        _PLANS[key] = plan
    return plan


def _area(blocks) -> int:
    return sum((i1 - i0) * (j1 - j0) for i0, i1, runs in blocks for j0, j1 in runs)


def _plan_tiling(W: np.ndarray, n_frames: int) -> _Tiling | None:
    """Tiles for the products with a banded dictionary, or None when dense products are as cheap.

    Harmonic templates are zero below their fundamental's lobe and above their last
    partial's, so each band of frequency rows meets only a range of templates (and the
    broadband noise templates), and each template only a band of rows. Only exact zeros
    are skipped: the tiled products are the dense ones summed in another order.
    ``n_frames`` (the frames each product spans) sets how much a BLAS call's overhead
    weighs against the multiply-adds it saves. None (dense products) unless the tiles
    hold at most ``1 − MIN_TILED_SAVING`` of W's entries and the cost model expects
    them to be faster, e.g. for a learned or random W.
    """
    F, K = W.shape
    if F == 0 or K == 0 or n_frames == 0:
        return None
    nonzero = W != 0
    if np.count_nonzero(nonzero) > (1.0 - MIN_TILED_SAVING) * F * K:
        return None  # not enough zeros to skip, whatever their layout
    plan = _plan_for(nonzero, n_frames)
    if plan is None:
        return None
    model, adjoint = plan

    def tiles(blocks, A):
        return tuple((i0, i1, tuple((j0, j1, np.ascontiguousarray(A[i0:i1, j0:j1])) for j0, j1 in runs))
                     for i0, i1, runs in blocks)

    accumulator_rows = max([i1 - i0 for i0, i1, runs in model + adjoint if len(runs) > 1], default=0)
    return _Tiling(model=tiles(model, W), adjoint=tiles(adjoint, W.T), accumulator_rows=accumulator_rows,
                   madds_per_frame=_area(model) + _area(adjoint), dense_madds_per_frame=2 * F * K)


def _tiled_product(blocks: tuple, X: np.ndarray, out: np.ndarray, scratch: np.ndarray | None) -> None:
    """``out = A @ X`` for the matrix A whose tiles are ``blocks`` (see :class:`_Tiling`)."""
    for i0, i1, tiles in blocks:
        target = out[i0:i1]
        if not tiles:
            target.fill(0)
            continue
        j0, j1, A = tiles[0]
        np.matmul(A, X[j0:j1], out=target)
        for j0, j1, A in tiles[1:]:
            part = scratch[: i1 - i0]
            np.matmul(A, X[j0:j1], out=part)
            target += part


def _model_product(W, H, out, tiling, scratch) -> None:
    """``out = W @ H``, tiled when a tiling is given."""
    if tiling is None:
        np.matmul(W, H, out=out)
    else:
        _tiled_product(tiling.model, H, out, scratch)


def _adjoint_product(W, X, out, tiling, scratch) -> None:
    """``out = W.T @ X``, tiled when a tiling is given."""
    if tiling is None:
        np.matmul(W.T, X, out=out)
    else:
        _tiled_product(tiling.adjoint, X, out, scratch)


def _accumulator(tiling, n_frames, dtype):
    """The accumulation buffer a tiling needs for ``n_frames`` frames (None if it needs none)."""
    if tiling is None or tiling.accumulator_rows == 0:
        return None
    return np.empty((tiling.accumulator_rows, n_frames), dtype)
