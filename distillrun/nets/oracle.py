"""The exact denoiser of a Gaussian mixture: a teacher with zero training error, and ground truth in tests.

With labels (the mixture's components, label k = component k) it is the exact class-conditional denoiser
E[x0 | x_t, k]; the reserved null label K (= number of components) and cond=None give the unconditional
E[x0 | x_t]. Both are what classifier-free guidance combines (see distillrun.guidance).
"""
from __future__ import annotations

import torch

from ..data.mixture import GaussianMixture
from ..denoiser import as_batch_times, split_cond
from ..schedule import Schedule, broadcast


class OracleDenoiser:
    """predict(x_t, t, cond) = (x0_hat, (x_t - alpha_t x0_hat) / sigma_t) with x0_hat = E[x0 | x_t] for
    cond None or the null label, E[x0 | x_t, label] otherwise; exact for the mixture. With labelled=False it
    is the unconditional denoiser whatever cond says (the teacher of an unconditional student, which is
    handed the data's labels too and ignores them)."""

    def __init__(self, mixture: GaussianMixture, schedule: Schedule = Schedule(), labelled: bool = False):
        self.mixture, self.schedule, self.labelled = mixture, schedule, labelled

    @property
    def num_classes(self) -> int:
        return self.mixture.means.shape[0]

    @torch.no_grad()
    def predict(self, x_t, t, cond=None):
        labels, w = split_cond(cond)
        if not self.labelled:
            labels = None
        elif w is not None:
            raise ValueError("the exact denoiser takes labels, not a guidance weight; wrap it in guidance.Guided")
        t = as_batch_times(t, x_t).to(torch.float64)
        if t.numel() > 1 and bool((t == t[0]).all()):
            t = t[:1]  # one time for the batch (as samplers pass it): the noisy covariances are factorised once
        alpha, sigma = self.schedule.alpha_sigma(t)
        if labels is None:
            x0_hat = self.mixture.posterior_mean(x_t, alpha, sigma)
        else:
            labels = torch.as_tensor(labels, device=x_t.device).long().reshape(-1).expand(x_t.shape[0]).cpu()
            k = self.num_classes
            if int(labels.min()) < 0 or int(labels.max()) > k:
                raise ValueError(f"labels must lie in [0, {k}] ({k} = no label); got {labels.min()}..{labels.max()}")
            resp, per_k = self.mixture.component_posterior_means(x_t.cpu(), alpha.cpu(), sigma.cpu())
            uncond = (resp.unsqueeze(-1) * per_k).sum(1)
            own = per_k[torch.arange(len(labels)), labels.clamp(max=k - 1)]
            x0_hat = torch.where((labels == k)[:, None], uncond, own).to(x_t.device)
        xt64 = x_t.to(torch.float64)
        eps_hat = (xt64 - broadcast(alpha, xt64) * x0_hat) / broadcast(sigma, xt64)
        return x0_hat.to(x_t.dtype), eps_hat.to(x_t.dtype)
