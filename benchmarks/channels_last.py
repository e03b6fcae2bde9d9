"""Channels-last memory format for the U-Net on CPU: stage training and sampling, contiguous against channels-last,
interleaved in one process.

Variants (the digits recipes' U-Net, batch and settings; fresh weights, which do not change the speed):
  contiguous       as built (NCHW)
  student          the stage's student in channels-last, teacher as built
  both             student and teacher in channels-last (what the methods do for a stage's loss and its samplers)
Timed: a progressive and a consistency stage loop (`train_loop` with the method's loss), and a 16-step DDIM draw
of 1000 samples (the digits recipes' eval.samples). Also reported: the largest difference of one forward pass.

Usage (repository root): OMP_NUM_THREADS=1 python benchmarks/channels_last.py [--rounds 5] [--iterations 10]
"""
from __future__ import annotations

import argparse
import copy
import os
import statistics
import sys
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).parent))
import overhead  # noqa: E402  (same scenario builder)

from distillrun import evaluate  # noqa: E402
from distillrun.methods.consistency import consistency_loss  # noqa: E402
from distillrun.methods.progressive import progressive_loss  # noqa: E402
from distillrun.samplers import sample, uniform_grid  # noqa: E402

CL = torch.channels_last
# Stage 1's loss of each recipe, on the teacher exactly as given (the method's own `loss` would convert it).
LOSSES = {"digits_progressive": lambda t, cfg, data: progressive_loss(t, cfg.teacher.steps // 2, cfg.method.loss),
          "digits_consistency": lambda t, cfg, data: consistency_loss(t, cfg.method, data.x[0].numel())}


def variants(scenario):
    cfg, data, teacher, student, net, loss_fn_unused, spec, batch = overhead.build(scenario)
    out = {}
    for name, s_cl, t_cl in (("contiguous", False, False), ("student", True, False), ("both", True, True)):
        t = copy.deepcopy(teacher).to(memory_format=CL if t_cl else torch.contiguous_format)
        s = copy.deepcopy(student).to(memory_format=CL if s_cl else torch.contiguous_format)
        out[name] = (s, t, LOSSES[scenario[0]](t, cfg, data))
    return cfg, data, spec, batch, out


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rounds", type=int, default=5)
    p.add_argument("--iterations", type=int, default=10)
    p.add_argument("--threads", type=int, default=1)
    a = p.parse_args()
    torch.set_num_threads(a.threads)
    print(f"{a.threads} thread(s), {a.rounds} rounds, load average {os.getloadavg()[0]:.2f}; CPU-time medians")
    for scen in ("progressive-digits", "consistency-digits"):
        cfg, data, spec, batch, vs = variants(overhead.SCENARIOS[scen])
        draw = data.batches(batch, torch.device("cpu"))
        bank = evaluate.Bench(torch.randn(cfg.eval.samples, *data.shape, generator=torch.Generator().manual_seed(0)),
                              None, None, None, None, 0.0, 0, 0)
        x, t = data.x[:batch], torch.rand(batch)
        with torch.no_grad():
            ref = vs["contiguous"][1].net(x, t)
            diff = max(float((v[1].net(x, t) - ref).abs().max()) for v in vs.values())
        jobs = {}
        for name, (s, te, loss) in vs.items():
            jobs[f"train {name}"] = lambda s=s, loss=loss: overhead.stage_loop(s, loss, draw, spec, a.iterations, 0)
            if scen.startswith("progressive"):  # sampling: the same for both methods' networks
                jobs[f"sample {name}"] = lambda te=te: evaluate.draw(lambda n, c: sample(te, n, uniform_grid(16)), bank)
        for fn in jobs.values():
            fn()
        ms = {k: [] for k in jobs}
        keys = list(jobs)
        for r in range(a.rounds):
            for k in (keys if r % 2 == 0 else keys[::-1]):
                c0 = time.process_time()
                jobs[k]()
                ms[k].append(time.process_time() - c0)
        med = {k: statistics.median(v) for k, v in ms.items()}
        print(f"\n{scen}: forward max |difference| {diff:.1e}")
        for k in keys:
            base = med[k.split()[0] + " contiguous"]
            unit = f"{1e3 * med[k] / a.iterations:7.1f} ms/it" if k.startswith("train") else f"{med[k]:7.2f} s/draw "
            print(f"  {k:>20} {unit}  speed-up vs contiguous {base / med[k]:.3f}")
    print(f"\nload average at end {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
