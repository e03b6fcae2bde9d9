"""Teacher training speed and quality at the default settings: 2D archipelago (MLP) and digits (U-Net).

Usage: python benchmarks/teacher_training.py [--threads 2] [--only 2d|digits]
Prints one row per scenario: iterations, seconds, iterations/s, and the teacher's quality at its full
DDIM steps next to the floor (the same metric between two exact data sets). Run it on an idle machine.
"""
import argparse
import time

import torch
from hydra import compose, initialize_config_module

from distillrun import evaluate
from distillrun.config import register_configs
from distillrun.data import load_dataset
from distillrun.pipeline import teacher_sampler
from distillrun.teachers import prepare_teacher

SCENARIOS = {"2d": ["recipe=archipelago_progressive"],
             "digits": ["recipe=digits_progressive"]}


def bench(name, overrides, threads, tmp):
    register_configs()
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        cfg = compose("run", overrides=[*overrides, f"compute.threads={threads}", "quiet=true",
                                        f"run_dir={tmp}/{name}"])
    torch.set_num_threads(threads)
    data = load_dataset(cfg.data)
    (tmp / name).mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    teacher = prepare_teacher(cfg, data, tmp / name)
    seconds = time.perf_counter() - t0
    bench_ = evaluate.make_bench(data, cfg.eval.samples, cfg.eval.projections, cfg.eval.bootstrap, cfg.eval.seed,
                                 cond_needed=teacher.num_classes > 0)
    t1 = time.perf_counter()
    x = evaluate.draw(teacher_sampler(teacher.denoiser, cfg.teacher.steps), bench_)
    sample_s = time.perf_counter() - t1
    q, floor = evaluate.quality(bench_, x), evaluate.quality(bench_, bench_.floor_set)
    metric = "fd" if data.is_image else "sw2"
    print(f"{name:>7} {cfg.teacher.iterations:>6} {seconds:>8.1f} {cfg.teacher.iterations / seconds:>8.1f} "
          f"{metric:>4} {q[metric]:>9.4g} ± {q[metric + '_se']:<8.2g} floor {floor[metric]:.4g}  "
          f"(sampling {len(x)} at {cfg.teacher.steps} steps: {sample_s:.1f} s)")


def main():
    import tempfile
    from pathlib import Path

    p = argparse.ArgumentParser()
    p.add_argument("--threads", type=int, default=2)
    p.add_argument("--only", choices=list(SCENARIOS))
    args = p.parse_args()
    print(f"{'data':>7} {'iters':>6} {'seconds':>8} {'it/s':>8} metric value")
    with tempfile.TemporaryDirectory() as tmp:
        for name, overrides in SCENARIOS.items():
            if args.only in (None, name):
                bench(name, overrides, args.threads, Path(tmp))


if __name__ == "__main__":
    main()
