"""The Gaussian mixture (distillrun.data.mixture) and its exact denoiser (distillrun.nets.oracle), against
Tweedie's formula, scipy.stats and numpy."""
from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from scipy import stats
from scipy.special import logsumexp

from distillrun.data.mixture import GaussianMixture, archipelago
from distillrun.nets.oracle import OracleDenoiser
from distillrun.schedule import Schedule


def _points(n: int, seed: int, scale: float = 1.5) -> torch.Tensor:
    return scale * torch.randn(n, 2, generator=torch.Generator().manual_seed(seed), dtype=torch.float64)


def _closed_form_moments(mix: GaussianMixture):
    """Mixture mean sum_k w_k mu_k and covariance sum_k w_k (Sigma_k + mu_k mu_k^T) - mean mean^T (law of total
    variance; e.g. Bishop 2006, Ex. 9.10/Eq. 9.49), in numpy."""
    w, mu, cov = mix.weights.numpy(), mix.means.numpy(), mix.covs.numpy()
    mean = (w[:, None] * mu).sum(0)
    second = (w[:, None, None] * (cov + mu[:, :, None] * mu[:, None, :])).sum(0)
    return mean, second - np.outer(mean, mean)


# ----------------------------------------------------------------------------------------------- Tweedie
@pytest.mark.parametrize("kind", ["cosine", "linear"])
@pytest.mark.parametrize("t", [0.05, 0.3, 0.6, 0.9])
def test_oracle_is_tweedie(kind, t):
    # Tweedie's formula (Efron 2011, Eq. 2.8; Robbins 1956): for x_t = alpha x0 + sigma eps,
    #   E[x0 | x_t] = (x_t + sigma^2 grad log p_t(x_t)) / alpha,   and so eps_hat = -sigma grad log p_t(x_t).
    # The gradient comes from torch.autograd on the noisy log-density, independent of posterior_mean.
    sch = Schedule(kind)
    mix = archipelago()
    alpha, sigma = (float(c) for c in sch.alpha_sigma(torch.tensor(t, dtype=torch.float64)))
    x_t = _points(256, 0).requires_grad_(True)
    (score,) = torch.autograd.grad(mix.noisy_log_prob(x_t, alpha, sigma).sum(), x_t)
    x_t = x_t.detach()
    x0_hat, eps_hat = OracleDenoiser(mix, sch).predict(x_t, t)
    torch.testing.assert_close(x0_hat, (x_t + sigma**2 * score) / alpha, rtol=1e-9, atol=1e-9)
    torch.testing.assert_close(eps_hat, -sigma * score, rtol=1e-9, atol=1e-9)


def test_oracle_accepts_per_sample_times():
    # Same formula with a different t per row (the way progressive distillation calls it).
    sch, mix = Schedule("cosine"), archipelago()
    x_t = _points(6, 1)
    t = torch.tensor([0.1, 0.2, 0.4, 0.5, 0.7, 0.95], dtype=torch.float64)
    x0_hat, _ = OracleDenoiser(mix, sch).predict(x_t, t)
    for i in range(6):
        x0_i, _ = OracleDenoiser(mix, sch).predict(x_t[i:i + 1], float(t[i]))
        torch.testing.assert_close(x0_hat[i:i + 1], x0_i, rtol=1e-12, atol=1e-12)


def test_oracle_limits():
    # Limits of E[x0 | x_t]: at t -> 0 (sigma -> 0) it returns x_t itself; at t = 1 on the cosine schedule
    # (alpha ~ 0, no signal) it returns the data mean (definition of conditional expectation).
    mix = archipelago()
    sch = Schedule("cosine")
    x = _points(64, 2, scale=1.0)
    x0_hat, _ = OracleDenoiser(mix, sch).predict(x, 1e-6)
    torch.testing.assert_close(x0_hat, x, rtol=0, atol=1e-4)
    x0_top, _ = OracleDenoiser(mix, sch).predict(_points(64, 3), 1.0)
    mean, _ = _closed_form_moments(mix)
    np.testing.assert_allclose(x0_top.numpy(), np.broadcast_to(mean, (64, 2)), rtol=0, atol=1e-12)


# ------------------------------------------------------------------------------------- densities
def _scipy_log_prob(mix: GaussianMixture, x: np.ndarray, alpha: float = 1.0, sigma: float = 0.0) -> np.ndarray:
    """log sum_k w_k N(x; alpha mu_k, alpha^2 Sigma_k + sigma^2 I) with scipy.stats.multivariate_normal."""
    comps = [np.log(w) + stats.multivariate_normal(alpha * mu, alpha**2 * c + sigma**2 * np.eye(2)).logpdf(x)
             for w, mu, c in zip(mix.weights.numpy(), mix.means.numpy(), mix.covs.numpy())]
    return logsumexp(np.stack(comps, 1), axis=1)


def test_log_prob_matches_scipy():
    # Source: scipy.stats.multivariate_normal.logpdf per component, combined with scipy.special.logsumexp.
    mix = archipelago()
    x = _points(500, 4)
    np.testing.assert_allclose(mix.log_prob(x).numpy(), _scipy_log_prob(mix, x.numpy()), rtol=1e-10, atol=1e-10)


