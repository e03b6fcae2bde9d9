"""Data-parallel training on torch.distributed, launched by torchrun (gloo on CPU, NCCL on GPU).

Every rank draws the same *global* batch and the same noise from the same seeded generator, then
computes the loss on its own contiguous block of rows (`Shard`); DistributedDataParallel averages the
gradients, so W ranks take exactly the step one process takes on the whole batch. Rank 0 alone
evaluates, writes the run folder and talks to MLflow; the others wait at stage boundaries.
Without torchrun (WORLD_SIZE unset or 1) everything here is a no-op.
"""
from __future__ import annotations

import os
from dataclasses import dataclass

import torch
import torch.distributed as dist
from torch import nn
from torch.nn.parallel import DistributedDataParallel


@dataclass(frozen=True)
class Shard:
    """Rows [start, stop) of a global batch belong to this rank."""

    rank: int = 0
    world: int = 1

    def rows(self, n: int) -> slice:
        if n % self.world:
            raise ValueError(f"batch size {n} is not divisible by the {self.world} ranks; choose a multiple")
        per = n // self.world
        return slice(self.rank * per, (self.rank + 1) * per)

    def local(self, *tensors):
        """This rank's rows of each tensor (None passes through)."""
        if self.world == 1:
            return tensors
        n = next(t.shape[0] for t in tensors if t is not None)
        rows = self.rows(n)
        return tuple(None if t is None else t[rows] for t in tensors)


def adopt_cluster_env() -> None:
    """Inside a multi-task SLURM job started by the submitit launcher (no torchrun variables), export the
    RANK/WORLD_SIZE/MASTER_ADDR/... that torch.distributed's env:// setup reads, via submitit's own helper."""
    if "RANK" in os.environ or "SUBMITIT_EXECUTOR" not in os.environ or int(os.environ.get("SLURM_NTASKS", "1")) <= 1:
        return
    from submitit.helpers import TorchDistributedEnvironment

    TorchDistributedEnvironment().export(set_cuda_visible_devices=False)


def world_size() -> int:
    return int(os.environ.get("WORLD_SIZE", "1"))


def active() -> bool:
    return dist.is_available() and dist.is_initialized() and dist.get_world_size() > 1


def rank() -> int:
    return dist.get_rank() if active() else 0


def is_main() -> bool:
    return rank() == 0


def current_shard() -> Shard:
    return Shard(rank(), dist.get_world_size()) if active() else Shard()


def setup(device: torch.device) -> None:
    """Join the process group torchrun describes in the environment (idempotent)."""
    if world_size() <= 1 or dist.is_initialized():
        return
    backend = "nccl" if device.type == "cuda" else "gloo"
    if device.type == "cuda":
        torch.cuda.set_device(int(os.environ.get("LOCAL_RANK", "0")))
    dist.init_process_group(backend=backend)


def barrier() -> None:
    if active():
        dist.barrier()


def share_flag(value: bool | None) -> bool:
    """Rank 0's `value`, on every rank (others pass None): e.g. whether to run the next stage."""
    if not active():
        return bool(value)
    box = [value]
    dist.broadcast_object_list(box, src=0)
    return bool(box[0])


def teardown() -> None:
    if dist.is_available() and dist.is_initialized():
        dist.destroy_process_group()


class Replicated(DistributedDataParallel):
    """DDP that still answers the wrapped model's attributes (schedule, parameterization, sigma_data...)
    and its `predict`, with the forward pass going through DDP so gradients are synchronised."""

    def __getattr__(self, name):
        try:
            return super().__getattr__(name)
        except AttributeError:
            return getattr(self.module, name)

    def predict(self, x_t, t, cond=None):
        return self.module.predictions(x_t, t, self(x_t, t, cond))


def replicate(model: nn.Module) -> nn.Module:
    """Wrap for data-parallel training when running under torchrun; otherwise return model unchanged."""
    if not active():
        return model
    device = next(model.parameters()).device
    return Replicated(model, device_ids=[device.index] if device.type == "cuda" else None)
