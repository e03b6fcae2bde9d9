"""torch intra-op threads (compute.threads) for a stage's training loop and for sampling: 1 thread against N,
interleaved in one process (torch.set_num_threads switched between rounds), wall-clock medians, with the load
average next to them: on a shared machine extra threads only help when cores are idle.

Usage (repository root): python benchmarks/threads.py [--recipe archipelago_progressive] [--threads 1,2] [--rounds 5]
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
import overhead  # noqa: E402

from distillrun import evaluate  # noqa: E402
from distillrun.samplers import sample, uniform_grid  # noqa: E402

SCENARIO = {"archipelago_progressive": "progressive-2d", "archipelago_consistency": "consistency-2d",
            "digits_progressive": "progressive-digits", "digits_consistency": "consistency-digits"}


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--recipe", default="archipelago_progressive", choices=list(SCENARIO))
    p.add_argument("--threads", default="1,2")
    p.add_argument("--rounds", type=int, default=5)
    p.add_argument("--iterations", type=int, default=30)
    a = p.parse_args()
    counts = [int(t) for t in a.threads.split(",")]
    scenario = overhead.SCENARIOS[SCENARIO[a.recipe]]
    cfg, data, teacher, student, net, loss_fn, spec, batch = overhead.build(scenario)
    draw = data.batches(batch, torch.device("cpu"))
    rows = min(evaluate.CHUNK, cfg.eval.samples)
    bank = evaluate.Bench(torch.randn(rows, *data.shape, generator=torch.Generator().manual_seed(0)),
                          None, None, None, None, 0.0, 0, 0)
    jobs = {}
    for n in counts:
        s = copy.deepcopy(student)
        jobs[("stage", n)] = lambda s=s: overhead.stage_loop(s, loss_fn, draw, spec, a.iterations, 0)
        jobs[("sample", n)] = lambda: evaluate.draw(lambda z, c: sample(teacher, z, uniform_grid(8)), bank)
    loads = [os.getloadavg()[0]]
    for (kind, n), fn in jobs.items():
        torch.set_num_threads(n)
        fn()
    secs = {k: [] for k in jobs}
    keys = list(jobs)
    for r in range(a.rounds):
        for k in (keys if r % 2 == 0 else keys[::-1]):
            torch.set_num_threads(k[1])
            t0 = time.perf_counter()
            jobs[k]()
            secs[k].append(time.perf_counter() - t0)
        loads.append(os.getloadavg()[0])
    med = {k: statistics.median(v) for k, v in secs.items()}
    print(f"{a.recipe}: {os.cpu_count()} cores, load average {min(loads):.2f}-{max(loads):.2f} during the run; "
          f"wall-clock medians of {a.rounds} rounds")
    print(f"{'threads':>7} {'stage it/s':>10} {'vs 1':>6} {'samples/s (8 steps)':>20} {'vs 1':>6}")
    for n in counts:
        st, sa = a.iterations / med[("stage", n)], rows / med[("sample", n)]
        print(f"{n:>7} {st:>10.2f} {st * med[('stage', counts[0])] / a.iterations:>6.2f} {sa:>20.0f} "
              f"{sa * med[('sample', counts[0])] / rows:>6.2f}")


if __name__ == "__main__":
    main()
