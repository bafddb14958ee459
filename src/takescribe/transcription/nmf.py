"""Non-negative matrix factorization V ≈ W·H with β-divergence multiplicative updates.

Conventions
-----------
- ``V`` (n_bins, n_frames) is a non-negative spectrogram, ``W`` (n_bins, n_pitches)
  the dictionary (fixed, or updated when ``update_W=True``), ``H`` (n_pitches,
  n_frames) the activations. float32 in, float32 out (float64 stays float64).
- Cost: ``D_β(V | WH) + continuity·C_t(H) + sparsity·C_s(H) + mask_penalty·Σ (1 − M)⊙H``
  where D_β is the β-divergence (β = 2 Euclidean, halved as in scikit-learn;
  β = 1 generalized Kullback–Leibler; 0 < β < 2 in between), C_t and C_s are the
  temporal-continuity and sparseness costs of Virtanen (2007):

      C_t = Σ_k (1/σ_k²) Σ_t (h_{k,t} − h_{k,t−1})²,   C_s = Σ_k Σ_t |h_{k,t}| / σ_k,
      σ_k = sqrt( (1/T) Σ_t h_{k,t}² ),

  and the last term is a weighted L1 prior that discourages activations where the
  non-negative mask ``M`` (values in [0, 1], e.g. from an aligned score) is small.
  Each gradient is split into positive and negative parts and H is updated by
  ``H ← H ⊙ (∇⁻) / (∇⁺)``, the heuristic rule that is exact (monotone) for the
  β-divergence alone (Lee and Seung 2001 for β ∈ {1, 2}; Févotte and Idier 2011
  for 1 ≤ β ≤ 2) and carries no such proof with the penalties.
- With W fixed, the products W·H and Wᵀ·X skip the zeros of a banded W (harmonic
  templates) by running one BLAS product per dense tile of W
  (:mod:`takescribe.transcription.banded`). Only exact zeros are skipped: results are the
  dense ones up to the order of float additions. Other dictionaries (learned, random) keep
  the dense products.
- Speed: all work is in V's dtype (float32 for spectrograms) on buffers allocated once; each
  iteration is two BLAS products (W H and Wᵀ(V / WH) for KL) plus a few element-wise passes,
  and a cost check reuses the product the next update needs. BLAS runs on one thread
  (``_blas_single_thread``); with W fixed and no continuity or sparsity penalty the frames
  are independent, so the columns are split into slabs of at least ``MIN_FRAMES_PER_THREAD``
  frames, one Python thread each, up to the process's BLAS thread budget (the result is that
  of one thread). Pruning small activations does not pay with these dictionaries
  (``tests/benchmarks/prune_study.py``).
- Convergence: the relative decrease of the cost, checked every ``check_every``
  iterations, below ``tol``. Costs are evaluated in V's dtype and summed in float64
  (:func:`beta_divergence`, in float64 throughout, is the reference the tests use).

References
----------
Lee, D. D. and Seung, H. S. (2001). Algorithms for non-negative matrix factorization. NIPS 13.
Virtanen, T. (2007). Monaural sound source separation by nonnegative matrix factorization
with temporal continuity and sparseness criteria. IEEE TASLP 15(3), 1066–1074.
Févotte, C. and Idier, J. (2011). Algorithms for nonnegative matrix factorization with
the β-divergence. Neural Computation 23(9), 2421–2456.
"""

from __future__ import annotations

import contextlib
import os
import threading
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import numpy as np

from ..errors import InputError
from .banded import (  # noqa: F401  (the tests and benchmarks reach the planner through this module)
    MIN_TILED_SAVING,
    _accumulator,
    _adjoint_product,
    _model_product,
    _plan_tiling,
)

__all__ = ["Factorization", "decompose", "beta_divergence", "penalty_costs", "validate_factorization_inputs"]


@dataclass(frozen=True)
class Factorization:
    """Result of :func:`decompose`.

    Attributes
    ----------
    W : np.ndarray (n_bins, n_pitches)
    H : np.ndarray (n_pitches, n_frames)
    costs : np.ndarray
        Total (penalized) cost at each check, the first before any update.
    n_iter : int
        Iterations run.
    converged : bool
    """

    W: np.ndarray
    H: np.ndarray
    costs: np.ndarray
    n_iter: int
    converged: bool


def _eps(dtype) -> float:
    return float(np.finfo(dtype).eps) if np.issubdtype(dtype, np.floating) else 1e-12


