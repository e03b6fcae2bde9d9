"""Overhead of a distillation stage's training loop against a bare loop of the same network, batch and optimizer.

For each scenario, three timings of the same number of iterations, interleaved in rounds (stage, teacher, bare;
the order rotates every round) in one process, so a change in machine load hits all three alike:
  stage    `training.train_loop` with the method's loss, as the pipeline runs it (data draw, noise, schedule math,
           teacher and target evaluations, target building, clip, EMA, NaN checks, loss.item(), LR schedule)
  teacher  the no-grad network evaluations one stage iteration makes (teacher + EMA target network), counted with
           forward hooks during the stage run and timed as bare forward passes on the same batch shape
  bare     forward + backward + Adam step of the student's network on precomputed inputs and targets
  before   the stage loop with the EMA, optimizer and clip it had before the performance work swapped in
           (per-tensor avg_fn EMA, per-tensor Adam, clip_grad_norm_; see previous_loop), with its own bare loop
overhead ratio = bare / (stage - teacher): 1.0 means the loop adds nothing beyond the network's own training step
and the teacher's evaluations; loop share = (stage - teacher - bare) / stage, the time the loop itself adds.
Also reported: teacher (and target) evaluations per student update, and the amortised cost of the mid-run state
(`checkpoint.save_state` once every checkpoint_every = 500 iterations, the pipeline default).

The first `torch.optim.Adam` of a process imports torch._dynamo (~1.5 s): a warm-up loop pays it before timing
(the first version of this script timed it inside the stage loop, which made the ratio look like 0.4-0.6).

Usage (repository root; one torch thread unless --threads; ~4 minutes):
    OMP_NUM_THREADS=1 python benchmarks/overhead.py [--rounds 7] [--only progressive-2d,consistency-2d]
"""
from __future__ import annotations

import argparse
import contextlib
import copy
import math
import os
import statistics
import tempfile
import time
from pathlib import Path

import torch

from torch.optim.swa_utils import AveragedModel

from distillrun import checkpoint, training
from distillrun.data import load_dataset
from distillrun.denoiser import NetDenoiser
from distillrun.methods import StageJob, method_named
from distillrun.methods.teacher import network_for
from distillrun.nets import fast_layout
from distillrun.schedule import Schedule
from distillrun.training import LoopSpec, _state_tensors, make_ema, make_scheduler, train_loop

# name: (recipe whose network, batch size and method settings are used, iterations per round)
SCENARIOS = {
    "progressive-2d": ("archipelago_progressive", 100),
    "consistency-2d": ("archipelago_consistency", 100),
    "progressive-digits": ("digits_progressive", 30),
    "consistency-digits": ("digits_consistency", 30),
}
CHECKPOINT_EVERY = 500  # the pipeline's default checkpoint_every


def recipe_config(recipe: str):
    from hydra import compose, initialize_config_module

    from distillrun.config import register_configs

    register_configs()
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        return compose("run", overrides=[f"recipe={recipe}"])


class Counter:
    """Forward hook: counts calls of a module, split by whether autograd was recording."""

    def __init__(self):
        self.grad = self.no_grad = 0

    def __call__(self, module, args, out):
        if torch.is_grad_enabled():
            self.grad += 1
        else:
            self.no_grad += 1


def build(scenario):
    """The recipe's teacher network (fresh weights: speed does not depend on them), its stage-1 student and loss."""
    cfg = recipe_config(scenario[0])
    data = load_dataset(cfg.data)
    torch.manual_seed(0)
    net, _ = network_for(cfg, data)
    teacher = NetDenoiser(net, cfg.teacher.parameterization, Schedule(cfg.teacher.schedule)).requires_grad_(False)
    m = cfg.method
    method = method_named(m.name)
    student = method.make_student(cfg, teacher, data)  # as the pipeline makes it (memory format)
    job = StageJob(method.plan(cfg)[0], teacher, student, data, torch.Generator(), None, torch.device("cpu"))
    loss_fn = method.loss(cfg, job)  # stage 1's loss, as the pipeline builds it
    teacher = fast_layout(teacher)  # as the stage's loss gets it
    net = getattr(student, "denoiser", student).net  # the network inside the student (a consistency model wraps it)
    spec = LoopSpec(iterations=0, lr=m.lr, decay="linear", grad_clip=m.grad_clip, ema_decay=m.ema_decay)
    return cfg, data, teacher, student, net, loss_fn, spec, m.batch_size


def inputs(data, batch, k=4):
    """k precomputed (x, t, target) batches of the network's input and output shape."""
    g = torch.Generator().manual_seed(1)
    out = []
    for _ in range(k):
        x0 = data.batch(batch, g)[0]
        out.append((torch.randn(x0.shape, generator=g), torch.rand(batch, generator=g),
                    torch.randn(x0.shape, generator=g)))
    return out


