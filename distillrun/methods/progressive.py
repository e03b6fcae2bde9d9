"""Progressive distillation (Salimans & Ho 2022, Alg. 2): a student learns to take in one DDIM step what
its teacher takes in two, on a uniform grid of N student steps; the finished student is the next
stage's teacher, so each stage halves the step count."""
from __future__ import annotations

import copy
from dataclasses import dataclass

import torch

from ..denoiser import Denoiser, NetDenoiser
from ..distributed import current_shard
from ..nets import fast_layout
from ..samplers import sample, uniform_grid
from ..schedule import broadcast
from . import Method, MethodConfig, StageSpec, device_of, register

LOSSES = ("snr_trunc", "v")


@dataclass
class ProgressiveConfig(MethodConfig):
    name: str = "progressive"
    target_steps: int = 1  # stop halving here; teacher.steps / target_steps must be a power of two
    iterations: int = 600  # per stage (CPU times of the recipes: benchmarks/README.md)
    lr: float = 3e-4  # decays linearly to 0 within each stage (Salimans & Ho 2022)
    loss: str = "snr_trunc"  # snr_trunc: x-space loss weighted max(SNR, 1) | v: weight SNR + 1


def ddim_to(x0_hat, eps_hat, alpha_s, sigma_s):
    """Deterministic DDIM step to time s from predictions at t: x_s = alpha_s x0_hat + sigma_s eps_hat."""
    return alpha_s * x0_hat + sigma_s * eps_hat


def x0_target(x_t, x_t2, alpha_t, sigma_t, alpha_t2, sigma_t2):
    """x~ = (x_t'' - (sigma_t''/sigma_t) x_t) / (alpha_t'' - (sigma_t''/sigma_t) alpha_t): the x0 for which one
    DDIM step t -> t'' lands exactly on the teacher's x_t'' (Salimans & Ho 2022, Alg. 2)."""
    ratio = sigma_t2 / sigma_t
    return (x_t2 - ratio * x_t) / (alpha_t2 - ratio * alpha_t)


def loss_weight(logsnr_t: torch.Tensor, kind: str) -> torch.Tensor:
    """Weight of the x-space error: max(SNR, 1) ('snr_trunc') or SNR + 1 ('v', equal to an MSE on v)
    (Salimans & Ho 2022, Sec. 4)."""
    snr = torch.exp(logsnr_t)
    return snr.clamp(min=1.0) if kind == "snr_trunc" else snr + 1.0


def draw_student_times(batch: int, steps: int, generator: torch.Generator) -> torch.Tensor:
    """t = i / steps with i uniform in {1..steps}: the start times of the student's grid steps."""
    return torch.randint(1, steps + 1, (batch,), generator=generator, dtype=torch.float64) / steps


@torch.no_grad()
def two_teacher_steps(teacher: Denoiser, x_t, t, steps: int, cond=None):
    """Target x~ for the student step t -> t - 1/steps from two teacher DDIM steps via t - 1/(2 steps)."""
    sch = teacher.schedule
    t1, t2 = t - 0.5 / steps, t - 1.0 / steps
    (a_t, s_t), (a_1, s_1), (a_2, s_2) = (tuple(broadcast(c, x_t) for c in sch.alpha_sigma(v)) for v in (t, t1, t2))
    x_t1 = ddim_to(*teacher.predict(x_t, t.to(x_t.dtype), cond), a_1, s_1)
    x_t2 = ddim_to(*teacher.predict(x_t1, t1.to(x_t.dtype), cond), a_2, s_2)
    # At t'' = 0 (sigma = 0) the formula reduces to x~ = x_t''.
    return x0_target(x_t, x_t2, a_t, s_t, a_2, s_2)


def progressive_loss(teacher: Denoiser, steps: int, kind: str = "snr_trunc"):
    """loss_fn for the shared training loop: weighted x-space error of the student's one-step x0."""
    def loss(model: NetDenoiser, target_model, batch, generator):
        x0, cond = batch
        t = draw_student_times(x0.shape[0], steps, generator).to(x0.device)
        alpha, sigma = (broadcast(c, x0) for c in model.schedule.alpha_sigma(t))
        eps = torch.randn(x0.shape, generator=generator).to(x0.device)
        x_t = alpha * x0 + sigma * eps
        x0, cond, t, x_t = current_shard().local(x0, cond, t, x_t)  # this rank's rows of the global batch
        x_tilde = two_teacher_steps(teacher, x_t, t, steps, cond)
        x0_hat, _ = model.predict(x_t, t.to(x0.dtype), cond)
        err = ((x0_hat - x_tilde) ** 2).flatten(1).mean(1)
        return (loss_weight(model.schedule.logsnr(t), kind).to(err.dtype) * err).mean()
    return loss


def stage_plan(start_steps: int, target_steps: int) -> list[int]:
    """Student step counts of each stage: start/2, start/4, ..., target."""
    plan, steps = [], start_steps
    while steps > target_steps:
        steps //= 2
        plan.append(steps)
    return plan


def _power_of_two(n: int) -> bool:
    return n >= 1 and (n & (n - 1)) == 0


class Progressive(Method):
    name = "progressive"
    config = ProgressiveConfig
    chains_teacher = True  # each finished student teaches the next stage

    def validate(self, cfg) -> None:
        from ..config import ConfigError, one_of

        m = cfg.method
        one_of("method.loss", m.loss, LOSSES)
        ratio = cfg.teacher.steps / m.target_steps if m.target_steps > 0 else 0
        if m.target_steps < 1 or ratio != int(ratio) or ratio < 2 or not _power_of_two(int(ratio)):
            raise ConfigError("method.target_steps", m.target_steps,
                              f"must be teacher.steps={cfg.teacher.steps} divided by a power of two >= 2")

    def plan(self, cfg) -> list[StageSpec]:
        steps = stage_plan(cfg.teacher.steps, cfg.method.target_steps)
        return [StageSpec(i + 1, n, 2 * n, cfg.method.iterations) for i, n in enumerate(steps)]

    def make_student(self, cfg, previous, data):
        """A fresh trainable copy of the previous stage's denoiser (the teacher's network at stage 1)."""
        student = fast_layout(copy.deepcopy(previous), in_place=True)
        student.requires_grad_(True)
        return student

    def loss(self, cfg, job):
        return progressive_loss(fast_layout(job.teacher), job.spec.steps, cfg.method.loss)

    def sampler(self, method_cfg, student, steps, seed):
        return lambda noise, cond: sample(student, noise.to(device_of(student)), uniform_grid(steps), "ddim",
                                          cond=cond)


register(Progressive())