@pytest.mark.parametrize("alpha,sigma", [(0.8, 0.6), (0.1, math.sqrt(0.99))])
def test_noisy_log_prob_matches_scipy(alpha, sigma):
    # x_t = alpha x0 + sigma eps maps component k to N(alpha mu_k, alpha^2 Sigma_k + sigma^2 I) (affine map of a
    # Gaussian plus independent Gaussian noise); scipy as the reference.
    mix = archipelago()
    x = _points(300, 5)
    np.testing.assert_allclose(mix.noisy_log_prob(x, alpha, sigma).numpy(),
                               _scipy_log_prob(mix, x.numpy(), alpha, sigma), rtol=1e-10, atol=1e-10)


def test_density_integrates_to_one():
    # A density integrates to 1: trapezoid rule on a fine grid over [-4, 4]^2 (mass outside is < 1e-9 for std ~1).
    mix = archipelago()
    g = np.linspace(-4, 4, 401)
    xx, yy = np.meshgrid(g, g, indexing="ij")
    p = np.exp(mix.log_prob(torch.from_numpy(np.stack([xx.ravel(), yy.ravel()], 1))).numpy()).reshape(xx.shape)
    assert np.trapezoid(np.trapezoid(p, g, axis=1), g) == pytest.approx(1.0, abs=1e-6)


def test_responsibilities_sum_to_one_and_match_bayes():
    # Bayes' rule: p(k | x) = w_k N_k(x) / sum_j w_j N_j(x); rows sum to 1.
    mix = archipelago()
    x = _points(200, 6)
    r = mix.responsibilities(x, 0.7, math.sqrt(0.51)).numpy()
    np.testing.assert_allclose(r.sum(1), 1.0, rtol=0, atol=1e-12)
    comps = np.stack([np.log(w) + stats.multivariate_normal(0.7 * mu, 0.49 * c + 0.51 * np.eye(2)).logpdf(x.numpy())
                      for w, mu, c in zip(mix.weights.numpy(), mix.means.numpy(), mix.covs.numpy())], 1)
    np.testing.assert_allclose(r, np.exp(comps - logsumexp(comps, axis=1, keepdims=True)), rtol=1e-9, atol=1e-12)


# --------------------------------------------------------------------------------------- moments
def test_sample_moments_match_closed_form():
    # Closed-form mixture mean/covariance (law of total variance) versus n = 200k samples, within 4 standard errors
    # by the central limit theorem, with each SE estimated from the sample itself: std(x_i) / sqrt(n) for a mean,
    # std((x_i - mean_i)(x_j - mean_j)) / sqrt(n) for a covariance entry (no normality assumed).
    mix = archipelago()
    n = 200_000
    x, labels = mix.sample(n, torch.Generator().manual_seed(7))
    x = x.double().numpy()
    mean, cov = _closed_form_moments(mix)
    assert np.all(np.abs(x.mean(0) - mean) < 4 * x.std(0) / np.sqrt(n))
    c = x - mean
    prods = c[:, :, None] * c[:, None, :]
    assert np.all(np.abs(prods.mean(0) - cov) < 4 * prods.std(0) / np.sqrt(n))
    # each component is N(mu_k, Sigma_k): per-label mean and covariance within 4 SE (normal theory, Anderson 2003,
    # Sec. 3.4: SE of a mean sqrt(S_ii / n_k), of a covariance entry sqrt((S_ii S_jj + S_ij^2) / n_k))
    labels_np = labels.numpy()
    for k in range(6):
        xk = x[labels_np == k]
        nk, mu_k, cov_k = len(xk), mix.means[k].numpy(), mix.covs[k].numpy()
        assert np.all(np.abs(xk.mean(0) - mu_k) < 4 * np.sqrt(np.diag(cov_k) / nk))
        se_k = np.sqrt((np.outer(np.diag(cov_k), np.diag(cov_k)) + cov_k**2) / nk)
        assert np.all(np.abs(np.cov(xk.T) - cov_k) < 4 * se_k), k
    # labels follow the weights (multinomial SE sqrt(w (1 - w) / n))
    share = np.bincount(labels.numpy(), minlength=6) / n
    w = mix.weights.numpy()
    assert np.all(np.abs(share - w) < 4 * np.sqrt(w * (1 - w) / n))


def test_std_matches_numpy_and_closed_form():
    # GaussianMixture.std(): exact per-axis std; versus numpy's np.std of 200k samples and the closed-form covariance.
    mix = archipelago()
    x = mix.sample(200_000, torch.Generator().manual_seed(8))[0].double().numpy()
    _, cov = _closed_form_moments(mix)
    np.testing.assert_allclose(mix.std().numpy(), np.sqrt(np.diag(cov)), rtol=1e-12)
    np.testing.assert_allclose(mix.std().numpy(), x.std(0), rtol=5e-3)  # SE of a std ~ 1/sqrt(2n) = 0.16 %