def beta_divergence(V: np.ndarray, WH: np.ndarray, beta: float) -> float:
    """β-divergence D_β(V | WH) summed over all entries.

    Uses scikit-learn's convention for β = 2 (half the squared Frobenius norm).
    Zeros in V are handled by the limit (0·log 0 = 0).
    """
    V = np.asarray(V, dtype=np.float64)
    WH = np.maximum(np.asarray(WH, dtype=np.float64), 1e-12)
    if beta == 2:
        return float(0.5 * np.sum((V - WH) ** 2))
    if beta == 1:
        with np.errstate(divide="ignore", invalid="ignore"):
            term = np.where(V > 0, V * np.log(np.where(V > 0, V, 1.0) / WH), 0.0)
        return float(np.sum(term - V + WH))
    if beta == 0:
        ratio = np.maximum(V, 1e-12) / WH
        return float(np.sum(ratio - np.log(ratio) - 1))
    return float(
        np.sum(V**beta + (beta - 1) * WH**beta - beta * V * WH ** (beta - 1)) / (beta * (beta - 1))
    )


def penalty_costs(H: np.ndarray) -> tuple[float, float]:
    """Virtanen's temporal-continuity and sparseness costs (C_t, C_s) of ``H``."""
    H = np.asarray(H, dtype=np.float64)
    T = H.shape[1]
    sq = np.sum(H * H, axis=1) + 1e-20
    diff = np.sum(np.diff(H, axis=1) ** 2, axis=1)
    c_t = float(np.sum(T * diff / sq))
    c_s = float(np.sum(np.sum(np.abs(H), axis=1) / np.sqrt(sq / T)))
    return c_t, c_s


def validate_factorization_inputs(V: np.ndarray, W: np.ndarray, *, mask: np.ndarray | None = None,
                                  H_init: np.ndarray | None = None) -> None:
    """Check shapes, finiteness and non-negativity of the factorization inputs."""
    for name, arr in (("V", V), ("W", W)):
        if not isinstance(arr, np.ndarray) or arr.ndim != 2:
            raise InputError(f"{name} must be a 2-D array, got {getattr(arr, 'shape', type(arr).__name__)}")
        if not np.all(np.isfinite(arr)):
            raise InputError(f"{name} contains NaN or infinite values")
        if np.any(arr < 0):
            raise InputError(f"{name} must be non-negative (a magnitude spectrogram / templates)")
    if V.shape[0] != W.shape[0]:
        raise InputError(f"V has {V.shape[0]} bins but W has {W.shape[0]}: they come from different analyses")
    expected = (W.shape[1], V.shape[1])
    for name, arr in (("mask", mask), ("H_init", H_init)):
        if arr is None:
            continue
        if arr.shape != expected:
            raise InputError(f"{name} must have shape (n_pitches, n_frames) = {expected}, got {arr.shape}")
        if not np.all(np.isfinite(arr)) or np.any(arr < 0):
            raise InputError(f"{name} must be finite and non-negative")


def _blas_single_thread():
    """A context that keeps BLAS on one thread (a no-op without threadpoolctl).

    Our products are small (a few hundred bins by ~100 templates): a second BLAS
    thread saves little on an idle machine and costs a lot when the cores are shared
    (measured: 298×91×908 float32 product 1.4 ms on one thread, 12–34 ms on two with
    the machine loaded), and batch runs already keep every core busy with processes.
    """
    global _CONTROLLER
    try:
        if _CONTROLLER is None:
            from threadpoolctl import ThreadpoolController

            _CONTROLLER = ThreadpoolController()
        return _CONTROLLER.limit(limits=1, user_api="blas")
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        return contextlib.nullcontext()


_CONTROLLER = None


def _penalty_gradients(H: np.ndarray, continuity: float, sparsity: float, pos: np.ndarray, neg: np.ndarray,
                       eps: float, work: np.ndarray) -> None:
    """Add the positive / negative parts of the penalty gradients to ``pos`` / ``neg`` in place.

    ``work`` is a scratch buffer shaped like ``H``.
    """
    T = H.shape[1]
    sq = np.einsum("kt,kt->k", H, H)[:, None] + eps  # (K, 1)
    if continuity > 0:
        d = np.subtract(H[:, 1:], H[:, :-1], out=work[:, 1:])
        diff2 = np.einsum("kt,kt->k", d, d)[:, None]
        # neighbours h[t-1] + h[t+1] (zero beyond the edges)
        work[:, 0] = 0
        np.copyto(work[:, 1:], H[:, :-1])
        work[:, :-1] += H[:, 1:]
        work *= (continuity * 2.0 * T / sq).astype(H.dtype)
        neg += work
        np.multiply(H, (continuity * 2.0 * T * diff2 / (sq * sq)).astype(H.dtype), out=work)
        neg += work
        np.multiply(H, (continuity * 4.0 * T / sq).astype(H.dtype), out=work)
        pos += work
    if sparsity > 0:
        root_t = np.sqrt(T)
        pos += (sparsity * root_t / np.sqrt(sq)).astype(H.dtype)
        np.multiply(H, (sparsity * root_t * H.sum(axis=1, keepdims=True) / sq ** 1.5).astype(H.dtype), out=work)
        neg += work


