"""torch.compile on CPU (compute.compile=true compiles the teacher network in place; students inherit it by copy):
compile time against the steady-state gain, eager and compiled side by side in one process.

For the recipe's network (fresh weights), on the recipe's training batch and on an evaluation chunk:
  train step   forward + backward + Adam step (what every training iteration does for the student)
  forward      a no-grad forward pass of evaluate.CHUNK rows (what every sampler step does)
First-call seconds of the compiled module are the compile cost; steady-state times are interleaved medians
(CPU time). Break-even = compile seconds / seconds saved per call: the calls needed before compiling pays off.

Usage (repository root): OMP_NUM_THREADS=1 python benchmarks/compile_cpu.py [--recipe archipelago_progressive]
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
from overhead import recipe_config  # noqa: E402

from distillrun.data import load_dataset  # noqa: E402
from distillrun.evaluate import CHUNK  # noqa: E402
from distillrun.methods.teacher import network_for  # noqa: E402


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--recipe", default="archipelago_progressive")
    p.add_argument("--rounds", type=int, default=5)
    p.add_argument("--calls", type=int, default=10, help="calls per timed round")
    p.add_argument("--threads", type=int, default=1)
    a = p.parse_args()
    torch.set_num_threads(a.threads)
    cfg = recipe_config(a.recipe)
    data = load_dataset(cfg.data)
    torch.manual_seed(0)
    eager, _ = network_for(cfg, data)
    compiled = copy.deepcopy(eager)
    compiled.compile()
    batch, rows = cfg.method.batch_size, min(CHUNK, cfg.eval.samples)
    g = torch.Generator().manual_seed(0)
    xb, tb = torch.randn(batch, *data.shape, generator=g), torch.rand(batch, generator=g)
    target = torch.randn(batch, *data.shape, generator=g)
    xe, te = torch.randn(rows, *data.shape, generator=g), torch.full((rows,), 0.5)
    opts = {id(m): torch.optim.Adam(m.parameters(), lr=1e-4) for m in (eager, compiled)}

    def train(m):
        loss = ((m(xb, tb) - target) ** 2).mean()
        opts[id(m)].zero_grad(set_to_none=True)
        loss.backward()
        opts[id(m)].step()

    def forward(m):
        with torch.no_grad():
            m(xe, te)
    first = {}
    for name, fn in (("train step", train), ("forward", forward)):
        c0, t0 = time.process_time(), time.perf_counter()
        fn(compiled)
        fn(compiled)  # a second call: a recompile for the next shape or mode shows up here too
        first[name] = (time.perf_counter() - t0, time.process_time() - c0)
        fn(eager)
    jobs = {(n, k): (fn, m) for n, fn in (("train step", train), ("forward", forward))
            for k, m in (("eager", eager), ("compiled", compiled))}
    ms = {k: [] for k in jobs}
    keys = list(jobs)
    for r in range(a.rounds):
        for k in (keys if r % 2 == 0 else keys[::-1]):
            fn, m = jobs[k]
            c0 = time.process_time()
            for _ in range(a.calls):
                fn(m)
            ms[k].append(1e3 * (time.process_time() - c0) / a.calls)
    med = {k: statistics.median(v) for k, v in ms.items()}
    print(f"{a.recipe}: {cfg.net.kind} net, train batch {batch}, forward rows {rows}; {a.threads} thread(s), "
          f"load average {os.getloadavg()[0]:.2f} (at end); CPU-time medians of {a.rounds} rounds x {a.calls} calls")
    print(f"{'':>11} {'eager ms':>9} {'compiled ms':>11} {'speed-up':>8} {'compile s (wall/CPU)':>21} "
          f"{'break-even calls':>16}")
    for n in ("train step", "forward"):
        e, c = med[(n, "eager")], med[(n, "compiled")]
        saved = (e - c) / 1e3
        be = f"{first[n][0] / saved:.0f}" if saved > 0 else "never"
        print(f"{n:>11} {e:>9.2f} {c:>11.2f} {e / c:>8.3f} {first[n][0]:>10.1f} / {first[n][1]:<8.1f} {be:>16}")


if __name__ == "__main__":
    main()
