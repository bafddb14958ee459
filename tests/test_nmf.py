"""NMF engine against outside references: scikit-learn's NMF, Lee & Seung's monotonicity, exact recovery."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.decomposition import non_negative_factorization
from sklearn.decomposition._nmf import _beta_divergence

from takescribe.errors import InputError
from takescribe.nmf import beta_divergence, decompose, penalty_costs


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
