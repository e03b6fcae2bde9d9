"""Consistency distillation (Song et al. 2023, Alg. 2) and multistep consistency sampling (Alg. 1).

Everything here works in the variance-exploding frame of Karras et al. 2022: x_ve = x0 + sigma z with
sigma = sigma_ve. The VP-frame networks are reached through `denoise_ve` (x_t = alpha x_ve with
alpha = 1 / sqrt(1 + sigma^2), t = schedule.t_from_sigma_ve(sigma)), the one frame conversion of this file.

The consistency function is f(x, sigma) = c_skip(sigma) x + c_out(sigma) F(x, sigma), where the network
term F is read off the student denoiser D through the EDM preconditioning, F = (D - c_skip_edm x) / c_out_edm.
So at sigma >> sigma_min the student starts as f ~= D (the teacher's own denoiser), and f(x, sigma_min) = x
holds exactly because c_skip(sigma_min) = 1 and c_out(sigma_min) = 0 in floating point.
"""
from __future__ import annotations

import copy
import math
from dataclasses import dataclass, field
from typing import Optional

import torch
from torch import nn

from ..denoiser import Denoiser, NetDenoiser, shared_time
from ..distributed import current_shard
from ..nets import fast_layout
from ..schedule import broadcast, karras_sigmas
from . import Method, MethodConfig, StageSpec, device_of, register

SOLVERS = ("heun", "euler")
DISTANCES = ("pseudo_huber", "l2")
WEIGHTINGS = ("uniform", "inverse_gap")
# Pseudo-Huber c = 0.00054 sqrt(d) (Song & Dhariwal 2023, Sec. 3.3; tuned there for CIFAR-10, d = 3072).
HUBER_C_PER_SQRT_DIM = 0.00054
# Highest re-noising level of multistep sampling, in units of sigma_data (see `sample_sigmas`; tuned on the
# archipelago mixture in benchmarks/consistency_tuning.py).
RENOISE_CEILING = 0.25


@dataclass
class ConsistencyConfig(MethodConfig):
    name: str = "consistency"
    steps: list[int] = field(default_factory=lambda: [4, 2, 1])  # one stage per entry, descending
    iterations: int = 2000  # per stage
    lr: float = 1e-3  # tuned: training is budget-limited (benchmarks/README.md)
    ema_decay: float = 0.95  # target network EMA rate; 0 allowed (Song & Dhariwal 2023)
    sigma_min: float = 0.002  # paper value (Song et al. 2023)
    sigma_max: float = 80.0  # paper value
    rho: float = 7.0  # paper value (Karras et al. 2022)
    grid_points: int = 18  # N; paper value for CIFAR-10 distillation
    ode_solver: str = "heun"  # heun | euler
    distance: str = "pseudo_huber"  # pseudo_huber | l2
    huber_c: Optional[float] = None  # None: 0.00054 * sqrt(d) (Song & Dhariwal 2023)
    weighting: str = "inverse_gap"  # inverse_gap: 1 / (sigma_{n+1} - sigma_n) (Song & Dhariwal 2023) | uniform
    sigma_data: Optional[float] = None  # None: the data's standard deviation


# ------------------------------------------------------------------------------------------ coefficients
def c_skip(sigma, sigma_data: float, sigma_min: float = 0.0):
    """c_skip = sigma_data^2 / ((sigma - sigma_min)^2 + sigma_data^2) (Song et al. 2023, Appendix C).
    With sigma_min = 0 it is the EDM c_skip = sigma_data^2 / (sigma^2 + sigma_data^2) (Karras et al. 2022, Table 1)."""
    return sigma_data**2 / ((sigma - sigma_min) ** 2 + sigma_data**2)


def c_out(sigma, sigma_data: float, sigma_min: float = 0.0):
    """c_out = (sigma - sigma_min) sigma_data / sqrt(sigma^2 + sigma_data^2) (Song et al. 2023, Appendix C).
    With sigma_min = 0 it is the EDM c_out = sigma sigma_data / sqrt(sigma^2 + sigma_data^2) (Karras et al. 2022)."""
    return (sigma - sigma_min) * sigma_data / (sigma**2 + sigma_data**2) ** 0.5


