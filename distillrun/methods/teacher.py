"""The teacher: trained here with the denoising loss, the exact mixture denoiser, or the user's network.

Denoising loss (Ho et al. 2020; v-target from Salimans & Ho 2022): t ~ U(0, 1), eps ~ N(0, I),
x_t = alpha_t x0 + sigma_t eps, loss = ||net(x_t, t) - target||^2 with target = v, eps or x0.
"""
from __future__ import annotations

import torch
from omegaconf import ListConfig
from torch import nn

from ..denoiser import NetDenoiser, target_for
from ..distributed import current_shard
from ..nets import NETS, build_net
from ..schedule import Schedule, broadcast

# Times are drawn from [T_MIN, 1]: at t = 0 the input equals the data and the target is degenerate.
T_MIN = 1e-4


def draw_noisy(x0: torch.Tensor, schedule: Schedule, generator: torch.Generator):
    """(t, eps, alpha, sigma, x_t) for a batch of clean data, all randomness from `generator`."""
    t = torch.rand(x0.shape[0], generator=generator).to(x0.device) * (1 - T_MIN) + T_MIN
    eps = torch.randn(x0.shape, generator=generator).to(x0.device)
    alpha, sigma = (broadcast(c, x0) for c in schedule.alpha_sigma(t))
    return t, eps, alpha, sigma, alpha * x0 + sigma * eps


def denoising_loss(model: NetDenoiser, target_model, batch, generator):
    """Mean squared error of the network output against the parameterization's target.
    Randomness is drawn for the whole (global) batch, the loss on this rank's rows (distributed.Shard)."""
    x0, cond = batch
    t, eps, alpha, sigma, x_t = draw_noisy(x0, model.schedule, generator)
    x0, cond, t, eps, alpha, sigma, x_t = current_shard().local(x0, cond, t, eps, alpha, sigma, x_t)
    target = target_for(model.parameterization, x0, eps, alpha, sigma)
    return torch.mean((model(x_t, t, cond) - target) ** 2)


def drop_labels(cond, p: float, null_label: int, generator: torch.Generator):
    """Each label replaced by the null label with probability p (label dropout, Ho & Salimans 2022, Alg. 1), so
    one network learns the class-conditional and the unconditional denoiser. p = 0 draws nothing."""
    if cond is None or p <= 0:
        return cond
    drop = torch.rand(cond.shape[0], generator=generator).to(cond.device) < p
    return torch.where(drop, torch.full_like(cond, null_label), cond)


def denoising_loss_with_dropout(p: float, null_label: int):
    """denoising_loss with the labels dropped to `null_label` with probability p (drawn after the noise)."""
    if p <= 0:
        return denoising_loss

    def loss(model: NetDenoiser, target_model, batch, generator):
        x0, cond = batch
        t, eps, alpha, sigma, x_t = draw_noisy(x0, model.schedule, generator)
        cond = drop_labels(cond, p, null_label, generator)
        x0, cond, t, eps, alpha, sigma, x_t = current_shard().local(x0, cond, t, eps, alpha, sigma, x_t)
        target = target_for(model.parameterization, x0, eps, alpha, sigma)
        return torch.mean((model(x_t, t, cond) - target) ** 2)
    return loss


def oracle_fit_loss(oracle, p: float = 0.0, null_label: int = 0):
    """Regress the network onto the exact denoiser (same output space as denoising_loss, exact target:
    no data noise in the target, so a network copy of the oracle is learned with far fewer iterations).
    With a labelled oracle and label dropout p the network learns the conditional and unconditional ones."""
    def loss(model: NetDenoiser, target_model, batch, generator):
        x0, cond = batch
        t, _, alpha, sigma, x_t = draw_noisy(x0, model.schedule, generator)
        cond = drop_labels(cond, p, null_label, generator)
        x0, cond, t, alpha, sigma, x_t = current_shard().local(x0, cond, t, alpha, sigma, x_t)
        # A labelled oracle answers per label (the null label: unconditionally); otherwise it ignores cond.
        x0_star, eps_star = oracle.predict(x_t, t, cond if getattr(oracle, "labelled", False) else None)
        target = target_for(model.parameterization, x0_star, eps_star, alpha, sigma)
        return torch.mean((model(x_t, t, cond) - target) ** 2)
    return loss


def network_for(cfg, data) -> tuple[nn.Module, dict]:
    """The configured network for this data, and the arguments that rebuild it."""
    num_classes = data.num_classes if cfg.net.class_cond else 0
    kwargs = {k: tuple(v) if isinstance(v, (list, ListConfig)) else v
              for k in NETS[cfg.net.kind].size_keys for v in [cfg.net[k]]}
    net = build_net(cfg.net.kind, data.shape, num_classes, **kwargs)
    arch = {"kind": cfg.net.kind, "data_shape": list(data.shape), "num_classes": num_classes, "kwargs": kwargs}
    return net, arch