def stage_loop(student, loss_fn, draw, spec, n, seed):
    spec = LoopSpec(**{**vars(spec), "iterations": n})
    res = train_loop(student, loss_fn, draw, spec, generator=torch.Generator().manual_seed(seed), quiet=True)
    if res.failed or len(res.losses) != n:
        raise RuntimeError(f"stage loop stopped early: {res.failed}")


def evals_per_update(student, net, teacher, loss_fn, draw, spec) -> tuple[float, float]:
    """(teacher evaluations, target-network evaluations) per student update, counted over a short stage run."""
    t_count, s_count = Counter(), Counter()
    # plain functions survive deepcopy as the same object (a Counter instance would be copied with the module)
    hooks = [teacher.net.register_forward_hook(lambda *a: t_count(*a)),
             net.register_forward_hook(lambda *a: s_count(*a))]
    try:
        n = 10
        stage_loop(student, loss_fn, draw, spec, n, 123)
    finally:
        for h in hooks:
            h.remove()
    # the deep copy made inside the loop shares the hook object, so the EMA target's calls land in s_count.no_grad
    assert s_count.grad == n, f"expected one grad-recording student forward per update, saw {s_count.grad / n}"
    return t_count.no_grad / n, s_count.no_grad / n


def teacher_loop(teacher_net, target_net, n_teacher, n_target, batches, n):
    with torch.no_grad():
        for i in range(n):
            x, t, _ = batches[i % len(batches)]
            for _ in range(round(n_teacher)):
                teacher_net(x, t)
            for _ in range(round(n_target)):
                target_net(x, t)


def bare_loop(net, lr, batches, n, make_opt=training.make_optimizer):
    opt = make_opt(net, lr)
    for i in range(n):
        x, t, target = batches[i % len(batches)]
        loss = ((net(x, t) - target) ** 2).mean()
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()


# --- the loop as it was before the performance work (commit ef586dc), for the side-by-side "before" columns
def previous_ema(model, decay):
    """AveragedModel with a per-tensor Python avg_fn (same warm-up rate as training.ema_multi_avg_fn)."""
    if decay <= 0:
        return model

    def avg(averaged, current, num_averaged):
        rate = min(decay, (1 + float(num_averaged)) / (10 + float(num_averaged)))
        return rate * averaged + (1 - rate) * current
    return AveragedModel(model, avg_fn=avg, use_buffers=True).requires_grad_(False)


def previous_optimizer(model, lr):
    """torch.optim.Adam with its CPU default: a Python loop over tensors."""
    return torch.optim.Adam([p for p in model.parameters() if p.requires_grad], lr=lr)


def previous_clip(model, max_norm):
    """clip_grad_norm_, which always rescales (by 1 when the norm is below max_norm)."""
    return torch.nn.utils.clip_grad_norm_(model.parameters(), max_norm if max_norm > 0 else math.inf)


@contextlib.contextmanager
def previous_loop():
    """train_loop with the previous EMA, optimizer and clip swapped in (benchmark only)."""
    names = ("make_ema", "make_optimizer", "clip_gradients")
    saved = [getattr(training, k) for k in names]
    for k, fn in zip(names, (previous_ema, previous_optimizer, previous_clip)):
        setattr(training, k, fn)
    try:
        yield
    finally:
        for k, fn in zip(names, saved):
            setattr(training, k, fn)


def stage_previous(student, loss_fn, draw, spec, n, seed):
    with previous_loop():
        stage_loop(student, loss_fn, draw, spec, n, seed)


def checkpoint_ms(student, spec, tmp: Path) -> float:
    """Milliseconds of one mid-run state save (model, EMA, Adam moments), median of 3."""
    opt = training.make_optimizer(student, 1e-4)
    for p in student.parameters():  # Adam moments exist after the first step: make them
        p.grad = torch.zeros_like(p)
    opt.step()
    ema = make_ema(student, spec.ema_decay)
    sched = make_scheduler(opt, LoopSpec(iterations=1000, lr=1e-4))
    times = []
    for _ in range(3):
        t0 = time.perf_counter()
        checkpoint.save_state(tmp / "partial.safetensors", *_state_tensors(student, ema, opt, sched, torch.Generator(),
                                                                             [0.0] * 500, 500))
        times.append(time.perf_counter() - t0)
    return 1e3 * statistics.median(times)