def training_sigmas(grid_points: int, sigma_min: float, sigma_max: float, rho: float) -> torch.Tensor:
    """The N-point Karras grid (Karras et al. 2022, Eq. 5) in ascending order, sigma_1 = sigma_min < ... <
    sigma_N = sigma_max (the indexing of Song et al. 2023). Endpoints are set exactly, so f(x, sigma_1) = x
    holds bit for bit (the rho-th power of the interpolated endpoint can be off by an ulp)."""
    sigmas = karras_sigmas(grid_points, sigma_min, sigma_max, rho).flip(0).clone()
    sigmas[0], sigmas[-1] = sigma_min, sigma_max
    return sigmas


def sample_sigmas(steps: int, cfg, sigma_data: float | None = None) -> list[float]:
    """Noise levels for `steps`-step sampling (Song et al. 2023, Alg. 1), all on the training grid (levels off
    the grid made 2 steps worse than 1). Rule: sigma_max, then the steps - 1 grid points that descend from the
    highest one at or below RENOISE_CEILING sigma_data (sigma_min excluded: re-noising to it adds no noise and
    returns the input); when fewer lie below the ceiling, the next ones above it. Why low levels: the learned f
    is least accurate at sigma ~ 1-3 sigma_data, where the island is decided, and most accurate below;
    re-noising there keeps the island and redraws the shape (measurements: benchmarks/README.md, consistency
    tuning). sigma_data defaults to cfg.sigma_data."""
    n = cfg.grid_points
    if not 1 <= steps <= n - 1:
        raise ValueError(f"steps={steps}: consistency sampling on a {n}-point grid allows 1..{n - 1} steps")
    sigma_data = cfg.sigma_data if sigma_data is None else sigma_data
    if sigma_data is None:
        raise ValueError("sample_sigmas needs sigma_data (cfg.sigma_data is None: pass the data's std)")
    grid = training_sigmas(n, cfg.sigma_min, cfg.sigma_max, cfg.rho).tolist()  # ascending
    inner = grid[1:-1]
    below = sum(s <= RENOISE_CEILING * sigma_data for s in inner)
    low = max(below - (steps - 1), 0)  # a window of steps - 1 neighbours, topped at the ceiling if possible
    return [grid[-1]] + inner[low:low + steps - 1][::-1]


def interval_weights(sigmas: torch.Tensor, weighting: str) -> torch.Tensor:
    """lambda(sigma_n) for each grid interval n = 1..N-1: 1 (uniform; Song et al. 2023) or
    1 / (sigma_{n+1} - sigma_n) (Song & Dhariwal 2023, Sec. 3.4), rescaled here to mean 1 over the grid:
    a constant factor that Adam ignores but that keeps gradient clipping and the loss scale comparable."""
    if weighting not in WEIGHTINGS:
        raise ValueError(f"weighting '{weighting}' is unknown; valid: {', '.join(WEIGHTINGS)}")
    if weighting == "uniform":
        return torch.ones(sigmas.shape[0] - 1, dtype=torch.float64)
    w = 1.0 / (sigmas[1:] - sigmas[:-1])
    return w / w.mean()


# ------------------------------------------------------------------------------------------- distances
def pseudo_huber(x: torch.Tensor, y: torch.Tensor, c: float) -> torch.Tensor:
    """d(x, y) = sqrt(|x - y|^2 + c^2) - c per sample, |.| the Euclidean norm over all non-batch
    dimensions (Song & Dhariwal 2023, Sec. 3.3). Returns shape (B,)."""
    sq = (x - y).reshape(x.shape[0], -1).pow(2).sum(1)
    return torch.sqrt(sq + c * c) - c


