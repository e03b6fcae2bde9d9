"""Variance-preserving noise schedules in continuous time, and frame conversions.

x_t = alpha_t * x0 + sigma_t * eps with alpha_t**2 + sigma_t**2 = 1, t in [0, 1].
Every schedule is defined through its log-SNR lambda_t = log(alpha_t**2 / sigma_t**2), so
alpha_t**2 = sigmoid(lambda_t) and sigma_t**2 = sigmoid(-lambda_t) (Kingma et al. 2021).
The variance-exploding view of the same process (Karras et al. 2022) is x / alpha_t with
sigma_ve = sigma_t / alpha_t = exp(-lambda_t / 2). All frame conversions live in this file.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import torch

SCHEDULES = ("cosine", "linear")

# Cosine schedule offset s (Nichol & Dhariwal 2021, Eq. 17).
COSINE_S = 0.008
# Continuous linear-beta schedule: beta(t) = beta_min + t (beta_max - beta_min) with
# beta_min = 1000 * 1e-4 and beta_max = 1000 * 0.02, the continuous form of the discrete
# 1e-4 -> 0.02 over 1000 steps of Ho et al. 2020 (Song et al. 2021, Eq. 32).
BETA_MIN, BETA_MAX = 0.1, 20.0


@dataclass(frozen=True)
class Schedule:
    """A VP schedule named by `kind` ('cosine' or 'linear'); all methods take and return tensors."""

    kind: str = "cosine"

    def __post_init__(self):
        if self.kind not in SCHEDULES:
            raise ValueError(f"schedule '{self.kind}' is unknown; valid: {', '.join(SCHEDULES)}")

    def log_alpha2(self, t: torch.Tensor) -> torch.Tensor:
        """log alpha_t**2 (exact at t = 0 and, for cosine, -inf at t = 1)."""
        t = torch.as_tensor(t, dtype=torch.float64 if not torch.is_tensor(t) else t.dtype)
        if self.kind == "cosine":
            # alpha_bar(t) = f(t) / f(0), f(t) = cos^2(pi/2 (t + s) / (1 + s))  (Nichol & Dhariwal 2021)
            f = torch.cos(0.5 * math.pi * (t + COSINE_S) / (1 + COSINE_S))
            f0 = math.cos(0.5 * math.pi * COSINE_S / (1 + COSINE_S))
            return 2 * torch.log((f / f0).clamp(min=0.0))
        # log alpha_bar(t) = -(beta_min t + (beta_max - beta_min) t^2 / 2)  (Song et al. 2021)
        return -(BETA_MIN * t + 0.5 * (BETA_MAX - BETA_MIN) * t**2)

    def alpha_sigma(self, t: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """(alpha_t, sigma_t); sigma is computed as sqrt(-expm1(log alpha^2)) to stay exact near t = 0."""
        la2 = self.log_alpha2(t)
        alpha = torch.exp(0.5 * la2)
        sigma = torch.sqrt(-torch.expm1(la2)).clamp(min=0.0)
        return alpha, sigma

    def logsnr(self, t: torch.Tensor) -> torch.Tensor:
        """lambda_t = log(alpha^2 / sigma^2) = log alpha^2 - log(1 - alpha^2)."""
        la2 = self.log_alpha2(t)
        return la2 - torch.log(-torch.expm1(la2))

    def t_from_logsnr(self, lam: torch.Tensor) -> torch.Tensor:
        """Inverse of `logsnr` in closed form."""
        lam = torch.as_tensor(lam)
        la2 = torch.nn.functional.logsigmoid(lam)  # log alpha^2 = log sigmoid(lambda)
        if self.kind == "cosine":
            f0 = math.cos(0.5 * math.pi * COSINE_S / (1 + COSINE_S))
            f = torch.exp(0.5 * la2) * f0
            return (1 + COSINE_S) * (2 / math.pi) * torch.arccos(f.clamp(-1.0, 1.0)) - COSINE_S
        # Solve (beta_max - beta_min)/2 t^2 + beta_min t + la2 = 0 for t >= 0.
        a, b = 0.5 * (BETA_MAX - BETA_MIN), BETA_MIN
        return (-b + torch.sqrt(b * b - 4 * a * la2)) / (2 * a)

    def sigma_ve(self, t: torch.Tensor) -> torch.Tensor:
        """sigma / alpha = exp(-lambda / 2): the noise level of the variance-exploding view."""
        return torch.exp(-0.5 * self.logsnr(t))

    def t_from_sigma_ve(self, sigma_ve: torch.Tensor) -> torch.Tensor:
        return self.t_from_logsnr(-2 * torch.log(torch.as_tensor(sigma_ve)))


def eps_from_x0(x_t, x0, alpha, sigma):
    """eps = (x_t - alpha x0) / sigma (undefined where sigma = 0)."""
    return (x_t - alpha * x0) / sigma


def x0_from_eps(x_t, eps, alpha, sigma):
    """x0 = (x_t - sigma eps) / alpha (undefined where alpha = 0)."""
    return (x_t - sigma * eps) / alpha


def v_from_x0_eps(x0, eps, alpha, sigma):
    """v = alpha eps - sigma x0 (Salimans & Ho 2022, Sec. 4)."""
    return alpha * eps - sigma * x0


def x0_eps_from_v(x_t, v, alpha, sigma):
    """Invert v with alpha^2 + sigma^2 = 1: x0 = alpha x_t - sigma v, eps = sigma x_t + alpha v."""
    return alpha * x_t - sigma * v, sigma * x_t + alpha * v


def broadcast(coef: torch.Tensor, x: torch.Tensor) -> torch.Tensor:
    """Reshape a per-sample coefficient (B,) so it broadcasts against x (B, ...)."""
    coef = torch.as_tensor(coef, dtype=x.dtype, device=x.device)
    return coef.reshape(coef.shape + (1,) * (x.dim() - coef.dim()))


def karras_sigmas(n: int, sigma_min: float, sigma_max: float, rho: float = 7.0) -> torch.Tensor:
    """sigma_i = (sigma_max^(1/rho) + i/(n-1) (sigma_min^(1/rho) - sigma_max^(1/rho)))^rho, i = 0..n-1,
    descending from sigma_max to sigma_min (Karras et al. 2022, Eq. 5, without the appended 0)."""
    if n < 2:
        raise ValueError(f"the Karras grid needs n >= 2 points, got {n}")
    ramp = torch.linspace(0, 1, n, dtype=torch.float64)
    inv_rho_max, inv_rho_min = sigma_max ** (1 / rho), sigma_min ** (1 / rho)
    sigmas = (inv_rho_max + ramp * (inv_rho_min - inv_rho_max)) ** rho
    sigmas[0], sigmas[-1] = sigma_max, sigma_min  # exact endpoints (the rho-th power can be off by an ulp)
    return sigmas
