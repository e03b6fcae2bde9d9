"""The Gaussian mixture with everything exact: sampling, log-density of the data and of every noisy
marginal, component responsibilities, and the posterior mean E[x0 | x_t] (the oracle denoiser).

Our demo scenario, "archipelago": six islands of unequal mass and shape, two of them small, so a
few-step sampler that drops a mode shows it in the mode-coverage table. The islands are also the labels
of the labelled archipelago (label k = component k), so class-conditional denoisers are exact too.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import torch


def _rotated_cov(sx: float, sy: float, angle: float) -> list[list[float]]:
    c, s = math.cos(angle), math.sin(angle)
    r = torch.tensor([[c, -s], [s, c]], dtype=torch.float64)
    return (r @ torch.diag(torch.tensor([sx**2, sy**2], dtype=torch.float64)) @ r.T).tolist()


@dataclass
class GaussianMixture:
    """p(x0) = sum_k w_k N(x0; mu_k, Sigma_k). Tensors are float64; inputs of any float dtype are accepted."""

    weights: torch.Tensor  # (K,)
    means: torch.Tensor  # (K, d)
    covs: torch.Tensor  # (K, d, d)

    def __post_init__(self):
        self.weights = torch.as_tensor(self.weights, dtype=torch.float64)
        self.weights = self.weights / self.weights.sum()
        self.means = torch.as_tensor(self.means, dtype=torch.float64)
        self.covs = torch.as_tensor(self.covs, dtype=torch.float64)

    @property
    def dim(self) -> int:
        return self.means.shape[1]

    def sample(self, n: int, generator: torch.Generator | None = None) -> tuple[torch.Tensor, torch.Tensor]:
        """n exact samples (float32) and their component labels."""
        labels = torch.multinomial(self.weights, n, replacement=True, generator=generator)
        z = torch.randn(n, self.dim, generator=generator, dtype=torch.float64)
        chol = torch.linalg.cholesky(self.covs)[labels]
        x = self.means[labels] + (chol @ z.unsqueeze(-1)).squeeze(-1)
        return x.float(), labels

    def _noisy_components(self, x_t, alpha, sigma):
        """Per-sample, per-component log w_k N(x_t; alpha mu_k, alpha^2 Sigma_k + sigma^2 I) and the
        covariance; x_t = alpha x0 + sigma eps turns each component into another Gaussian."""
        x_t = x_t.to(torch.float64)
        alpha = torch.as_tensor(alpha, dtype=torch.float64).reshape(-1, 1, 1, 1)  # (B or 1, 1, 1, 1)
        sigma = torch.as_tensor(sigma, dtype=torch.float64).reshape(-1, 1, 1, 1)
        eye = torch.eye(self.dim, dtype=torch.float64)
        cov = alpha**2 * self.covs + sigma**2 * eye  # (B, K, d, d)
        diff = x_t[:, None, :] - alpha[..., 0] * self.means  # (B, K, d)
        chol = torch.linalg.cholesky(cov)
        if cov.shape[0] == 1:  # one time for the whole batch: K precision matrices, applied to every row at once
            sol = torch.einsum("kij,bkj->bki", torch.cholesky_inverse(chol[0]), diff)
        else:
            sol = torch.cholesky_solve(diff.unsqueeze(-1), chol).squeeze(-1)
        maha = (diff * sol).sum(-1)
        logdet = 2 * torch.log(torch.diagonal(chol, dim1=-2, dim2=-1)).sum(-1)
        logn = -0.5 * (maha + logdet + self.dim * math.log(2 * math.pi))
        return torch.log(self.weights) + logn, cov, diff, sol

    def noisy_log_prob(self, x_t, alpha, sigma) -> torch.Tensor:
        """log p_t(x_t) for the marginal of x_t = alpha x0 + sigma eps."""
        return torch.logsumexp(self._noisy_components(x_t, alpha, sigma)[0], dim=1)

    def log_prob(self, x) -> torch.Tensor:
        return self.noisy_log_prob(x, 1.0, 0.0)

    def responsibilities(self, x, alpha=1.0, sigma=0.0) -> torch.Tensor:
        """p(k | x_t), shape (B, K)."""
        return torch.softmax(self._noisy_components(x, alpha, sigma)[0], dim=1)

    def component_posterior_means(self, x_t, alpha, sigma) -> tuple[torch.Tensor, torch.Tensor]:
        """(p(k | x_t) (B, K), E[x0 | x_t, k] (B, K, d)) with E[x0 | x_t, k] = mu_k + alpha Sigma_k
        (alpha^2 Sigma_k + sigma^2 I)^-1 (x_t - alpha mu_k), the Gaussian conditioning formula per component
        (e.g. Bishop 2006, Eq. 2.116). Component k given is the class-conditional denoiser of label k."""
        logw, _, _, sol = self._noisy_components(x_t, alpha, sigma)
        a = torch.as_tensor(alpha, dtype=torch.float64).reshape(-1, 1, 1)
        per_k = self.means + a * (self.covs @ sol.unsqueeze(-1)).squeeze(-1)  # (B, K, d)
        return torch.softmax(logw, dim=1), per_k

    def posterior_mean(self, x_t, alpha, sigma) -> torch.Tensor:
        """E[x0 | x_t] = sum_k p(k | x_t) E[x0 | x_t, k] (see component_posterior_means)."""
        resp, per_k = self.component_posterior_means(x_t, alpha, sigma)
        return (resp.unsqueeze(-1) * per_k).sum(1)

    def entropy(self, n: int = 200_000, seed: int = 0) -> float:
        """H(p) = -E log p(x0), by Monte Carlo on n exact samples (no closed form for mixtures)."""
        x, _ = self.sample(n, torch.Generator().manual_seed(seed))
        return float(-self.log_prob(x).mean())

    def std(self) -> torch.Tensor:
        """Per-axis standard deviation of the mixture, exact."""
        mean = (self.weights[:, None] * self.means).sum(0)
        second = (self.weights[:, None] * (torch.diagonal(self.covs, dim1=-2, dim2=-1) + self.means**2)).sum(0)
        return torch.sqrt(second - mean**2)


def archipelago() -> GaussianMixture:
    """Six islands; weights 0.26/0.20/0.18/0.16/0.12/0.08 (two small ones), anisotropic shapes, std ~1 per axis."""
    means = [[-1.45, 0.35], [-0.55, 1.45], [0.95, 1.05], [1.55, -0.35], [0.35, -1.35], [-1.05, -1.15]]
    weights = [0.26, 0.08, 0.20, 0.12, 0.18, 0.16]
    shapes = [(0.22, 0.10, 0.6), (0.12, 0.12, 0.0), (0.20, 0.09, -0.5), (0.10, 0.18, 0.3), (0.25, 0.08, 0.1), (0.14, 0.11, 1.1)]
    covs = [_rotated_cov(*s) for s in shapes]
    return GaussianMixture(torch.tensor(weights), torch.tensor(means), torch.tensor(covs))


# Islands moved in archipelago_moved: index -> offset (the largest island and a mid-sized one).
MOVED_ISLANDS = {0: (0.45, -0.55), 3: (-0.35, 0.60)}


def archipelago_moved() -> GaussianMixture:
    """The archipelago with two islands moved (MOVED_ISLANDS), same weights and shapes: a shifted variant of the
    data to fine-tune a teacher on (e.g. to test whether a speed adapter transfers to the fine-tuned teacher)."""
    mix = archipelago()
    means = mix.means.clone()
    for i, (dx, dy) in MOVED_ISLANDS.items():
        means[i] += torch.tensor([dx, dy], dtype=means.dtype)
    return GaussianMixture(mix.weights, means, mix.covs)
