"""The exact denoiser of a Gaussian mixture: a teacher with zero training error, and ground truth in tests."""
from __future__ import annotations

import torch

from ..data.mixture import GaussianMixture
from ..denoiser import as_batch_times
from ..schedule import Schedule, broadcast


class OracleDenoiser:
    """predict(x_t, t) = (E[x0 | x_t], (x_t - alpha_t E[x0 | x_t]) / sigma_t), exact for the mixture."""

    def __init__(self, mixture: GaussianMixture, schedule: Schedule = Schedule()):
        self.mixture, self.schedule = mixture, schedule

    @torch.no_grad()
    def predict(self, x_t, t, cond=None):
        t = as_batch_times(t, x_t).to(torch.float64)
        alpha, sigma = self.schedule.alpha_sigma(t)
        x0_hat = self.mixture.posterior_mean(x_t, alpha, sigma)
        xt64 = x_t.to(torch.float64)
        eps_hat = (xt64 - broadcast(alpha, xt64) * x0_hat) / broadcast(sigma, xt64)
        return x0_hat.to(x_t.dtype), eps_hat.to(x_t.dtype)
