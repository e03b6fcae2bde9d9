"""The one optimisation loop shared by teacher training and every distillation method.

A method supplies only its math, `loss_fn(model, target, batch, generator) -> scalar`; this loop owns
Adam, LR warm-up/decay, gradient clipping, the EMA copy, NaN/explosion detection, mid-run state
for resume, and the progress bar, so those are written (and tested) once.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable

import torch
from torch import nn
from torch.optim.lr_scheduler import ConstantLR, CosineAnnealingLR, LinearLR, SequentialLR
from torch.optim.swa_utils import AveragedModel
from tqdm.auto import tqdm

from . import checkpoint, distributed

# A clipped step is still taken when the gradient norm is large; only a norm this far beyond any
# sane value ends the run as diverged (common practice: clip at ~1, treat 1e4x that as divergence).
EXPLODED_GRAD_NORM = 1e4


def autocast_for(model: nn.Module, precision: str):
    """bf16 autocast for the forward pass and loss on CUDA when precision='bf16'; else a no-op."""
    device = next(model.parameters()).device
    enabled = precision == "bf16" and device.type == "cuda"
    return torch.autocast(device_type=device.type, dtype=torch.bfloat16, enabled=enabled)


@dataclass
class LoopSpec:
    iterations: int
    lr: float
    warmup: int = 0
    decay: str = "linear"  # linear | cosine | none: LR after warm-up, ending at 0 (none: constant)
    grad_clip: float = 1.0
    ema_decay: float = 0.0  # 0: no EMA copy, the target network is the model itself
    save_every: int = 500  # iterations between mid-run states (resume points): a kill loses at most these
    precision: str = "fp32"  # fp32 | bf16 (autocast of forward pass and loss, CUDA only)


@dataclass
class LoopResult:
    model: nn.Module  # the network to keep: the EMA copy when ema_decay > 0
    losses: list[float] = field(default_factory=list)
    seconds: float = 0.0
    failed: str | None = None  # why the run stopped early (NaN, explosion), or None
    iterations_here: int = 0  # iterations run by this process (fewer than len(losses) after a resume)

    @property
    def its_per_s(self) -> float:
        return self.iterations_here / self.seconds if self.seconds > 0 else float("nan")


def make_scheduler(opt: torch.optim.Optimizer, spec: LoopSpec):
    """Linear warm-up from ~0, then linear or cosine decay to 0 over the remaining iterations."""
    rest = max(spec.iterations - spec.warmup, 1)
    decay = {"linear": lambda: LinearLR(opt, 1.0, 0.0, total_iters=rest),
             "cosine": lambda: CosineAnnealingLR(opt, T_max=rest),
             "none": lambda: ConstantLR(opt, 1.0, total_iters=0)}[spec.decay]()
    if spec.warmup <= 0:
        return decay
    warm = LinearLR(opt, 1e-3, 1.0, total_iters=spec.warmup)
    return SequentialLR(opt, [warm, decay], milestones=[spec.warmup])


def ema_multi_avg_fn(decay: float):
    """EMA update with warm-up: rate min(decay, (1 + n) / (10 + n)) after n updates, so a short run's EMA
    is not dominated by its first, untrained weights (common practice; e.g. TensorFlow's
    ExponentialMovingAverage num_updates option, from memory). One foreach lerp over all tensors:
    averaged += (1 - rate) (current - averaged). Integer buffers (none in our nets) are copied."""
    @torch.no_grad()
    def update(averaged: list[torch.Tensor], current: list[torch.Tensor], num_averaged: torch.Tensor) -> None:
        n = float(num_averaged)
        rate = min(decay, (1 + n) / (10 + n))
        if torch.is_floating_point(averaged[0]):
            torch._foreach_lerp_(averaged, current, 1.0 - rate)
        else:
            torch._foreach_copy_(averaged, current)
    return update


def make_ema(model: nn.Module, decay: float) -> nn.Module:
    if decay <= 0:
        return model
    ema = AveragedModel(model, multi_avg_fn=ema_multi_avg_fn(decay), use_buffers=True)
    ema.requires_grad_(False)
    return ema


def make_optimizer(model: nn.Module, lr: float) -> torch.optim.Optimizer:
    """Adam on the trainable parameters with the fused kernel (CPU and CUDA): faster than the default per-tensor
    loop on our networks (benchmarks/optimizer_step.py; numbers in benchmarks/README.md)."""
    return torch.optim.Adam([p for p in model.parameters() if p.requires_grad], lr=lr, fused=True)


def clip_gradients(model: nn.Module, max_norm: float) -> torch.Tensor:
    """Total gradient 2-norm (returned, for the divergence check); gradients are rescaled to max_norm only
    when the norm exceeds it (clip_grad_norm_ always multiplies, by 1 when below). max_norm <= 0: no clip."""
    grads = [p.grad for p in model.parameters() if p.grad is not None]
    norm = torch.nn.utils.get_total_norm(grads, foreach=True)
    if 0 < max_norm < norm:
        torch.nn.utils.clip_grads_with_norm_(model.parameters(), max_norm, norm, foreach=True)
    return norm


def kept_model(ema: nn.Module) -> nn.Module:
    return ema.module if isinstance(ema, AveragedModel) else ema


def _state_tensors(model, ema, opt, sched, generator, losses, it):
    opt_tensors, opt_meta = checkpoint.flatten_optimizer_state(opt.state_dict())
    tensors = {f"model.{k}": v for k, v in model.state_dict().items()}
    if ema is not model:
        tensors.update({f"ema.{k}": v for k, v in ema.state_dict().items()})
    tensors.update({f"opt.{k}": v for k, v in opt_tensors.items()})
    tensors["rng"] = generator.get_state()
    tensors["losses"] = torch.tensor(losses, dtype=torch.float64)
    meta = {"iteration": it, "optimizer": opt_meta, "scheduler": sched.state_dict()}
    return tensors, meta


def _restore(path, model, ema, opt, sched, generator):
    """Put model, EMA, optimizer, LR scheduler and data/noise generator back as they were after iteration
    meta["iteration"]; returns (that iteration, the losses so far). Any mismatch is one CheckpointError."""
    tensors, meta = checkpoint.load_state(path)
    pick = lambda prefix: {k[len(prefix):]: v for k, v in tensors.items() if k.startswith(prefix)}  # noqa: E731
    try:
        model.load_state_dict(pick("model."))
        if ema is not model:
            ema.load_state_dict(pick("ema."))
        opt.load_state_dict(checkpoint.unflatten_optimizer_state(pick("opt."), meta["optimizer"]))
        sched.load_state_dict(meta["scheduler"])
        generator.set_state(tensors["rng"])
        it, losses = int(meta["iteration"]), tensors["losses"].tolist()
    except (KeyError, TypeError, ValueError, RuntimeError, checkpoint.CheckpointError) as exc:
        first = (str(exc).strip().splitlines() or [type(exc).__name__])[0][:160]
        raise checkpoint.CheckpointError(f"{path}: does not fit this training run ({first}); "
                                         "delete it to restart the stage from its beginning") from None
    if len(losses) != it:
        raise checkpoint.CheckpointError(f"{path}: holds {len(losses)} losses for iteration {it}; "
                                         "delete it to restart the stage from its beginning")
    return it, losses


def _check(loss: torch.Tensor, grad_norm: torch.Tensor, it: int) -> str | None:
    if not torch.isfinite(loss):
        return f"loss became {float(loss)} at iteration {it}"
    if not torch.isfinite(grad_norm) or grad_norm > EXPLODED_GRAD_NORM:
        return f"gradient norm {float(grad_norm):.3g} at iteration {it} (diverged)"
    return None


def train_loop(model: nn.Module, loss_fn: Callable, draw_batch: Callable, spec: LoopSpec, *,
               generator: torch.Generator, state_path: Path | None = None, desc: str = "train",
               quiet: bool = False) -> LoopResult:
    """Run spec.iterations of Adam on loss_fn(model, target, draw_batch(generator), generator).
    With state_path, a mid-run state is saved every spec.save_every iterations and resumed if present:
    weights, EMA copy (with its update count), Adam moments and step counts, LR scheduler, the generator
    that draws batches and noise, the losses so far and the iteration. Resuming from it continues bit for
    bit (same thread count), because every random draw of the loop comes from `generator`."""
    kill_label = Path(state_path).parent.name if state_path is not None and checkpoint.KILL_AT else None
    opt = make_optimizer(model, spec.lr)
    sched = make_scheduler(opt, spec)
    ema = make_ema(model, spec.ema_decay)
    trained = distributed.replicate(model)  # DDP under torchrun (gradients averaged over ranks), else model
    start, losses = 0, []
    if state_path is not None and Path(state_path).exists():
        start, losses = _restore(state_path, model, ema, opt, sched, generator)
    result = LoopResult(model=kept_model(ema), losses=losses)
    t0 = time.perf_counter()
    bar = tqdm(range(start, spec.iterations), desc=desc, initial=start, total=spec.iterations,
               disable=True if quiet else None, leave=False, dynamic_ncols=True)  # None: off when not a TTY
    for it in bar:
        with autocast_for(model, spec.precision):
            loss = loss_fn(trained, kept_model(ema), draw_batch(generator), generator)
        opt.zero_grad(set_to_none=True)
        loss.backward()
        grad_norm = clip_gradients(model, spec.grad_clip)
        result.failed = _check(loss.detach(), grad_norm, it)
        if result.failed:
            break
        opt.step()
        sched.step()
        if ema is not model:
            ema.update_parameters(model)
        losses.append(loss.item())
        if it % 50 == 0:
            bar.set_postfix(loss=f"{losses[-1]:.4g}")
        if state_path is not None and (it + 1) % spec.save_every == 0 and it + 1 < spec.iterations and distributed.is_main():
            checkpoint.save_state(state_path, *_state_tensors(model, ema, opt, sched, generator, losses, it + 1))
        if kill_label:
            checkpoint.kill_point(f"{kill_label}:iteration={it + 1}")
    bar.close()
    result.seconds = time.perf_counter() - t0
    result.losses = losses
    result.iterations_here = len(losses) - start
    return result
