"""Classifier-free guidance (Ho & Salimans 2022) and the pieces of guided distillation (Meng et al. 2023).

Convention used everywhere in distillrun: the guided prediction is

    x_w = (1 + w) x(z, c) - w x(z, null),

so w = 0 is the plain class-conditional model and w > 0 pushes away from the unconditional one. The other
common convention writes the same thing with a scale s = 1 + w (x_s = s x(z, c) + (1 - s) x(z, null), s = 1
the conditional model); to translate, s = 1 + w. The same combination holds for x0- and eps-predictions (and
v): x0 = (x_t - sigma eps) / alpha is affine in eps with weights summing to one.

The null label is the index `num_classes` (the networks' reserved "no class" embedding). A guided teacher
costs two network evaluations per step (conditional and unconditional); a guidance-conditioned student
(denoiser.GuidanceCond) costs one.

Guided sampling does not sample the tilted density p(x | c)^(1 + w) p(x)^(-w) of clean data: the guided
denoiser at every noise level is not the denoiser of any one tilted density's noisy marginals. The reference
for a guided student is therefore the guided teacher at full steps with the same sampler.
"""
from __future__ import annotations

import torch

from .denoiser import Denoiser, GuidanceCond, as_batch_times, split_cond
from .schedule import broadcast


def guided(cond_out: torch.Tensor, uncond_out: torch.Tensor, w) -> torch.Tensor:
    """(1 + w) cond_out - w uncond_out, w a number or a per-row tensor (B,)."""
    w = broadcast(torch.as_tensor(w, dtype=cond_out.dtype, device=cond_out.device), cond_out)
    return (1 + w) * cond_out - w * uncond_out


class Guided:
    """A Denoiser that applies classifier-free guidance to a class-conditional Denoiser `base`.

    predict(x_t, t, cond) takes cond = labels (B,) with the guidance weight fixed at construction, or
    cond = GuidanceCond(labels, w) with a weight per row (a stage-one distillation target draws w per
    example). Each call is ONE batched pass of 2B rows through `base` (the conditional rows, then the same
    rows with the null label): 2 network evaluations per sample, counted in `evaluations`.
    """

    def __init__(self, base: Denoiser, num_classes: int, w: float | None = None):
        if num_classes < 1:
            raise ValueError("classifier-free guidance needs a class-conditional denoiser (num_classes >= 1)")
        self.base, self.num_classes, self.w = base, int(num_classes), w
        self.schedule = base.schedule
        self.evaluations = 0  # network evaluations per sample so far (2 per predict call)

    def predict(self, x_t, t, cond=None):
        labels, w = split_cond(cond)
        w = self.w if w is None else w
        if labels is None or w is None:
            raise ValueError("guided prediction needs labels and a guidance weight w")
        n = x_t.shape[0]
        labels = torch.as_tensor(labels, device=x_t.device).long().reshape(-1).expand(n)
        null = torch.full_like(labels, self.num_classes)
        t = as_batch_times(t, x_t)
        x0, eps = self.base.predict(torch.cat([x_t, x_t]), torch.cat([t, t]), torch.cat([labels, null]))
        self.evaluations += 2
        return guided(x0[:n], x0[n:], w), guided(eps[:n], eps[n:], w)


class WithWeight:
    """A guidance-conditioned student (one network pass per step) seen as a Denoiser at a fixed w:
    predict(x_t, t, labels) = student.predict(x_t, t, GuidanceCond(labels, w))."""

    def __init__(self, student: Denoiser, w: float):
        self.student, self.w = student, float(w)
        self.schedule = student.schedule

    def predict(self, x_t, t, cond=None):
        labels, w = split_cond(cond)
        if labels is None:
            raise ValueError("a guidance-conditioned student needs labels")
        n = x_t.shape[0]
        if w is None:
            w = torch.full((n,), self.w, dtype=x_t.dtype, device=x_t.device)
        return self.student.predict(x_t, t, GuidanceCond(torch.as_tensor(labels).reshape(-1).expand(n), w))


def renoise(x_s, alpha_s, sigma_s, alpha_t, sigma_t, z):
    """A draw of x_t ~ q(x_t | x_s) for t > s: x_t = (alpha_t / alpha_s) x_s + sqrt(sigma_t^2 - (alpha_t / alpha_s)^2
    sigma_s^2) z, the forward transition of the variance-preserving process (Kingma et al. 2021, Eq. 33)."""
    a = alpha_t / alpha_s
    var = sigma_t**2 - a**2 * sigma_s**2  # = sigma_t^2 (1 - exp(lambda_t - lambda_s)) >= 0 for t > s
    return a * x_s + (var.clamp(min=0.0).sqrt() if torch.is_tensor(var) else max(var, 0.0) ** 0.5) * z


@torch.no_grad()
def stochastic_sample(denoiser: Denoiser, noise: torch.Tensor, steps: int, cond=None,
                      generator: torch.Generator | None = None, t_max: float = 1.0) -> torch.Tensor:
    """The stochastic few-step sampler of Meng et al. 2023 (Sec. 4, "stochastic sampling"; transcribed from the
    paper's description as remembered, not checked against its text here): on the uniform grid t_i = t_max (1 - i / steps), from t_i take one deterministic DDIM
    step of twice the grid's length, to t_{i+2}, then re-noise back by one step length to t_{i+1} with the
    forward process; the last step, from t_{steps-1}, is a plain deterministic step to 0. One denoiser call
    per step (`steps` in all); with a guided teacher each call costs 2 evaluations. A 1-step run is plain DDIM.
    The double-length step is what a model distilled for steps/2 steps was trained to take."""
    if steps < 1:
        raise ValueError(f"steps must be >= 1, got {steps}")
    sch = denoiser.schedule
    grid = torch.linspace(t_max, 0.0, steps + 1, dtype=torch.float64)

    def coefs(t):
        a, s = sch.alpha_sigma(torch.as_tensor(float(t), dtype=torch.float64))
        return float(a), float(s)

    x = coefs(grid[0])[1] * noise
    for i in range(steps):
        t = float(grid[i])
        x0_hat, eps_hat = denoiser.predict(x, torch.tensor(t, dtype=x.dtype, device=x.device), cond)
        if i == steps - 1:
            a0, s0 = coefs(grid[i + 1])
            return a0 * x0_hat + s0 * eps_hat
        a2, s2 = coefs(grid[i + 2])
        x2 = a2 * x0_hat + s2 * eps_hat  # deterministic DDIM step t_i -> t_{i+2}
        a1, s1 = coefs(grid[i + 1])
        z = torch.randn(x.shape, generator=generator, dtype=x.dtype, device="cpu").to(x.device)
        x = renoise(x2, a2, s2, a1, s1, z)  # alpha_{t_{i+2}} > 0: t_{i+2} < t_max <= 1
    return x
