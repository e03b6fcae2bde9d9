"""Step grids and samplers. Each sampler takes a Denoiser, a starting noise tensor and an explicit grid
of times t_0 = t_max > t_1 > ... > t_N = 0, so teacher and student can be run from the same noise."""
from __future__ import annotations

import torch

from .denoiser import Denoiser
from .schedule import Schedule, karras_sigmas


def uniform_grid(steps: int, t_max: float = 1.0) -> torch.Tensor:
    """t_i = t_max (1 - i / steps), i = 0..steps: the grid of DDIM and progressive distillation."""
    if steps < 1:
        raise ValueError(f"steps must be >= 1, got {steps}")
    return torch.linspace(t_max, 0.0, steps + 1, dtype=torch.float64)


def karras_grid(steps: int, schedule: Schedule, sigma_min: float, sigma_max: float, rho: float = 7.0) -> torch.Tensor:
    """Times whose sigma_ve follow the Karras et al. 2022 Eq. 5 grid, with a final t = 0 appended."""
    sig = karras_sigmas(steps, sigma_min, sigma_max, rho) if steps > 1 else torch.tensor([sigma_max], dtype=torch.float64)
    return torch.cat([schedule.t_from_sigma_ve(sig), torch.zeros(1, dtype=torch.float64)])


def _coefs(schedule: Schedule, t: float):
    alpha, sigma = schedule.alpha_sigma(torch.tensor(float(t), dtype=torch.float64))
    return float(alpha), float(sigma)


def ddim_step(denoiser: Denoiser, x, t: float, s: float, eta: float = 0.0, cond=None, generator=None):
    """One DDIM step t -> s (Song et al. 2021, Eq. 12) in continuous VP time:
    x_s = alpha_s x0_hat + sqrt(sigma_s^2 - c^2) eps_hat + c z, with
    c^2 = eta^2 sigma_s^2 (1 - exp(lambda_t - lambda_s)), the posterior variance of q(x_s | x_t, x0) at eta = 1."""
    x0_hat, eps_hat = denoiser.predict(x, t, cond)
    alpha_s, sigma_s = _coefs(denoiser.schedule, s)
    if eta == 0.0 or s <= 0.0:
        return alpha_s * x0_hat + sigma_s * eps_hat
    lam_t, lam_s = (float(denoiser.schedule.logsnr(torch.tensor(float(v), dtype=torch.float64))) for v in (t, s))
    c2 = eta**2 * sigma_s**2 * -torch.expm1(torch.tensor(lam_t - lam_s)).item()
    z = torch.randn(x.shape, generator=generator, dtype=x.dtype, device="cpu").to(x.device)
    return alpha_s * x0_hat + max(sigma_s**2 - c2, 0.0) ** 0.5 * eps_hat + c2**0.5 * z


def euler_step(denoiser: Denoiser, x, t: float, s: float, cond=None, **_):
    """Euler on the probability-flow ODE in the variance-exploding frame, dx_ve/dsigma_ve = eps_hat
    (Karras et al. 2022, Alg. 1 with an Euler step). In this frame it coincides with DDIM at eta = 0."""
    return ddim_step(denoiser, x, t, s, 0.0, cond)


def heun_step(denoiser: Denoiser, x, t: float, s: float, cond=None, **_):
    """Heun's 2nd-order step on dx_ve/dsigma_ve = eps_hat (Karras et al. 2022, Alg. 1):
    x_ve' = x_ve + (sigma_s - sigma_t) eps(x_t); x_ve(s) = x_ve + (sigma_s - sigma_t) (eps(x_t) + eps(x'_s)) / 2.
    Falls back to Euler where a 2nd evaluation is undefined: into s = 0 and out of alpha_t = 0 (SNR 0)."""
    sch = denoiser.schedule
    alpha_t, sigma_t = _coefs(sch, t)
    alpha_s, sigma_s = _coefs(sch, s)
    x0_t, eps_t = denoiser.predict(x, t, cond)
    if s <= 0.0 or alpha_t < 1e-6:  # cosine gives alpha_1 = 6e-17 in floating point, not 0
        return alpha_s * x0_t + sigma_s * eps_t
    x_prime = alpha_s * x0_t + sigma_s * eps_t
    _, eps_s = denoiser.predict(x_prime, s, cond)
    ve_t, ve_s = sigma_t / alpha_t, sigma_s / alpha_s
    x_ve = x / alpha_t + (ve_s - ve_t) * 0.5 * (eps_t + eps_s)
    return alpha_s * x_ve


STEPS = {"ddim": ddim_step, "euler": euler_step, "heun": heun_step}
SAMPLERS = ("ddim", "ancestral", "euler", "heun")


@torch.no_grad()
def sample(denoiser: Denoiser, noise: torch.Tensor, grid: torch.Tensor, sampler: str = "ddim",
           eta: float = 0.0, cond=None, generator: torch.Generator | None = None) -> torch.Tensor:
    """Run `sampler` over `grid` from x_{t_0} = sigma_{t_0} * noise, the usual pure-noise start (exact when
    t_0 = 1 on the cosine schedule, where sigma = 1 and alpha = 0). 'ancestral' is DDIM with eta = 1."""
    if sampler not in SAMPLERS:
        raise ValueError(f"sampler '{sampler}' is unknown; valid: {', '.join(SAMPLERS)}")
    if sampler == "ancestral":
        sampler, eta = "ddim", 1.0
    grid = [float(v) for v in grid]
    x = _coefs(denoiser.schedule, grid[0])[1] * noise
    step = STEPS[sampler]
    for t, s in zip(grid[:-1], grid[1:]):
        x = step(denoiser, x, t, s, eta=eta, cond=cond, generator=generator) if sampler == "ddim" else step(denoiser, x, t, s, cond=cond)
    return x
