"""Time per training iteration of an adapter student against a full student, interleaved in one process.

One stage's work, as the pipeline does it (methods' own loss, the shared train_loop: Adam, clipping, EMA when the
method has one), on the default 2D network (MLP 256 x 4, 931k parameters, batch 512) and the digits U-Net
(base 32, batch 128): the full student (every weight trains) and the adapter student (adapter=lowrank at the given
rank, teacher frozen; the stage teacher is the previous adapter student, merged) run the same number of iterations,
alternating round by round (full, adapter, full, adapter, ...), so a change in machine load hits both. Reported:
median seconds per iteration of each and the ratio adapter / full (below 1: the adapter student is faster).
The teacher here is untrained (random weights): the cost of an iteration does not depend on what the weights are.

Usage (repository root):
    OMP_NUM_THREADS=1 python benchmarks/adapter_step.py [--rounds 5] [--iterations 30] [--threads 1]
"""
from __future__ import annotations

import argparse
import copy
import os
import statistics
import time

import torch
from omegaconf import OmegaConf

from distillrun import adapters
from distillrun.data import Dataset
from distillrun.denoiser import NetDenoiser
from distillrun.methods import StageJob, StageSpec, method_named
from distillrun.nets import build_net
from distillrun.schedule import Schedule


def setup(kind: str, rank: int, method: str):
    torch.manual_seed(0)
    if kind == "mlp":
        net, x, batch = build_net("mlp", (2,), 0, width=256, depth=4), torch.randn(4096, 2), 512
    else:
        net, x, batch = build_net("unet", (1, 8, 8), 0, base=32, mults=[1, 2]), torch.randn(1024, 1, 8, 8).clamp(-1, 1), 128
    teacher = NetDenoiser(net, "v", Schedule("cosine")).requires_grad_(False)
    m = method_named(method)
    cfg = OmegaConf.create({"method": {**OmegaConf.to_container(OmegaConf.structured(m.config)), "batch_size": batch,
                                       "steps": [2, 1], "sigma_data": None},
                            "adapter": {"enabled": True, "rank": rank, "scale": None, "layers": ["*"], "skip": [],
                                        "train_also": [], "seed": 0, "allow_other_base": False},
                            "checkpoint_every": 10 ** 9, "compute": {"precision": "fp32"}, "eval": {"seed": 0}})
    return teacher, Dataset("bench", x), cfg, m


def time_stage(student, teacher, data, cfg, m, iterations: int) -> float:
    spec = StageSpec(2, 2, 4, iterations)
    OmegaConf.update(cfg, "method.iterations", iterations)
    job = StageJob(spec, adapters.frozen_teacher(teacher), student, data, torch.Generator().manual_seed(1), None,
                   torch.device("cpu"), True)
    t0 = time.perf_counter()
    m.train(cfg, job)
    return (time.perf_counter() - t0) / iterations


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rounds", type=int, default=5)
    ap.add_argument("--iterations", type=int, default=30)
    ap.add_argument("--threads", type=int, default=1)
    ap.add_argument("--rank", type=int, default=8)
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    print(f"load average {os.getloadavg()[0]:.1f}; threads {args.threads}; {args.rounds} rounds x {args.iterations} "
          f"iterations; rank {args.rank}")
    print("| network | method | full s/it | adapter s/it | adapter / full |")
    print("|---|---|---|---|---|")
    for kind, rank in (("mlp", args.rank), ("unet", max(args.rank // 2, 1))):
        for method in ("progressive", "consistency"):
            teacher, data, cfg, m = setup(kind, rank, method)
            full = m.make_student(cfg, teacher, data)
            ad = adapters.adapt_student(m.make_student(cfg, teacher, data), cfg.adapter)
            previous = copy.deepcopy(ad)  # a stage-2 teacher: an adapter student (merged by frozen_teacher)
            stage_teacher = previous if m.chains_teacher else teacher
            times = {"full": [], "adapter": []}
            time_stage(copy.deepcopy(full), stage_teacher, data, cfg, m, 3)  # warm-up
            for _ in range(args.rounds):
                times["full"].append(time_stage(copy.deepcopy(full), stage_teacher, data, cfg, m, args.iterations))
                times["adapter"].append(time_stage(copy.deepcopy(ad), stage_teacher, data, cfg, m, args.iterations))
            f, a = statistics.median(times["full"]), statistics.median(times["adapter"])
            print(f"| {kind} (adapter rank {rank}) | {method} | {f * 1e3:.1f} ms | {a * 1e3:.1f} ms | {a / f:.2f} |")
    print(f"load average after {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
