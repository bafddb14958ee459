"""The alignment's dynamic programme: banded DTW with pauses, jumps back and free ends.

See :mod:`takescribe.alignment.align` (Method, steps 3 and 4).
"""

from __future__ import annotations

import numpy as np
from scipy.ndimage import maximum_filter1d

from .settings import SETTINGS

__all__: list[str] = []

_START, _DIAG, _FAST, _SLOW, _PAUSE, _JUMP = range(6)


def pool(features: np.ndarray, factor: int, *, how: str) -> np.ndarray:
    n = features.shape[0]
    m = -(-n // factor)
    pad = np.concatenate([features, np.repeat(features[-1:], m * factor - n, axis=0)]) if m * factor > n else features
    blocks = pad.reshape(m, factor, -1)
    if how == "max":
        return blocks.max(axis=1)
    pooled = blocks.sum(axis=1)
    return pooled / np.maximum(np.linalg.norm(pooled, axis=1, keepdims=True), 1e-12)


def _landing_cost(score_onset: np.ndarray, jump_penalty: float) -> np.ndarray:
    """Extra jump cost per score frame: none on a note onset, half the jump penalty elsewhere.

    A player who goes back starts again on a note, so a jump should land on an onset.
    """
    norm = np.linalg.norm(score_onset, axis=1)
    rise = np.clip(np.diff(norm, prepend=0.0), 0.0, None)
    rise = maximum_filter1d(rise, size=3) / max(float(rise.max()), 1e-12)
    return 0.5 * jump_penalty * (1.0 - np.clip(rise * 2.0, 0.0, 1.0))


def dtw(score_chroma, score_onset, take_chroma, take_onset, take_sounding, lo, hi, *, frame_rate: float,
         onset_weight: float = 1.0, block: int = 256, allow_jump: np.ndarray | None = None,
         allow_end: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray, float]:
    """Banded DTW with pauses, jumps back and free ends; returns (rows, cols, total cost).

    ``lo[j]:hi[j]`` are the score rows allowed at take column ``j``; ``allow_jump[j]`` and
    ``allow_end[j]`` (default everywhere) say where a jump back may arrive and where the
    path may end (the fine pass allows them only near the coarse path's). Costs are
    computed a block of columns at a time (one matrix product per block), so
    memory stays proportional to the band.
    """
    n_rows = score_chroma.shape[0]
    n_cols = take_chroma.shape[0]
    inf = np.inf
    jump_penalty = SETTINGS.jump_seconds * frame_rate
    pre, post, skip_before, skip_after = _free_end_costs(take_sounding, n_rows)
    s_chroma = score_chroma.astype(np.float64)
    s_onset = score_onset.astype(np.float64)
    so_sq = (s_onset**2).sum(axis=1)
    landing = _landing_cost(s_onset, jump_penalty)

    pad = 2
    prev1 = np.full(n_rows + pad, inf)
    prev2 = np.full(n_rows + pad, inf)
    band1 = (0, 0)
    band2 = (0, 0)
    codes: list[np.ndarray] = []
    sources: dict[int, np.ndarray] = {}  # jump columns: record rows of the previous column
    best_end = (inf, -1, -1)
    cands = np.empty((6, n_rows))
    positions = np.arange(n_rows)
    if allow_jump is None:
        allow_jump = np.ones(n_cols, dtype=bool)
    if allow_end is None:
        allow_end = np.ones(n_cols, dtype=bool)
    block_cost = None
    block_lo = 0
    for j in range(n_cols):
        if j % block == 0:
            stop = min(j + block, n_cols)
            block_lo = int(lo[j:stop].min())
            block_cost = _block_cost(s_chroma, s_onset, so_sq, take_chroma[j:stop], take_onset[j:stop],
                                     block_lo, int(hi[j:stop].max()), onset_weight)
        l, h = int(lo[j]), int(hi[j])
        n = h - l
        c = block_cost[j % block, l - block_lo:h - block_lo]
        cand = cands[:, :n]
        np.add(pre[j] + skip_before[l:h], c, out=cand[_START])
        if j < 2:
            cand[_DIAG:] = inf
        if j >= 1:
            np.add(prev1[l + pad - 1:h + pad - 1], c, out=cand[_DIAG])
            np.add(prev1[l + pad - 2:h + pad - 2], c, out=cand[_FAST])
            np.add(prev1[l + pad:h + pad], c + SETTINGS.pause_cost, out=cand[_PAUSE])
            lp, hp = band1
            if hp > lp and allow_jump[j]:
                cand[_JUMP] = _jump_from_later(prev1[lp + pad:hp + pad], lp, l, h) + (jump_penalty + c) + landing[l:h]
            else:
                cand[_JUMP] = inf
        if j >= 2:
            cand[_SLOW] = prev2[l + pad - 1:h + pad - 1] + 2.0 * c
        code = np.argmin(cand, axis=0).astype(np.int8)
        best = cand[code, positions[:n]]
        if j >= 1 and band1[1] > band1[0] and allow_jump[j]:
            jumped = code == _JUMP
            if jumped.any():
                lp, hp = band1
                sources[j] = _records(prev1[lp + pad:hp + pad], lp)
        # roll the column buffers, clearing only the band that was written two columns ago
        lp2, hp2 = band2
        prev2[lp2 + pad:hp2 + pad] = inf
        prev2, prev1 = prev1, prev2
        band2, band1 = band1, (l, h)
        prev1[l + pad:h + pad] = best
        codes.append(code)
        if allow_end[j]:
            end_cost = best + skip_after[l:h] + post[j]
            k = int(np.argmin(end_cost))
            if end_cost[k] < best_end[0]:
                best_end = (float(end_cost[k]), l + k, j)
    total, i, j = best_end
    if not np.isfinite(total):
        return np.zeros(0, dtype=int), np.zeros(0, dtype=int), float("inf")
    rows, cols = _backtrack(codes, sources, lo, i, j)
    return rows, cols, total


def _free_end_costs(take_sounding, n_rows: int):
    """Costs of the free ends: sounding take frames before/after the path, score frames skipped."""
    sounding = np.asarray(take_sounding, dtype=float)
    pre = np.concatenate([[0.0], np.cumsum(SETTINGS.unaligned_cost * sounding)[:-1]])
    post = (SETTINGS.unaligned_cost * sounding)[::-1].cumsum()[::-1] - SETTINGS.unaligned_cost * sounding
    skip_before = SETTINGS.skip_cost * np.arange(n_rows, dtype=float)
    skip_after = SETTINGS.skip_cost * (n_rows - 1 - np.arange(n_rows, dtype=float))
    return pre, post, skip_before, skip_after


def _block_cost(s_chroma, s_onset, so_sq, take_chroma, take_onset, block_lo: int, block_hi: int,
                onset_weight: float) -> np.ndarray:
    """Cost (n_columns, n_rows) of a block of take columns against score rows ``block_lo:block_hi``:
    cosine distance of the chroma plus the weighted Euclidean distance of the onset features."""
    tc = take_chroma.astype(np.float64)
    to = take_onset.astype(np.float64)
    cross = s_onset[block_lo:block_hi] @ to.T
    dist = so_sq[block_lo:block_hi, None] + (to**2).sum(axis=1)[None, :] - 2.0 * cross
    block_cost = (1.0 - s_chroma[block_lo:block_hi] @ tc.T) + onset_weight * np.sqrt(np.maximum(dist, 0.0))
    return np.ascontiguousarray(block_cost.T)


def _jump_from_later(vals: np.ndarray, lp: int, l: int, h: int) -> np.ndarray:
    """For rows ``l:h``, the least cost of the previous column at any later row (``vals`` holds
    rows ``lp:``); inf where there is none."""
    rev = vals[::-1]
    acc = np.minimum.accumulate(rev)
    q = np.clip(np.arange(l + 1, h + 1) - lp, 0, None)
    valid = q < rev.size
    suffix_min = acc[::-1]
    qc = np.minimum(q, rev.size - 1)
    return np.where(valid, suffix_min[qc], np.inf)


def _records(vals: np.ndarray, lp: int) -> np.ndarray:
    """Rows where a jump may come from: the minimum of vals[p:] sits at the first "record from
    the end" at or after p (a value <= every later one); records are few, so they are all we keep."""
    rev = vals[::-1]
    acc = np.minimum.accumulate(rev)
    return (rev.size - 1 - np.flatnonzero(rev <= acc))[::-1].astype(np.int32) + lp


def _backtrack(codes: list, sources: dict, lo: np.ndarray, i: int, j: int) -> tuple[np.ndarray, np.ndarray]:
    """The path (rows, cols) ending at cell (i, j), followed back through the step codes."""
    rows_out, cols_out = [], []
    while True:
        rows_out.append(i)
        cols_out.append(j)
        code = codes[j][i - int(lo[j])]
        if code == _START:
            break
        if code == _DIAG:
            i, j = i - 1, j - 1
        elif code == _FAST:
            i, j = i - 2, j - 1
        elif code == _SLOW:
            i, j = i - 1, j - 2
        elif code == _PAUSE:
            j = j - 1
        else:
            records = sources[j]
            i, j = int(records[np.searchsorted(records, i + 1)]), j - 1
    return np.array(rows_out[::-1]), np.array(cols_out[::-1])


def band_from_path(rows_c, cols_c, factor: int, n_rows: int, n_cols: int, radius: int) -> tuple[np.ndarray, np.ndarray]:
    """Fine-resolution row band around a coarse path (``radius`` fine frames each side)."""
    n_cols_c = -(-n_cols // factor)
    low_c = np.full(n_cols_c, np.iinfo(np.int64).max)
    high_c = np.full(n_cols_c, -1)
    np.minimum.at(low_c, cols_c, rows_c)
    np.maximum.at(high_c, cols_c, rows_c)
    # columns the coarse path skipped ((1,2) steps, before its start, after its end) borrow from neighbours
    visited = high_c >= 0
    if not visited.any():
        return np.zeros(n_cols, dtype=int), np.full(n_cols, n_rows)
    pos = np.flatnonzero(visited)
    nearest_before = np.maximum.accumulate(np.where(visited, np.arange(n_cols_c), -1))
    nearest_after = np.minimum.accumulate(np.where(visited, np.arange(n_cols_c), n_cols_c)[::-1])[::-1]
    nb = np.where(nearest_before >= 0, nearest_before, pos[0])
    na = np.where(nearest_after < n_cols_c, nearest_after, pos[-1])
    low_c = np.minimum(low_c[nb], low_c[na])
    high_c = np.maximum(high_c[nb], high_c[na])
    # widen by one coarse column either side
    low_c = np.minimum(low_c, np.minimum(np.r_[low_c[1:], low_c[-1]], np.r_[low_c[0], low_c[:-1]]))
    high_c = np.maximum(high_c, np.maximum(np.r_[high_c[1:], high_c[-1]], np.r_[high_c[0], high_c[:-1]]))
    # outside the path's span (silence before and after) the path may start or end anywhere near its ends
    first, last = pos[0], pos[-1]
    low_c[:first] = 0
    high_c[last + 1:] = high_c[last]
    col_c = np.arange(n_cols) // factor
    lo = np.clip(low_c[col_c] * factor - radius, 0, n_rows)
    hi = np.clip((high_c[col_c] + 1) * factor + radius, 0, n_rows)
    hi = np.maximum(hi, lo + 1)
    return lo.astype(int), hi.astype(int)