def _penalty_cost(H: np.ndarray, continuity: float, sparsity: float, mask_term: np.ndarray | None) -> float:
    """Penalty part of the cost in the working dtype, summed in float64."""
    cost = 0.0
    if continuity > 0 or sparsity > 0:
        T = H.shape[1]
        sq = np.einsum("kt,kt->k", H, H, dtype=np.float64) + 1e-20
        if continuity > 0:
            d = np.diff(H, axis=1)
            cost += continuity * float(np.sum(T * np.einsum("kt,kt->k", d, d, dtype=np.float64) / sq))
        if sparsity > 0:
            cost += sparsity * float(np.sum(H.sum(axis=1, dtype=np.float64) / np.sqrt(sq / T)))
    if mask_term is not None:
        cost += float(np.einsum("kt,kt->", mask_term, H, dtype=np.float64))
    return cost


def _divergence_from_model(V: np.ndarray, Lam: np.ndarray, beta: float, *, work: np.ndarray,
                           v_log_v: float, v_sum: float, wh_sum: float) -> float:
    """D_β(V | Λ) for a model ``Λ = W H`` already computed (and floored), in the working dtype.

    Element-wise work stays in V's dtype and uses the preallocated ``work`` buffer;
    only the sums are accumulated in float64. For KL, ``Σ V log V`` and ``Σ V`` are
    constants of the problem and ``Σ Λ = (Σ_f W) · (Σ_t H)`` comes from the factors,
    so one logarithm over the matrix is all that is left.
    """
    if beta == 1:
        np.log(Lam, out=work)
        work *= V
        return v_log_v - float(work.sum(dtype=np.float64)) - v_sum + wh_sum
    if beta == 2:
        np.subtract(V, Lam, out=work)
        work *= work
        return 0.5 * float(work.sum(dtype=np.float64))
    if beta == 0:
        np.divide(V, Lam, out=work)
        np.maximum(work, np.finfo(V.dtype).tiny, out=work)
        total = float(work.sum(dtype=np.float64))
        np.log(work, out=work)
        return total - float(work.sum(dtype=np.float64)) - V.size
    # general β: (V^β + (β-1) Λ^β − β V Λ^(β-1)) / (β(β-1))
    np.power(Lam, beta - 1.0, out=work)
    cross = float(np.einsum("ft,ft->", V, work, dtype=np.float64))
    work *= Lam
    model = float(work.sum(dtype=np.float64))
    np.power(V, beta, out=work)
    data = float(work.sum(dtype=np.float64))
    return (data + (beta - 1) * model - beta * cross) / (beta * (beta - 1))


def _update_H(V, W, W_colsum, WtV, H, Lam, work, num, den, *, beta, mask_term, eps, penalty=None,
              tiling=None, accumulator=None) -> None:
    """One multiplicative update of H in place, given ``Lam = max(W H, eps)`` (which it overwrites).

    The products with Wᵀ go through :func:`_adjoint_product` (tiled when ``tiling`` is given).
    """
    if beta == 1.0:
        np.divide(V, Lam, out=Lam)
        _adjoint_product(W, Lam, num, tiling, accumulator)
        if penalty is None and mask_term is None:
            # the denominator is Σ_f W[f, k] for every frame: divide by the column, no (K, T) fill
            np.divide(num, np.maximum(W_colsum, eps)[:, None], out=num)
            H *= num
            return
        den[...] = W_colsum[:, None]
    elif beta == 2.0:
        _adjoint_product(W, V, num, tiling, accumulator) if WtV is None else np.copyto(num, WtV)
        _adjoint_product(W, Lam, den, tiling, accumulator)
    else:
        np.power(Lam, beta - 2.0, out=work)
        work *= V
        _adjoint_product(W, work, num, tiling, accumulator)
        Lam **= beta - 1.0
        _adjoint_product(W, Lam, den, tiling, accumulator)
    if penalty is not None:
        penalty(den, num)
    if mask_term is not None:
        den += mask_term
    np.maximum(den, eps, out=den)
    num /= den
    H *= num