def squared_l2(x: torch.Tensor, y: torch.Tensor) -> torch.Tensor:
    """d(x, y) = |x - y|^2 per sample (Song et al. 2023, Sec. 3). Returns shape (B,)."""
    return (x - y).reshape(x.shape[0], -1).pow(2).sum(1)


def huber_c_for(cfg, dim: int) -> float:
    """cfg.huber_c, or the default c = 0.00054 sqrt(d) (Song & Dhariwal 2023)."""
    return float(cfg.huber_c) if cfg.huber_c is not None else HUBER_C_PER_SQRT_DIM * math.sqrt(dim)


# ------------------------------------------------------------------------------------- the VE frame
def per_sample_sigma(sigma, x: torch.Tensor) -> torch.Tensor:
    """A float or (B,) noise level as a float64 (B,) tensor on x's device."""
    sigma = torch.as_tensor(sigma, dtype=torch.float64, device=x.device)
    return sigma.expand(x.shape[0]) if sigma.dim() == 0 else sigma.to(torch.float64)


def denoise_ve(denoiser: Denoiser, x_ve: torch.Tensor, sigma, cond=None) -> torch.Tensor:
    """D(x_ve, sigma) = E[x0 | x_ve] through the VP-frame denoiser: x_t = alpha x_ve, alpha = 1/sqrt(1 + sigma^2),
    t = t(sigma_ve) (Karras et al. 2022, Sec. 2). x0 is the same in both frames."""
    sigma = per_sample_sigma(sigma, x_ve)
    if shared_time(sigma):  # one level for all rows: keep t expanded so the net embeds it once
        t = denoiser.schedule.t_from_sigma_ve(sigma[:1]).to(x_ve.dtype).expand(sigma.shape[0])
    else:
        t = denoiser.schedule.t_from_sigma_ve(sigma).to(x_ve.dtype)
    alpha = broadcast((1.0 + sigma**2).rsqrt(), x_ve)
    x0_hat, _ = denoiser.predict(alpha * x_ve, t, cond)
    return x0_hat.to(x_ve.dtype)


def ode_slope(teacher: Denoiser, x_ve: torch.Tensor, sigma, cond=None) -> torch.Tensor:
    """dx/dsigma = (x - D(x, sigma)) / sigma, the probability-flow ODE in the VE frame (Karras et al. 2022, Eq. 3
    with sigma(t) = t, s(t) = 1)."""
    sigma = per_sample_sigma(sigma, x_ve)
    return (x_ve - denoise_ve(teacher, x_ve, sigma, cond)) / broadcast(sigma, x_ve)


def teacher_ode_step(teacher: Denoiser, x_ve: torch.Tensor, sigma_from, sigma_to, solver: str = "heun",
                     cond=None) -> torch.Tensor:
    """One Euler or Heun step of the probability-flow ODE from sigma_from to sigma_to > 0 (Karras et al. 2022,
    Alg. 1): d = slope(x, s_from); x' = x + h d; Heun: x + h (d + slope(x', s_to)) / 2, h = s_to - s_from.
    sigma_from and sigma_to may be floats or per-sample (B,) tensors."""
    if solver not in SOLVERS:
        raise ValueError(f"ode solver '{solver}' is unknown; valid: {', '.join(SOLVERS)}")
    s_from, s_to = per_sample_sigma(sigma_from, x_ve), per_sample_sigma(sigma_to, x_ve)
    h = broadcast(s_to - s_from, x_ve)
    d = ode_slope(teacher, x_ve, s_from, cond)
    x_euler = x_ve + h * d
    if solver == "euler":
        return x_euler
    return x_ve + h * 0.5 * (d + ode_slope(teacher, x_euler, s_to, cond))


