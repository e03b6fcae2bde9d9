"""A Denoiser answers x0- and eps-predictions for any (x_t, t); samplers and methods talk only to it.

`NetDenoiser` wraps (network, parameterization, schedule). Anything with a `schedule` attribute and a
`predict(x_t, t, cond=None) -> (x0_hat, eps_hat)` method is a Denoiser too (the exact mixture
denoiser in `nets/oracle.py` is one).
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

import torch
from torch import nn

from .schedule import Schedule, broadcast, eps_from_x0, v_from_x0_eps, x0_eps_from_v, x0_from_eps

PARAMETERIZATIONS = ("v", "eps", "x0")
# eps-prediction divides by alpha_t to recover x0; at the top of the cosine schedule alpha_t = 0.
# Clamp so the division stays finite (common practice; v- and x0-prediction need no clamp).
ALPHA_FLOOR = 1e-4


@dataclass(frozen=True)
class GuidanceCond:
    """The condition of a guidance-conditioned student: class labels (B,) and guidance weights w (B,), passed
    wherever a plain label tensor goes (cond=...). w follows x_w = (1 + w) x(z, c) - w x(z, null): w = 0 is
    the plain conditional model (the other common convention, a scale s = 1 + w, has s = 1 there).
    Indexing by rows and .to(device) act on both, so data-parallel sharding handles it like a tensor."""

    labels: torch.Tensor
    w: torch.Tensor

    @property
    def shape(self) -> torch.Size:
        return self.labels.shape

    def __len__(self) -> int:
        return self.labels.shape[0]

    def __getitem__(self, rows) -> "GuidanceCond":
        return GuidanceCond(self.labels[rows], self.w[rows])

    def to(self, device) -> "GuidanceCond":
        return GuidanceCond(self.labels.to(device), self.w.to(device))


def split_cond(cond) -> tuple[torch.Tensor | None, torch.Tensor | None]:
    """(labels or None, w or None) from a cond that is None, a label tensor or a GuidanceCond."""
    if isinstance(cond, GuidanceCond):
        return cond.labels, cond.w
    return cond, None


class Denoiser(Protocol):
    schedule: Schedule

    def predict(self, x_t: torch.Tensor, t: torch.Tensor, cond=None) -> tuple[torch.Tensor, torch.Tensor]:
        ...


def as_batch_times(t, x: torch.Tensor) -> torch.Tensor:
    """A scalar or (B,) time becomes a (B,) tensor on x's device and dtype."""
    t = torch.as_tensor(t, dtype=x.dtype, device=x.device)
    return t.expand(x.shape[0]) if t.dim() == 0 else t


def shared_time(t: torch.Tensor) -> bool:
    """True for a (B,) time that is one value expanded to every row (stride 0), as samplers pass it
    (as_batch_times): the embedding is then computed once instead of B times."""
    return t.dim() == 1 and t.shape[0] > 1 and t.stride(0) == 0


def target_for(parameterization: str, x0, eps, alpha, sigma):
    """What a network of this parameterization should output for a noisy sample built from (x0, eps)."""
    if parameterization == "v":
        return v_from_x0_eps(x0, eps, alpha, sigma)
    return eps if parameterization == "eps" else x0


def predictions_from_output(parameterization: str, x_t, out, alpha, sigma):
    """(x0_hat, eps_hat) from a network output in the given parameterization."""
    if parameterization == "v":
        return x0_eps_from_v(x_t, out, alpha, sigma)
    if parameterization == "eps":
        return x0_from_eps(x_t, out, alpha.clamp(min=ALPHA_FLOOR), sigma), out
    if parameterization == "x0":
        return out, eps_from_x0(x_t, out, alpha, sigma)
    raise ValueError(f"parameterization '{parameterization}' is unknown; valid: {', '.join(PARAMETERIZATIONS)}")


class NetDenoiser(nn.Module):
    """network(x_t, t, cond) -> output in `parameterization`; predictions through the schedule."""

    def __init__(self, net: nn.Module, parameterization: str = "v", schedule: Schedule = Schedule()):
        super().__init__()
        if parameterization not in PARAMETERIZATIONS:
            raise ValueError(f"parameterization '{parameterization}' is unknown; valid: {', '.join(PARAMETERIZATIONS)}")
        self.net, self.parameterization, self.schedule = net, parameterization, schedule

    def forward(self, x_t, t, cond=None):
        """Raw network output (used by training losses)."""
        return self.net(x_t, as_batch_times(t, x_t), cond)

    def predict(self, x_t, t, cond=None):
        return self.predictions(x_t, t, self(x_t, t, cond))

    def predictions(self, x_t, t, out):
        """(x0_hat, eps_hat) from a raw output `out` at (x_t, t); split from predict so a data-parallel
        wrapper can run the forward pass itself (distributed.Replicated)."""
        t = as_batch_times(t, x_t)
        alpha, sigma = (broadcast(c, x_t) for c in self.schedule.alpha_sigma(t))
        return predictions_from_output(self.parameterization, x_t, out, alpha, sigma)