def run(name, scenario, rounds, tmp):
    cfg, data, teacher, student, net, loss_fn, spec, batch = build(scenario)
    n = scenario[-1]
    draw = data.batches(batch, torch.device("cpu"))
    n_teacher, n_target = evals_per_update(student, net, teacher, loss_fn, draw, spec)
    stage_loop(copy.deepcopy(student), loss_fn, draw, spec, 3, 7)  # warm-up: imports, allocator
    batches = inputs(data, batch)
    target_net = copy.deepcopy(net).requires_grad_(False)
    bare_net = copy.deepcopy(net).requires_grad_(True)
    previous_student, previous_net = copy.deepcopy(student), copy.deepcopy(net).requires_grad_(True)
    parts = {"stage": lambda: stage_loop(student, loss_fn, draw, spec, n, 0),
             "teacher": lambda: teacher_loop(teacher.net, target_net, n_teacher, n_target, batches, n),
             "bare": lambda: bare_loop(bare_net, spec.lr, batches, n),
             "previous": lambda: stage_previous(previous_student, loss_fn, draw, spec, n, 0),
             "bare (previous)": lambda: bare_loop(previous_net, spec.lr, batches, n, previous_optimizer)}
    for fn in parts.values():
        fn()  # warm-up of each part
    wall, cpu = {k: [] for k in parts}, {k: [] for k in parts}
    order = list(parts)
    for r in range(rounds):
        for k in order[r % len(order):] + order[:r % len(order)]:
            t0, c0 = time.perf_counter(), time.process_time()
            parts[k]()
            wall[k].append(1e3 * (time.perf_counter() - t0) / n)
            cpu[k].append(1e3 * (time.process_time() - c0) / n)
    ck = checkpoint_ms(copy.deepcopy(student), spec, tmp)

    def ratios(ms, extra=0.0, stage="stage", bare="bare"):  # per round, so a load change between rounds cancels
        return [b / (s + extra - te) for s, te, b in zip(ms[stage], ms["teacher"], ms[bare])]
    share = [(s - te - b) / s for s, te, b in zip(cpu["stage"], cpu["teacher"], cpu["bare"])]
    med = {k: statistics.median(v) for k, v in cpu.items()}
    return dict(name=name, net=f"{cfg.net.kind} {sum(p.numel() for p in net.parameters()) / 1e3:.0f}k, batch {batch}",
                stage=med["stage"], teacher=med["teacher"], bare=med["bare"], n_teacher=n_teacher, n_target=n_target,
                cpu=ratios(cpu), wall=ratios(wall), share=statistics.median(share), ck=ck,
                ratio_ck=statistics.median(ratios(cpu, ck / CHECKPOINT_EVERY)),
                its=1e3 / statistics.median(wall["stage"]), previous=ratios(cpu, stage="previous", bare="bare (previous)"),
                its_previous=1e3 / statistics.median(wall["previous"]))


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--threads", type=int, default=1)
    p.add_argument("--rounds", type=int, default=7)
    p.add_argument("--only", default=",".join(SCENARIOS), help="comma-separated scenario names")
    a = p.parse_args()
    torch.set_num_threads(a.threads)
    print(f"torch {torch.__version__}, {a.threads} thread(s), {a.rounds} rounds, load average at start "
          f"{os.getloadavg()[0]:.2f}; ms/it are CPU-time medians")
    print(f"{'scenario':>19} {'network, batch':>20} {'stage it/s':>10} {'stage ms':>8} {'teacher ms':>10} "
          f"{'bare ms':>7} "
          f"{'evals/upd':>9} {'ratio (CPU) [min-max]':>21} {'ratio (wall)':>12} {'loop share':>10} {'ckpt ms':>7} "
          f"{'ratio w/ ckpt':>13} {'before: ratio':>13} {'it/s':>6} {'speed-up':>8}")
    with tempfile.TemporaryDirectory() as tmp:
        for name in a.only.split(","):
            r = run(name, SCENARIOS[name], a.rounds, Path(tmp))
            evals = f"{r['n_teacher']:g}+{r['n_target']:g}"
            c, w = r["cpu"], r["wall"]
            print(f"{r['name']:>19} {r['net']:>20} {r['its']:>10.1f} {r['stage']:>8.2f} {r['teacher']:>10.2f} "
                  f"{r['bare']:>7.2f} {evals:>9} {statistics.median(c):>8.3f} [{min(c):.2f}-{max(c):.2f}] "
                  f"{statistics.median(w):>12.3f} {100 * r['share']:>9.1f}% {r['ck']:>7.1f} {r['ratio_ck']:>13.3f} "
                  f"{statistics.median(r['previous']):>13.3f} {r['its_previous']:>6.1f} {r['its'] / r['its_previous']:>8.2f}",
                  flush=True)
    print(f"load average at end {os.getloadavg()[0]:.2f}; evals/upd = teacher + EMA-target network evaluations per "
          "student update; ratio = bare / (stage - teacher); loop share = (stage - teacher - bare) / stage; "
          "before = the same with the loop as it was before the performance work (per-tensor EMA avg_fn and Adam, "
          "clip_grad_norm_), against a bare loop with that Adam; speed-up = stage it/s now / before")


if __name__ == "__main__":
    main()