# --------------------------------------------------------------------------------- consistency model
class ConsistencyModel(nn.Module):
    """f(x_ve, sigma) = c_skip(sigma) x_ve + c_out(sigma) F, F = (D(x_ve, sigma) - c_skip_edm x_ve) / c_out_edm,
    with D the wrapped student denoiser (Song et al. 2023, Sec. 3 and Appendix C; EDM terms from Karras et al.
    2022, Table 1). `denoiser` (a NetDenoiser) holds the network a checkpoint saves."""

    def __init__(self, denoiser: NetDenoiser, sigma_data: float, sigma_min: float):
        super().__init__()
        if not (sigma_data > 0 and sigma_min > 0):
            raise ValueError(f"sigma_data and sigma_min must be > 0, got {sigma_data} and {sigma_min}")
        self.denoiser, self.sigma_data, self.sigma_min = denoiser, float(sigma_data), float(sigma_min)

    @property
    def schedule(self):
        return self.denoiser.schedule

    def forward(self, x_ve: torch.Tensor, sigma, cond=None) -> torch.Tensor:
        sigma = per_sample_sigma(sigma, x_ve)  # float64, so sigma - sigma_min is exactly 0 at sigma_min
        coef = lambda c: broadcast(c, x_ve)  # noqa: E731  (B,) float64 -> broadcastable, x's dtype
        d = denoise_ve(self.denoiser, x_ve, sigma, cond)
        net_term = (d - coef(c_skip(sigma, self.sigma_data)) * x_ve) / coef(c_out(sigma, self.sigma_data))
        return coef(c_skip(sigma, self.sigma_data, self.sigma_min)) * x_ve + \
            coef(c_out(sigma, self.sigma_data, self.sigma_min)) * net_term


# ------------------------------------------------------------------------------------------ the loss
def consistency_loss(teacher: Denoiser, cfg, dim: int):
    """loss_fn(model, target, batch, generator) for `training.train_loop` (Song et al. 2023, Alg. 2):
    n ~ U{1..N-1}, x_{n+1} = x0 + sigma_{n+1} z, x_hat_n = one teacher ODE step sigma_{n+1} -> sigma_n,
    loss = mean lambda(sigma_n) d(f_model(x_{n+1}, sigma_{n+1}), f_target(x_hat_n, sigma_n)), no gradient
    through the teacher or the target (the EMA copy, or the model itself when ema_decay = 0)."""
    if cfg.distance not in DISTANCES:
        raise ValueError(f"distance '{cfg.distance}' is unknown; valid: {', '.join(DISTANCES)}")
    sigmas = training_sigmas(cfg.grid_points, cfg.sigma_min, cfg.sigma_max, cfg.rho)
    weights = interval_weights(sigmas, cfg.weighting)
    c = huber_c_for(cfg, dim)
    distance = (lambda a, b: pseudo_huber(a, b, c)) if cfg.distance == "pseudo_huber" else squared_l2

    def loss_fn(model: ConsistencyModel, target: ConsistencyModel, batch, generator):
        x0, cond = batch
        n = torch.randint(0, sigmas.shape[0] - 1, (x0.shape[0],), generator=generator)
        z = torch.randn(x0.shape, generator=generator).to(x0.device)
        x0, cond, n, z = current_shard().local(x0, cond, n, z)  # this rank's rows of the global batch
        sigma_n, sigma_next = sigmas[n].to(x0.device), sigmas[n + 1].to(x0.device)
        x_next = x0 + broadcast(sigma_next, x0) * z
        with torch.no_grad():
            x_hat = teacher_ode_step(teacher, x_next, sigma_next, sigma_n, cfg.ode_solver, cond)
            f_target = target(x_hat, sigma_n, cond)
        f_model = model(x_next, sigma_next, cond)
        return (weights[n].to(x0.device, x0.dtype) * distance(f_model, f_target)).mean()

    return loss_fn