# ----------------------------------------------------------------------------- banded products

#: Fewest frames per thread worth a thread of its own (smaller slabs make BLAS less efficient).
MIN_FRAMES_PER_THREAD = 512


def _engine_threads(n_frames: int) -> int:
    """Threads for a fixed-W factorization: the BLAS thread budget of the process, one slab each.

    A caller that limits BLAS to one thread (``threadpoolctl.threadpool_limits(1)``,
    as batch workers do) gets one thread here too.
    """
    global _CONTROLLER
    try:
        if _CONTROLLER is None:
            from threadpoolctl import ThreadpoolController

            _CONTROLLER = ThreadpoolController()
        budget = max([lib.num_threads for lib in _CONTROLLER.lib_controllers if lib.user_api == "blas"], default=1)
    except ImportError:  # pragma: no cover - threadpoolctl comes with scikit-learn
        budget = 1
    return int(max(1, min(budget, os.cpu_count() or 1, n_frames // MIN_FRAMES_PER_THREAD)))


def _decompose_slabs(V, W, H, *, beta, n_iter, tol, check_every, mask_term, eps, threads, tiling):
    """The fixed-W, unpenalized iterations on column slabs of H, one thread per slab.

    Each thread owns its slab's buffers and runs the same updates as the one-thread
    loop; at each check the threads add their slab costs (a barrier) and all take the
    same stop decision. Returns ``(costs, n_iter_run, converged)``; H is updated in place.
    """
    T = V.shape[1]
    edges = np.linspace(0, T, threads + 1).round().astype(int)
    W_colsum = W.sum(axis=0)
    WtV_all = None
    partial = np.zeros((2, threads))  # double-buffered by check parity
    barrier = threading.Barrier(threads)
    outcome = {}

    def run(i: int) -> None:
        try:
            _run(i)
        except BaseException:
            barrier.abort()  # the other threads stop waiting at the next check
            raise

    def _run(i: int) -> None:
        cols = slice(edges[i], edges[i + 1])
        Vc = np.ascontiguousarray(V[:, cols])
        Hc = np.ascontiguousarray(H[:, cols])
        mc = None if mask_term is None else np.ascontiguousarray(mask_term[:, cols])
        Lam, work = np.empty_like(Vc), np.empty_like(Vc)
        num, den = np.empty_like(Hc), np.empty_like(Hc)
        accumulator = _accumulator(tiling, Vc.shape[1], Vc.dtype)
        floor = np.full((1, Vc.shape[1]), eps, Vc.dtype)
        WtV = W.T @ Vc if beta == 2 else WtV_all
        v_sum = v_log_v = 0.0
        if beta == 1:
            v_sum = float(Vc.sum(dtype=np.float64))
            np.maximum(Vc, np.finfo(Vc.dtype).tiny, out=work)
            np.log(work, out=work)
            work *= Vc
            v_log_v = float(work.sum(dtype=np.float64))
        costs, previous, check, it, converged = [], None, 0, 0, False
        while True:
            _model_product(W, Hc, Lam, tiling, accumulator)
            np.maximum(Lam, floor, out=Lam)
            if it == 0 or it % check_every == 0 or it == n_iter:
                wh_sum = float(np.dot(W_colsum.astype(np.float64), Hc.sum(axis=1, dtype=np.float64))) if beta == 1 else 0.0
                cost = _divergence_from_model(Vc, Lam, beta, work=work, v_log_v=v_log_v, v_sum=v_sum, wh_sum=wh_sum)
                partial[check % 2, i] = cost + _penalty_cost(Hc, 0.0, 0.0, mc)
                barrier.wait()
                total = float(partial[check % 2].sum())
                check += 1
                costs.append(total)
                if it == n_iter:
                    break
                if it > 0 and tol > 0 and previous > 0 and (previous - total) / previous < tol:
                    converged = True
                    break
                previous = total
            it += 1
            _update_H(Vc, W, W_colsum, WtV, Hc, Lam, work, num, den, beta=beta, mask_term=mc, eps=eps,
                      tiling=tiling, accumulator=accumulator)
        H[:, cols] = Hc
        if i == 0:
            outcome.update(costs=costs, it=it, converged=converged)

    with ThreadPoolExecutor(max_workers=threads) as pool:
        for future in [pool.submit(run, i) for i in range(threads)]:
            future.result()
    return outcome["costs"], outcome["it"], outcome["converged"]


def _check_options(beta, n_iter, check_every, continuity, sparsity, mask_penalty) -> None:
    if not 0.0 <= beta <= 2.0:
        raise InputError(f"beta must be in range 0..2 (2 = Euclidean, 1 = Kullback-Leibler), got {beta}")
    if n_iter < 0 or check_every < 1:
        raise InputError("n_iter must be >= 0 and check_every >= 1")
    if continuity < 0 or sparsity < 0 or mask_penalty < 0:
        raise InputError("penalty weights must be >= 0")


def _start(V: np.ndarray, K: int, *, H_init, seed: int, mask, mask_penalty: float, eps: float):
    """Initial H (copied from ``H_init`` or seeded noise scaled to V, times the mask) and the mask's cost term."""
    dtype, T = V.dtype, V.shape[1]
    if H_init is not None:
        H = np.array(H_init, dtype=dtype, copy=True, order="C")
    else:
        rng = np.random.default_rng(seed)
        scale = np.sqrt(max(float(V.mean()), eps) / K)
        H = np.abs(rng.standard_normal((K, T))).astype(dtype) * dtype.type(scale)
    mask_term = None
    if mask is not None:
        mask = np.asarray(mask, dtype=dtype)
        H *= np.maximum(mask, dtype.type(1e-3))
        mask_term = (mask_penalty * (1.0 - np.minimum(mask, 1.0))).astype(dtype) if mask_penalty > 0 else None
    return (np.maximum(H, eps, out=H) if H_init is None else H), mask_term


def _update_W(V, W, H, Lam, work, *, beta: float, eps: float) -> None:
    """One multiplicative update of W (free NMF); ``Lam`` holds W·H on entry and is overwritten."""
    if beta == 1.0:
        np.divide(V, Lam, out=Lam)
        numW = Lam @ H.T
        denW = H.sum(axis=1)[None, :]
    else:
        np.power(Lam, beta - 2.0, out=work)
        work *= V
        numW = work @ H.T
        Lam **= beta - 1.0
        denW = Lam @ H.T
    W *= numW / np.maximum(denW, eps)


def _decompose_one_thread(V, W, H, *, beta, n_iter, tol, check_every, continuity, sparsity, mask_term, eps, tiling,
                          update_W):
    """The update loop on one thread (penalties and W updates allowed). Returns ``(costs, n_iter_run, converged)``."""
    dtype = V.dtype
    K, T = H.shape
    penalized = continuity > 0 or sparsity > 0
    # buffers, allocated once
    Lam = np.empty_like(V)       # W H, then V / W H (KL) or a power of W H
    work = np.empty_like(V)      # cost evaluation and general-β scratch
    num, den = np.empty((K, T), dtype), np.empty((K, T), dtype)
    scratch = np.empty((K, T), dtype) if penalized else None
    accumulator = _accumulator(tiling, T, dtype)
    floor = np.full((1, T), eps, dtype)  # np.maximum against a row runs ~2x faster than against a scalar
    v_sum = v_log_v = 0.0
    if beta == 1:
        v_sum = float(V.sum(dtype=np.float64))
        np.maximum(V, np.finfo(dtype).tiny, out=work)
        np.log(work, out=work)
        work *= V
        v_log_v = float(work.sum(dtype=np.float64))
    WtV = W.T @ V if beta == 2 and not update_W else None
    W_colsum = W.sum(axis=0)

    def model(out):
        _model_product(W, H, out, tiling, accumulator)
        np.maximum(out, floor, out=out)
        return out

    def cost_of_model(Lam_now):
        wh_sum = float(np.dot(W_colsum.astype(np.float64), H.sum(axis=1, dtype=np.float64))) if beta == 1 else 0.0
        cost = _divergence_from_model(V, Lam_now, beta, work=work, v_log_v=v_log_v, v_sum=v_sum, wh_sum=wh_sum)
        return cost + _penalty_cost(H, continuity, sparsity, mask_term)

    def penalty(den, num):
        _penalty_gradients(H, continuity, sparsity, den, num, eps, scratch)

    converged, it = False, 0
    costs = [cost_of_model(model(Lam))]
    have_model = True  # Lam holds W H for the current H
    while it < n_iter:
        if not have_model:
            model(Lam)
        have_model = False
        if it > 0 and it % check_every == 0:
            # the product this update needs is the model of the current H: its cost is nearly free
            costs.append(cost_of_model(Lam))
            previous = costs[-2]
            if tol > 0 and previous > 0 and (previous - costs[-1]) / previous < tol:
                converged = True
                break
        it += 1
        _update_H(V, W, W_colsum, WtV, H, Lam, work, num, den, beta=beta, mask_term=mask_term, eps=eps,
                  penalty=penalty if penalized else None, tiling=tiling, accumulator=accumulator)
        if update_W:
            _update_W(V, W, H, model(Lam), work, beta=beta, eps=eps)
            W_colsum = W.sum(axis=0)
    if not converged and it > 0:
        costs.append(cost_of_model(model(Lam)))
    return costs, it, converged


def decompose(
    V: np.ndarray,
    W: np.ndarray,
    *,
    beta: float = 1.0,
    n_iter: int = 100,
    tol: float = 1e-4,
    check_every: int = 5,
    continuity: float = 0.0,
    sparsity: float = 0.0,
    mask: np.ndarray | None = None,
    mask_penalty: float = 0.0,
    H_init: np.ndarray | None = None,
    seed: int = 0,
    update_W: bool = False,
    W_mask: np.ndarray | None = None,
) -> Factorization:
    """Factorize ``V ≈ W @ H`` by multiplicative updates.

    Parameters
    ----------
    V : np.ndarray (n_bins, n_frames)
        Non-negative spectrogram.
    W : np.ndarray (n_bins, n_pitches)
        Dictionary; fixed unless ``update_W``.
    beta : float
        β of the β-divergence: 2 Euclidean, 1 Kullback–Leibler, in between allowed (0..2).
    n_iter, tol, check_every :
        At most ``n_iter`` iterations; stop when the relative cost decrease over
        ``check_every`` iterations is below ``tol``.
    continuity, sparsity : float
        Weights of Virtanen's temporal-continuity and sparseness costs on H.
    mask : np.ndarray (n_pitches, n_frames), optional
        Prior in [0, 1] on where activations are expected. Initial H is multiplied by
        ``max(mask, 1e-3)``; with ``mask_penalty > 0`` the cost gains
        ``mask_penalty · Σ (1 − mask) ⊙ H``.
    mask_penalty : float
    H_init : np.ndarray (n_pitches, n_frames), optional
        Initial activations (copied); otherwise |Gaussian| noise from ``seed``,
        scaled to the energy of V.
    seed : int
    update_W : bool
        Also update W (free NMF). ``W_mask`` (same shape as W, 0/1) keeps chosen
        entries at zero: multiplicative updates never revive a zero.

    Returns
    -------
    Factorization

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> W = rng.random((20, 3)); H_true = rng.random((3, 50))
    >>> fit = decompose(W @ H_true, W, beta=1.0, n_iter=500, tol=0)
    >>> bool(np.allclose(fit.H, H_true, atol=1e-2))
    True
    """
    V = np.asarray(V)
    if not np.issubdtype(V.dtype, np.floating):
        V = V.astype(np.float32)
    W = np.asarray(W).astype(V.dtype, copy=True)
    if W_mask is not None:
        W *= np.asarray(W_mask, dtype=V.dtype)
    validate_factorization_inputs(V, W, mask=mask, H_init=H_init)
    _check_options(beta, n_iter, check_every, continuity, sparsity, mask_penalty)
    V = np.ascontiguousarray(V)
    eps = _eps(V.dtype)
    H, mask_term = _start(V, W.shape[1], H_init=H_init, seed=seed, mask=mask, mask_penalty=mask_penalty, eps=eps)
    threads = 1 if (continuity > 0 or sparsity > 0 or update_W) else _engine_threads(V.shape[1])
    # a learned W changes at every update: only a fixed one is worth tiling
    tiling = None if update_W else _plan_tiling(W, -(-V.shape[1] // threads))
    options = dict(beta=beta, n_iter=n_iter, tol=tol, check_every=check_every, mask_term=mask_term, eps=eps,
                   tiling=tiling)
    with _blas_single_thread():
        if threads > 1:
            # frames are independent once W is fixed (no continuity penalty): one column slab per thread
            costs, it, converged = _decompose_slabs(V, W, H, threads=threads, **options)
        else:
            costs, it, converged = _decompose_one_thread(V, W, H, continuity=continuity, sparsity=sparsity,
                                                         update_W=update_W, **options)
    return Factorization(W=W, H=H, costs=np.asarray(costs), n_iter=it, converged=converged)
