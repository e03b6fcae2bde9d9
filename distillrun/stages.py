"""What each method contributes to the pipeline: its stage plan, how a stage's student is built and trained,
and how a student samples. The math lives in methods/; this file only wires it to the shared loop.

Registry (STYLE.md 8): METHODS maps a method name to its three functions; unknown names fail loudly.
"""
from __future__ import annotations

import copy
from dataclasses import dataclass
from typing import Callable

import torch

from .denoiser import NetDenoiser
from .methods import consistency, guided, progressive
from .samplers import sample, uniform_grid
from .training import LoopSpec, train_loop


@dataclass
class StageSpec:
    index: int  # 1-based
    steps: int  # the student's sampler steps (NFE) after this stage
    teacher_steps: int  # steps of the stage's own teacher
    iterations: int


def _progressive_plan(cfg) -> list[StageSpec]:
    steps = progressive.stage_plan(cfg.teacher.steps, cfg.method.target_steps)
    return [StageSpec(i + 1, n, 2 * n, cfg.method.iterations) for i, n in enumerate(steps)]


def _consistency_plan(cfg) -> list[StageSpec]:
    return [StageSpec(i + 1, n, cfg.teacher.steps, cfg.method.iterations) for i, n in enumerate(cfg.method.steps)]


def fast_layout(module, in_place: bool = False):
    """For a convolutional network (any 4-D weight): its weights in channels-last memory format, on a copy unless
    in_place; any other module is returned as it is. On CPU the U-Net's stage step runs ~1.06x (student) to ~1.15x
    (student and teacher) and its sampling ~1.18x faster (benchmarks/channels_last.py). Same weights; the
    convolution kernels round differently (outputs within ~1e-5 of the contiguous layout's)."""
    if not isinstance(module, torch.nn.Module) or not any(p.dim() == 4 for p in module.parameters()):
        return module
    return (module if in_place else copy.deepcopy(module)).to(memory_format=torch.channels_last)


def _progressive_student(cfg, previous: torch.nn.Module, data) -> torch.nn.Module:
    """A fresh trainable copy of the previous stage's denoiser (the teacher's network at stage 1)."""
    student = fast_layout(copy.deepcopy(previous), in_place=True)
    student.requires_grad_(True)
    return student


def _consistency_student(cfg, previous: torch.nn.Module, data) -> torch.nn.Module:
    """Stage 1 wraps a copy of the teacher's denoiser; later stages continue the previous student."""
    if isinstance(previous, consistency.ConsistencyModel):
        student = copy.deepcopy(previous)
    else:
        sigma_data = cfg.method.sigma_data or data.sigma_data
        student = consistency.ConsistencyModel(copy.deepcopy(previous), sigma_data, cfg.method.sigma_min)
    student = fast_layout(student, in_place=True)
    student.requires_grad_(True)
    return student


def _progressive_train(cfg, spec: StageSpec, teacher, student, data, generator, state_path, quiet, device):
    m = cfg.method
    loss_fn = progressive.progressive_loss(fast_layout(teacher), spec.steps, m.loss)
    loop = LoopSpec(iterations=spec.iterations, lr=m.lr, decay="linear", grad_clip=m.grad_clip, ema_decay=m.ema_decay)
    return train_loop(student, loss_fn, data.batches(m.batch_size, device), loop, generator=generator,
                      state_path=state_path, desc=f"stage {spec.index} ({spec.steps} steps)", quiet=quiet)


def _consistency_train(cfg, spec: StageSpec, teacher, student, data, generator, state_path, quiet, device):
    m = cfg.method
    loss_fn = consistency.consistency_loss(fast_layout(teacher), m, student.sigma_data, data.x[0].numel())
    loop = LoopSpec(iterations=spec.iterations, lr=m.lr, decay="linear", grad_clip=m.grad_clip, ema_decay=m.ema_decay)
    return train_loop(student, loss_fn, data.batches(m.batch_size, device), loop, generator=generator,
                      state_path=state_path, desc=f"stage {spec.index} ({spec.steps} steps)", quiet=quiet)


def _progressive_sampler(cfg, student: NetDenoiser, steps: int) -> Callable:
    return lambda noise, cond: sample(student, noise.to(_device(student)), uniform_grid(steps), "ddim", cond=cond)


def _consistency_sampler(cfg, student, steps: int) -> Callable:
    sigmas = consistency.sample_sigmas(steps, cfg.method, student.sigma_data)

    def draw(noise, cond):
        g = torch.Generator().manual_seed(cfg.eval.seed + steps)  # the same intermediate noise every stage
        with torch.no_grad():
            return consistency.consistency_sample(student, noise.to(_device(student)), sigmas, g, cond=cond)
    return draw


def _guided_plan(cfg) -> list[StageSpec]:
    plan = guided.stage_plan(cfg.teacher.steps, cfg.method.target_steps)
    return [StageSpec(i + 1, n, tn, cfg.method.fit_iterations if i == 0 else cfg.method.iterations)
            for i, (n, tn) in enumerate(plan)]


def _guided_student(cfg, previous, data) -> torch.nn.Module:
    """Stage one: the teacher's network plus a w-embedding with no effect yet; later stages: a copy of the previous."""
    return fast_layout(guided.w_student(previous), in_place=True)


def _guided_train(cfg, spec: StageSpec, teacher, student, data, generator, state_path, quiet, device):
    return guided.train_stage(cfg, spec.index, spec.steps, fast_layout(teacher), student, data, generator, state_path,
                              quiet, device)


def _guided_sampler(cfg, student, steps: int) -> Callable:
    """At the judged w (method.judge_w, else the largest w of the grid); `draw` picks any w in the trained range."""
    w = cfg.method.judge_w if cfg.method.judge_w is not None else max(cfg.method.w_grid)
    return guided.student_sampler(student, steps, float(w), cfg.method.sampler, cfg.eval.seed)


def _device(module) -> torch.device:
    return next(module.parameters()).device


@dataclass(frozen=True)
class Method:
    plan: Callable
    make_student: Callable
    train: Callable
    sampler: Callable
    evaluate: Callable | None = None  # (cfg, bench, steps, student, teacher denoiser, classes) -> (metrics, _)
    judge: Callable | None = None  # (cfg, metrics) -> stopping.Verdict; None: the generic stop rule on quality/*
    chains: bool = False  # each stage's student is the next stage's teacher


METHODS = {
    "progressive": Method(_progressive_plan, _progressive_student, _progressive_train, _progressive_sampler,
                          chains=True),
    "consistency": Method(_consistency_plan, _consistency_student, _consistency_train, _consistency_sampler),
    "guided": Method(_guided_plan, _guided_student, _guided_train, _guided_sampler,
                     evaluate=guided.evaluate_stage, judge=guided.verdict_of, chains=True),
}


def method_for(name: str) -> Method:
    if name not in METHODS:
        raise ValueError(f"method.name={name!r} is unknown; valid: {', '.join(METHODS)}")
    return METHODS[name]


def teacher_sampler(teacher, steps: int, sampler: str = "ddim") -> Callable:
    """The teacher on a uniform grid of `steps` (its full steps, or a baseline at a student's steps)."""
    teacher = fast_layout(teacher)
    return lambda noise, cond: sample(teacher, noise, uniform_grid(steps), sampler, cond=cond,
                                      generator=torch.Generator().manual_seed(steps))
