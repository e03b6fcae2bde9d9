"""Overhead of a distillation stage's loop against a bare loop of the same network, batch and optimizer.

For each method, three timings of the same number of iterations, side by side in one process:
  stage    train_loop with the method's loss (teacher calls, target building, clip, EMA, NaN checks, ...)
  teacher  the teacher/target evaluations alone that one stage iteration makes (no_grad)
  bare     forward + backward + Adam step of the student on precomputed inputs and targets
overhead ratio = bare / (stage - teacher): 1.0 means the loop adds nothing beyond the teacher's work.

Usage: python benchmarks/overhead.py [--threads 1] [--iterations 300] [--batch 512]
"""
import argparse
import copy
import time

import torch

from distillrun.data.mixture import archipelago
from distillrun.denoiser import NetDenoiser
from distillrun.methods import consistency, progressive
from distillrun.nets import build_net
from distillrun.schedule import Schedule
from distillrun.training import LoopSpec, train_loop


def timed(fn, repeat: int) -> float:
    fn()  # warm-up
    t0 = time.perf_counter()
    for _ in range(repeat):
        fn()
    return (time.perf_counter() - t0) / repeat


def bare_step(student, x, t, target):
    opt = torch.optim.Adam(student.parameters(), lr=1e-4)

    def step():
        loss = ((student(x, t) - target) ** 2).mean()
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
    return step


def stage_time(student, loss_fn, draw, iterations, ema):
    spec = LoopSpec(iterations=iterations, lr=1e-4, ema_decay=ema)
    t0 = time.perf_counter()
    train_loop(student, loss_fn, draw, spec, generator=torch.Generator().manual_seed(0), quiet=True)
    return (time.perf_counter() - t0) / iterations


def main():
    p = argparse.ArgumentParser()
    p.add_argument("--threads", type=int, default=1)
    p.add_argument("--iterations", type=int, default=300)
    p.add_argument("--batch", type=int, default=512)
    a = p.parse_args()
    torch.set_num_threads(a.threads)
    mix, sch = archipelago(), Schedule("cosine")
    data = mix.sample(65536, torch.Generator().manual_seed(0))[0]
    draw = lambda g: (data[torch.randint(0, len(data), (a.batch,), generator=g)], None)  # noqa: E731
    teacher = NetDenoiser(build_net("mlp", (2,), 0, width=128, depth=3), "v", sch).requires_grad_(False)
    x, t = torch.randn(a.batch, 2), torch.rand(a.batch, dtype=torch.float64) * 0.99 + 0.01
    target = torch.randn(a.batch, 2)
    print(f"{'method':>12} {'stage ms/it':>11} {'teacher ms':>10} {'bare ms':>8} {'teacher evals':>13} {'overhead ratio':>14}")
    rows = []
    # progressive: 2 teacher evaluations per update (two DDIM steps)
    student = copy.deepcopy(teacher).requires_grad_(True)
    s = stage_time(student, progressive.progressive_loss(teacher, 64), draw, a.iterations, 0.0)
    te = timed(lambda: progressive.two_teacher_steps(teacher, x, t.float(), 64), a.iterations)
    b = timed(bare_step(copy.deepcopy(student), x, t.float(), target), a.iterations)
    rows.append(("progressive", s, te, b, 2))
    # consistency: Heun = 2 teacher evaluations, plus 1 target-network evaluation
    cm = consistency.ConsistencyModel(copy.deepcopy(teacher).requires_grad_(True), 1.0, 0.002)
    from distillrun.config import ConsistencyConfig
    cfg = ConsistencyConfig()
    s = stage_time(cm, consistency.consistency_loss(teacher, cfg, 1.0, 2), draw, a.iterations, cfg.ema_decay)
    sig = torch.full((a.batch,), 1.0, dtype=torch.float64)
    tgt = copy.deepcopy(cm).requires_grad_(False)

    def teacher_part():
        with torch.no_grad():
            tgt(consistency.teacher_ode_step(teacher, x, sig, sig * 0.8, "heun"), sig * 0.8)
    te = timed(teacher_part, a.iterations)
    b = timed(bare_step(copy.deepcopy(cm), x, sig, target), a.iterations)
    rows.append(("consistency", s, te, b, 3))
    for name, s, te, b, n in rows:
        print(f"{name:>12} {1e3 * s:>11.2f} {1e3 * te:>10.2f} {1e3 * b:>8.2f} {n:>13} {b / (s - te):>14.2f}")


if __name__ == "__main__":
    main()