# -------------------------------------------------------------------------------------------- sampling
@torch.no_grad()
def consistency_sample(model: ConsistencyModel, noise: torch.Tensor, sigmas, generator: torch.Generator | None = None,
                       cond=None) -> torch.Tensor:
    """Multistep consistency sampling (Song et al. 2023, Alg. 1): x = sigma_0 noise, x0 = f(x, sigma_0); for each
    later sigma: x = x0 + sqrt(sigma^2 - sigma_min^2) z, x0 = f(x, sigma). `sigmas` descending, first one the
    training sigma_max. Returns x0, a data-space sample (at sigma ~ 0 the VE and VP frames agree)."""
    sigmas = [float(s) for s in sigmas]
    x0 = model(sigmas[0] * noise, sigmas[0], cond)
    for sigma in sigmas[1:]:
        z = torch.randn(noise.shape, generator=generator, dtype=noise.dtype).to(noise.device)
        x0 = model(x0 + math.sqrt(max(sigma**2 - model.sigma_min**2, 0.0)) * z, sigma, cond)
    return x0


# ------------------------------------------------------------------------------------------- the method
class Consistency(Method):
    name = "consistency"
    config = ConsistencyConfig
    chains_teacher = False  # every stage learns from the original teacher

    def validate(self, cfg) -> None:
        from ..config import ConfigError, one_of

        m = cfg.method
        steps = list(m.steps)
        if not steps or any(s < 1 for s in steps) or steps != sorted(set(steps), reverse=True):
            raise ConfigError("method.steps", steps,
                              "must be distinct step counts >= 1 in descending order, e.g. [4, 2, 1]")
        if max(steps) >= m.grid_points:
            raise ConfigError("method.steps", steps, f"each must be below method.grid_points={m.grid_points}")
        if not 0 < m.sigma_min < m.sigma_max:
            raise ConfigError("method.sigma_min", m.sigma_min, f"must satisfy 0 < sigma_min < sigma_max={m.sigma_max}")
        if not (math.isfinite(m.rho) and m.rho > 0):
            raise ConfigError("method.rho", m.rho, "must be > 0")
        if m.grid_points < 2:
            raise ConfigError("method.grid_points", m.grid_points, "must be >= 2")
        one_of("method.ode_solver", m.ode_solver, SOLVERS)
        one_of("method.distance", m.distance, DISTANCES)
        one_of("method.weighting", m.weighting, WEIGHTINGS)
        if m.huber_c is not None and not (math.isfinite(m.huber_c) and m.huber_c > 0):
            raise ConfigError("method.huber_c", m.huber_c, "must be > 0 or null")
        if m.sigma_data is not None and m.sigma_data <= 0:
            raise ConfigError("method.sigma_data", m.sigma_data, "must be > 0 or null")

    def plan(self, cfg) -> list[StageSpec]:
        return [StageSpec(i + 1, n, cfg.teacher.steps, cfg.method.iterations) for i, n in enumerate(cfg.method.steps)]

    def make_student(self, cfg, previous, data):
        """Stage 1 wraps a copy of the teacher's denoiser; later stages continue the previous student."""
        if isinstance(previous, ConsistencyModel):
            student = copy.deepcopy(previous)
        else:
            sigma_data = cfg.method.sigma_data or data.sigma_data
            student = ConsistencyModel(copy.deepcopy(previous), sigma_data, cfg.method.sigma_min)
        student = fast_layout(student, in_place=True)
        student.requires_grad_(True)
        return student

    def loss(self, cfg, job):
        return consistency_loss(fast_layout(job.teacher), cfg.method, job.data.x[0].numel())

    def sampler(self, method_cfg, student, steps, seed):
        sigmas = sample_sigmas(steps, method_cfg, student.sigma_data)

        def draw(noise, cond):
            g = torch.Generator().manual_seed(seed + steps)  # the same intermediate noise every stage
            with torch.no_grad():
                return consistency_sample(student, noise.to(device_of(student)), sigmas, g, cond=cond)
        return draw

    def save_meta(self, method_cfg, student) -> dict:
        from omegaconf import OmegaConf

        saved = OmegaConf.to_container(method_cfg, resolve=True) if OmegaConf.is_config(method_cfg) else \
            dict(vars(method_cfg))
        return {"consistency": {**saved, "sigma_data": student.sigma_data}}

    def rebuild(self, denoiser, meta):
        c = meta["consistency"]
        return ConsistencyModel(denoiser, c["sigma_data"], c["sigma_min"])


register(Consistency())
