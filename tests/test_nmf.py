"""NMF engine against outside references: scikit-learn's NMF, Lee & Seung's monotonicity, exact recovery."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.decomposition import non_negative_factorization
from sklearn.decomposition._nmf import _beta_divergence

from takescribe.transcription import nmf as nmf_module
from takescribe.errors import InputError
from takescribe.transcription.nmf import beta_divergence, decompose, penalty_costs


def _problem(seed=0, F=40, K=6, T=120, dtype=np.float64):
    rng = np.random.default_rng(seed)
    W = rng.random((F, K)) + 0.05
    H = rng.random((K, T)) * (rng.random((K, T)) > 0.5)
    V = W @ H + 0.01 * rng.random((F, T))
    return V.astype(dtype), W.astype(dtype), H.astype(dtype)


@pytest.mark.parametrize("beta", [1.0, 2.0, 1.5])
@pytest.mark.parametrize("n_iter", [1, 30])
def test_updates_match_scikit_learn(beta, n_iter):
    # Reference: scikit-learn's non_negative_factorization, solver='mu', same beta, dictionary fixed.
    # scikit-learn factorizes X ≈ A B; with update_H=False it keeps B fixed and starts A from the
    # constant sqrt(mean(X) / n_components) (it ignores a given A then). We solve V ≈ W H, so
    # X = V.T, B = W.T and A = H.T, started from the same constant.
    V, W, _ = _problem(1)
    K = W.shape[1]
    H0 = np.full((K, V.shape[1]), np.sqrt(V.mean() / K))
    ours = decompose(V, W, beta=beta, n_iter=n_iter, tol=0, H_init=H0).H
    A, _, _ = non_negative_factorization(
        V.T, H=W.T.copy(), n_components=K, init="custom", update_H=False,
        solver="mu", beta_loss=beta, max_iter=n_iter, tol=0, alpha_W=0.0, alpha_H=0.0,
    )
    np.testing.assert_allclose(ours, A.T, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("beta", [1.0, 2.0, 0.5])
def test_cost_matches_scikit_learn_beta_divergence(beta):
    # Reference: scikit-learn's _beta_divergence (beta=2 is half the squared Frobenius norm there too)
    V, W, H = _problem(3)
    H = H + 0.1
    expected = _beta_divergence(V, W, H, beta, square_root=False)
    assert beta_divergence(V, W @ H, beta) == pytest.approx(expected, rel=1e-9)


@pytest.mark.parametrize("beta", [1.0, 2.0])
@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_cost_never_rises_without_penalties(beta, dtype):
    # Lee and Seung (NIPS 2001) prove the multiplicative updates never increase the cost for beta in {1, 2}.
    V, W, _ = _problem(4, dtype=dtype)
    fit = decompose(V, W, beta=beta, n_iter=200, tol=0, check_every=1)
    rel = 1e-6 if dtype == np.float32 else 1e-12
    assert np.all(np.diff(fit.costs) <= rel * fit.costs[:-1])
    assert fit.H.dtype == dtype


def test_penalized_cost_falls():
    # Virtanen (2007)'s penalties have no monotonicity proof: check it ends well below
    # where it starts and falls over every window of ten iterations.
    V, W, _ = _problem(5)
    fit = decompose(V, W, beta=1.0, n_iter=200, tol=0, check_every=1, continuity=0.5, sparsity=0.2)
    costs = fit.costs
    assert costs[-1] < 0.5 * costs[0]
    windows = costs[10::10] - costs[:-10:10][: len(costs[10::10])]
    assert np.all(windows < 0)


def test_recovers_true_activations_with_fixed_dictionary():
    # exact synthetic factorization V = W @ H_true: the KL updates converge to H_true
    rng = np.random.default_rng(6)
    W = rng.random((30, 4)) + 0.1
    H_true = rng.random((4, 80))
    fit = decompose(W @ H_true, W, beta=1.0, n_iter=2000, tol=0)
    np.testing.assert_allclose(fit.H, H_true, atol=2e-3)


def test_penalty_costs_against_naive_loops():
    # naive loop implementation of Virtanen's (2007) C_t and C_s, eqs. for sigma_k = sqrt(mean h^2)
    rng = np.random.default_rng(7)
    H = rng.random((3, 25))
    c_t = c_s = 0.0
    for k in range(3):
        sigma2 = sum(h * h for h in H[k]) / 25
        c_t += sum((H[k, t] - H[k, t - 1]) ** 2 for t in range(1, 25)) / sigma2
        c_s += sum(abs(h) for h in H[k]) / np.sqrt(sigma2)
    assert penalty_costs(H) == pytest.approx((c_t, c_s), rel=1e-9)


def test_mask_penalty_suppresses_unexpected_rows_without_forbidding_them():
    V, W, H = _problem(8)
    mask = np.ones_like(H)
    mask[0] = 0.0
    free = decompose(V, W, n_iter=150, tol=0).H
    guided = decompose(V, W, n_iter=150, tol=0, mask=mask, mask_penalty=0.5).H
    assert guided[0].sum() < free[0].sum()
    assert guided[0].sum() > 0  # a prior, not a cage


def test_free_W_keeps_zeros():
    V, W, _ = _problem(9)
    W_mask = (np.random.default_rng(1).random(W.shape) > 0.3).astype(float)
    fit = decompose(V, W, n_iter=20, update_W=True, W_mask=W_mask)
    assert np.all(fit.W[W_mask == 0] == 0)


@pytest.mark.parametrize(
    "kwargs, message",
    [({"beta": 3.0}, "beta must be in range"), ({"continuity": -1.0}, "penalty weights")],
)
def test_bad_arguments(kwargs, message):
    V, W, _ = _problem(10)
    with pytest.raises(InputError, match=message):
        decompose(V, W, **kwargs)


def test_shape_mismatch_names_the_problem():
    V, W, _ = _problem(11)
    with pytest.raises(InputError, match="different analyses"):
        decompose(V, W[:-1])
    with pytest.raises(InputError, match="non-negative"):
        decompose(-V, W)


# ----------------------------------------------------------------------------- banded products (issue #7)


def _harmonic_W(instrument="piano", dtype=np.float32):
    """The transcription dictionary: harmonic templates of a preset plus the broadband noise templates."""
    from takescribe.transcription.dictionary import harmonic_dictionary
    from takescribe.features.spectrogram import BINS_PER_SEMITONE, MIDI_HIGH, MIDI_LOW
    from takescribe.transcription.blind import noise_templates

    # the VQT axis of compute_spectrogram at zero tuning, A4 = 440 Hz (ISO 16)
    n_bins = (MIDI_HIGH - MIDI_LOW) * BINS_PER_SEMITONE + 1
    frequencies = 440.0 * 2.0 ** ((MIDI_LOW - 69) / 12) * 2.0 ** (np.arange(n_bins) / (12 * BINS_PER_SEMITONE))
    W = harmonic_dictionary(frequencies, instrument=instrument).W
    return np.hstack([W, noise_templates(n_bins, 3)]).astype(dtype)


def _harmonic_problem(T, *, seed=0, dtype=np.float32, instrument="piano"):
    """V = W H_true (a few active pitches per frame) + a small floor, with the real dictionary W."""
    W = _harmonic_W(instrument, dtype)
    rng = np.random.default_rng(seed)
    H_true = rng.random((W.shape[1], T)) * (rng.random((W.shape[1], T)) < 0.05)
    V = W.astype(np.float64) @ H_true + 1e-3 * rng.random((W.shape[0], T))
    return V.astype(dtype), W


def _dense_only(monkeypatch):
    monkeypatch.setattr(nmf_module, "_plan_tiling", lambda W, n_frames: None)


@pytest.mark.parametrize("instrument", ["piano", "violin", "flute"])
def test_harmonic_dictionary_is_tiled_and_every_entry_is_in_one_tile(instrument):
    W = _harmonic_W(instrument)
    tiling = nmf_module._plan_tiling(W, 1000)
    assert tiling is not None  # the templates are banded: the tiles skip >= MIN_TILED_SAVING of the entries
    assert tiling.madds_per_frame <= (1 - nmf_module.MIN_TILED_SAVING) * 2 * W.size
    for blocks, A in ((tiling.model, W), (tiling.adjoint, W.T)):
        covered = np.zeros(A.shape, int)
        rebuilt = np.zeros_like(A)
        for i0, i1, tiles in blocks:
            for j0, j1, tile in tiles:
                covered[i0:i1, j0:j1] += 1
                rebuilt[i0:i1, j0:j1] = tile
        assert covered.max() <= 1  # no entry counted twice
        np.testing.assert_array_equal(rebuilt, A)  # every non-zero inside a tile, copied exactly
        assert np.all(covered[A != 0] == 1)


def test_dense_or_barely_sparse_dictionaries_stay_dense():
    rng = np.random.default_rng(12)
    W = rng.random((298, 91)).astype(np.float32)  # a learned / random dictionary: no zeros
    assert nmf_module._plan_tiling(W, 1000) is None
    W[rng.random(W.shape) < 0.2] = 0.0  # 20 % zeros scattered: under the 25 % minimum saving
    assert nmf_module._plan_tiling(W, 1000) is None


@pytest.mark.parametrize("dtype", [np.float32, np.float64])
def test_tiled_products_are_the_dense_ones_within_rounding(dtype):
    # Bound from the standard error analysis of a floating-point dot product of length n
    # (Higham 2002, Accuracy and Stability of Numerical Algorithms, eq. 3.5):
    # |fl(w·h) − w·h| ≤ γ_n |w|·|h|, γ_n = n u / (1 − n u), u the unit roundoff, for any summation order.
    W = _harmonic_W(dtype=dtype)
    F, K = W.shape
    T = 700
    rng = np.random.default_rng(13)
    H = rng.random((K, T)).astype(dtype)
    R = rng.random((F, T)).astype(dtype)
    tiling = nmf_module._plan_tiling(W, T)
    accumulator = nmf_module._accumulator(tiling, T, dtype)
    u = np.finfo(dtype).eps / 2
    for product, X, n in ((nmf_module._model_product, H, K), (nmf_module._adjoint_product, R, F)):
        A = W if product is nmf_module._model_product else W.T
        out = np.empty((A.shape[0], T), dtype)
        product(W, X, out, tiling, accumulator)
        exact = A.astype(np.float64) @ X.astype(np.float64)
        gamma = n * u / (1 - n * u)
        assert np.all(np.abs(out - exact) <= gamma * (np.abs(A).astype(np.float64) @ np.abs(X)))
        assert out.dtype == dtype


@pytest.mark.parametrize("beta", [1.0, 2.0, 1.5])
@pytest.mark.parametrize("threads", [1, 2])  # the one-thread loop; column slabs, one thread each
def test_tiled_engine_matches_dense_engine(beta, threads, monkeypatch):
    # float64, so the two engines differ only by the order of additions (rounding ~1e-16 per step)
    monkeypatch.setattr(nmf_module, "_engine_threads", lambda n_frames: threads)
    V, W = _harmonic_problem(600, dtype=np.float64)
    assert nmf_module._plan_tiling(W, 600 // threads) is not None
    tiled = decompose(V, W, beta=beta, n_iter=30, tol=0)
    _dense_only(monkeypatch)
    dense = decompose(V, W, beta=beta, n_iter=30, tol=0)
    np.testing.assert_allclose(tiled.H, dense.H, rtol=1e-9, atol=1e-12)
    np.testing.assert_allclose(tiled.costs, dense.costs, rtol=1e-9)


def test_tiled_engine_matches_dense_engine_in_float32_with_penalties_and_mask(monkeypatch):
    V, W = _harmonic_problem(400, dtype=np.float32, seed=14)
    K, T = W.shape[1], V.shape[1]
    mask = (np.random.default_rng(15).random((K, T)) > 0.5).astype(np.float32)
    n_iter = 30
    options = dict(beta=1.0, n_iter=n_iter, tol=0, continuity=0.1, sparsity=0.05, mask=mask, mask_penalty=0.5)
    tiled = decompose(V, W, **options)
    _dense_only(monkeypatch)
    dense = decompose(V, W, **options)
    assert tiled.H.dtype == np.float32
    # float32: each product may round differently (γ_K relative, Higham 2002 eq. 3.5), for n_iter updates
    u = np.finfo(np.float32).eps / 2
    scale = float(np.abs(dense.H).max())
    np.testing.assert_allclose(tiled.H, dense.H, rtol=n_iter * K * u, atol=n_iter * K * u * scale)
    np.testing.assert_allclose(tiled.costs, dense.costs, rtol=n_iter * K * u)


@pytest.mark.parametrize("beta", [1.0, 2.0])
def test_tiled_updates_match_scikit_learn_with_a_harmonic_dictionary(beta):
    # Reference: scikit-learn's non_negative_factorization, solver='mu', dictionary fixed (see
    # test_updates_match_scikit_learn for the transposition), on the real banded dictionary.
    V, W = _harmonic_problem(250, dtype=np.float64, seed=16)
    assert nmf_module._plan_tiling(W, V.shape[1]) is not None  # the tiled path is the one under test
    K = W.shape[1]
    H0 = np.full((K, V.shape[1]), np.sqrt(V.mean() / K))
    ours = decompose(V, W, beta=beta, n_iter=20, tol=0, H_init=H0).H
    A, _, _ = non_negative_factorization(
        V.T, H=W.T.copy(), n_components=K, init="custom", update_H=False,
        solver="mu", beta_loss=beta, max_iter=20, tol=0, alpha_W=0.0, alpha_H=0.0,
    )
    np.testing.assert_allclose(ours, A.T, rtol=1e-6, atol=1e-9)


def test_tiled_engine_handles_empty_rows_and_columns(monkeypatch):
    # a banded W with frequency rows no template reaches and templates that are all zeros:
    # the tiling writes zeros there, as the dense product does
    F, K, T = 120, 30, 200
    f, k = np.meshgrid(np.arange(F), np.arange(K), indexing="ij")
    W = np.where(np.abs(f - 4 * k) <= 6, 1.0 + 0.01 * f, 0.0)
    W[:, 9:16] = 0.0
    W[50:76] = 0.0
    tiling = nmf_module._plan_tiling(W, T)
    assert tiling is not None
    assert any(not tiles for _, _, tiles in tiling.model) and any(not tiles for _, _, tiles in tiling.adjoint)
    rng = np.random.default_rng(17)
    V = W @ rng.random((K, T)) + 1e-3
    tiled = decompose(V, W, n_iter=20, tol=0)
    _dense_only(monkeypatch)
    dense = decompose(V, W, n_iter=20, tol=0)
    np.testing.assert_allclose(tiled.H, dense.H, rtol=1e-9, atol=1e-12)
