"""How 1-step (and few-step) consistency-distillation quality on the archipelago mixture depends on the grid
size N, the target EMA rate, the loss weighting, sigma_max, the distance and the learning rate.

A script, not a test. Run from the repository root (about 2.5 minutes on one CPU thread):
    OMP_NUM_THREADS=1 python benchmarks/consistency_tuning.py [--iterations 1000] [--threads 1]

Setup: a small TimeMLP is first fitted to the exact mixture denoiser (the oracle); every variant starts its
student from that fit and distils with the oracle as the ODE teacher, so only the distillation differs.
Quality: NLL gap (mean -log p(sample) minus the mixture entropy; 0 for exact samples) with the standard error
of a mean, and sliced Wasserstein-2 next to its floor (the same metric on exact samples of the same size).
"""
from __future__ import annotations

import argparse
import copy
import dataclasses
import math
import time

import torch

from distillrun import metrics
from distillrun.methods.consistency import ConsistencyConfig
from distillrun.data.mixture import archipelago
from distillrun.denoiser import NetDenoiser
from distillrun.methods.consistency import (ConsistencyModel, consistency_loss, consistency_sample, sample_sigmas,
                                            training_sigmas)
from distillrun.methods.teacher import oracle_fit_loss
from distillrun.nets.mlp import TimeMLP
from distillrun.nets.oracle import OracleDenoiser
from distillrun.samplers import sample, uniform_grid
from distillrun.training import LoopSpec, train_loop

N_EVAL = 4000
# The recommended defaults for 2D data (std ~1); every variant changes one of them.
BASE = dict(grid_points=18, ema_decay=0.95, weighting="inverse_gap", sigma_max=20.0, distance="pseudo_huber",
            lr=1e-3, batch_size=256, ode_solver="heun")
VARIANTS = [("baseline", {}), ("baseline, seed 2", {"seed": 2}),
            ("N=10", {"grid_points": 10}), ("N=40", {"grid_points": 40}),
            ("ema 0", {"ema_decay": 0.0}),
            ("uniform weighting", {"weighting": "uniform"}), ("sigma_max 80 (paper)", {"sigma_max": 80.0}),
            ("l2", {"distance": "l2"}), ("lr 2e-4", {"lr": 2e-4}), ("euler", {"ode_solver": "euler"}),
            ("constant LR", {"decay": "none"})]


class Scorer:
    def __init__(self, mix):
        self.mix, self.entropy = mix, mix.entropy()
        self.ref = mix.sample(N_EVAL, torch.Generator().manual_seed(7))[0]
        self.proj = metrics.random_projections(2, 64, seed=0)

    def __call__(self, x) -> str:
        nll = -self.mix.log_prob(x).double()
        sw = metrics.sliced_w2(x, self.ref, self.proj)
        se = float(nll.std()) / math.sqrt(len(nll))
        return f"nll gap {float(nll.mean()) - self.entropy:6.3f} ± {se:.3f}  sw2 {sw:.3f}"


def fit_teacher_net(mix, data, generator):
    net = NetDenoiser(TimeMLP(2, width=128, depth=3))
    spec = LoopSpec(iterations=2000, lr=2e-3, warmup=50, decay="cosine")
    train_loop(net, oracle_fit_loss(OracleDenoiser(mix)), batcher(data, 256), spec, generator=generator, quiet=True)
    return net


def batcher(data, batch_size):
    return lambda g: (data[torch.randint(0, data.shape[0], (batch_size,), generator=g)], None)


def distil(student_init, oracle, data, overrides: dict, iterations: int):
    seed, decay = overrides.pop("seed", 0), overrides.pop("decay", "linear")
    cfg = dataclasses.replace(ConsistencyConfig(), iterations=iterations, **{**BASE, **overrides})
    sigma_data = float(data.std())
    model = ConsistencyModel(copy.deepcopy(student_init), sigma_data, cfg.sigma_min)
    spec = LoopSpec(iterations=cfg.iterations, lr=cfg.lr, ema_decay=cfg.ema_decay, grad_clip=cfg.grad_clip,
                    decay=decay)
    t0 = time.perf_counter()
    res = train_loop(model, consistency_loss(oracle, cfg, 2), batcher(data, cfg.batch_size), spec,
                     generator=torch.Generator().manual_seed(seed), quiet=True)
    return res.model, cfg, sigma_data, time.perf_counter() - t0, res.failed


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--iterations", type=int, default=1000)
    ap.add_argument("--threads", type=int, default=1)
    args = ap.parse_args()
    torch.set_num_threads(args.threads)
    mix = archipelago()
    oracle, score = OracleDenoiser(mix), Scorer(mix)
    data = mix.sample(65536, torch.Generator().manual_seed(0))[0]
    t0 = time.perf_counter()
    teacher_net = fit_teacher_net(mix, data, torch.Generator().manual_seed(1))
    print(f"student init: TimeMLP 128x3 fitted to the oracle in {time.perf_counter() - t0:.0f}s")
    noise = torch.randn(N_EVAL, 2, generator=torch.Generator().manual_seed(5))
    print(f"{'exact samples (floor)':28s} {score(mix.sample(N_EVAL, torch.Generator().manual_seed(8))[0])}")
    for steps in (1, 2, 256):
        print(f"{f'fitted net, DDIM {steps} steps':28s} {score(sample(teacher_net, noise, uniform_grid(steps)))}")
    for name, overrides in VARIANTS:
        model, cfg, sd, secs, failed = distil(teacher_net, oracle, data, dict(overrides), args.iterations)
        print(f"\n== {name} ({secs:.0f}s{', FAILED ' + failed if failed else ''})")
        for steps in (1, 2, 3, 4):
            sigmas = sample_sigmas(steps, cfg, sd)
            x = consistency_sample(model, noise, sigmas, torch.Generator().manual_seed(3))
            print(f"  {steps} step(s) {'':17s} {score(x)}   sigmas {[round(s, 3) for s in sigmas]}")
        if name == "baseline":
            for level in training_sigmas(cfg.grid_points, cfg.sigma_min, cfg.sigma_max, cfg.rho).tolist()[1:-1]:
                x = consistency_sample(model, noise, [cfg.sigma_max, level], torch.Generator().manual_seed(3))
                print(f"  2 steps via sigma {level:8.4f} {score(x)}")


if __name__ == "__main__":
    main()
