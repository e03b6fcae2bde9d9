"""Per-iteration cost of the training loop's parts, and of cheaper forms of three of them, side by side in one
process (interleaved rounds, CPU-time medians). Backs the changes proposed for files outside the performance
work (training.py, nets/mlp.py); nothing here changes the package.

Parts, on the archipelago_consistency recipe's student (MLP 931k parameters, batch 512, EMA 0.95):
  ema            torch.optim.swa_utils.AveragedModel.update_parameters with a per-tensor avg_fn (training.py now)
  ema_foreach    one torch._foreach_lerp_ over all parameters and buffers with the same warm-up rate
  clip           torch.nn.utils.clip_grad_norm_ (always rescales, by 1.0 when the norm is below the limit)
  clip_if_needed the same norm (torch._foreach_norm), rescaling only when it exceeds the limit
  item           loss.item() every iteration (a host sync on a GPU; on a CPU only a read)
Sampling with one time per batch (nets/mlp.py): TimeMLP.forward as it is, against a variant that embeds the time
once and broadcasts it to the rows (the net's output differs by float round-off only), 16 DDIM steps of 2048 points.

Usage (repository root): OMP_NUM_THREADS=1 python benchmarks/loop_parts.py [--rounds 7]
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).parent))
import overhead  # noqa: E402

from distillrun.nets.mlp import TimeMLP  # noqa: E402
from distillrun.samplers import sample, uniform_grid  # noqa: E402
from distillrun.training import make_ema  # noqa: E402


def shared_time_forward(self, x, t, cond=None):
    """TimeMLP.forward for a batch whose rows share one time (a sampler step): embed it once."""
    if cond is not None or t.dim() != 1 or t.shape[0] < 2 or not bool((t == t[:1]).all()):
        return TimeMLP.forward(self, x, t, cond)
    emb = self.embed(t[:1], None)  # (1, width)
    h = self.inp(torch.cat([x, emb.expand(x.shape[0], -1)], dim=1))
    for block in self.blocks:
        h = h + block.outer(block.act(block.inner(block.act(block.norm(h))) + block.cond_proj(emb)))
    return self.out(torch.nn.functional.silu(self.out_norm(h)))


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rounds", type=int, default=7)
    p.add_argument("--threads", type=int, default=1)
    a = p.parse_args()
    torch.set_num_threads(a.threads)
    cfg, data, teacher, student, net, loss_fn, spec, batch = overhead.build(overhead.SCENARIOS["consistency-2d"])
    params = [q for q in student.parameters() if q.requires_grad]
    for q in params:
        q.grad = torch.randn_like(q) * 1e-4  # a gradient norm below the clip limit, the usual case late in a stage
    ema = make_ema(student, spec.ema_decay)
    ema.update_parameters(student)
    averaged = [q.detach() for q in ema.module.parameters()] + [b.detach() for b in ema.module.buffers()]
    current = [q.detach() for q in student.parameters()] + [b.detach() for b in student.buffers()]
    updates = [1]

    def ema_foreach():
        rate = min(spec.ema_decay, (1 + updates[0]) / (10 + updates[0]))
        updates[0] += 1
        torch._foreach_lerp_(averaged, current, 1 - rate)

    def clip_if_needed():
        grads = [q.grad for q in params]
        norm = torch.linalg.vector_norm(torch.stack(torch._foreach_norm(grads)))
        if norm > spec.grad_clip:
            torch._foreach_mul_(grads, spec.grad_clip / (float(norm) + 1e-6))
        return norm

    loss = (params[0] * 2).sum()
    parts = {"ema": lambda: ema.update_parameters(student), "ema_foreach": ema_foreach,
             "clip": lambda: torch.nn.utils.clip_grad_norm_(params, spec.grad_clip), "clip_if_needed": clip_if_needed,
             "item": lambda: loss.item()}
    model = teacher.net
    noise, grid = torch.randn(2048, *data.shape, generator=torch.Generator().manual_seed(0)), uniform_grid(16)

    def draw(shared):
        model.forward = shared_time_forward.__get__(model) if shared else TimeMLP.forward.__get__(model)
        sample(teacher, noise, grid)
    sampling = {"sample per-row time": lambda: draw(False), "sample shared time": lambda: draw(True)}
    jobs = {**{k: (v, 50) for k, v in parts.items()}, **{k: (v, 1) for k, v in sampling.items()}}
    ms = {k: [] for k in jobs}
    for fn, reps in jobs.values():
        fn()
    keys = list(jobs)
    for r in range(a.rounds):
        for k in (keys if r % 2 == 0 else keys[::-1]):
            fn, reps = jobs[k]
            c0 = time.process_time()
            for _ in range(reps):
                fn()
            ms[k].append(1e3 * (time.process_time() - c0) / reps)
    med = {k: statistics.median(v) for k, v in ms.items()}
    model.forward = TimeMLP.forward.__get__(model)
    with torch.no_grad():
        t = torch.full((2048,), 0.3)
        diff = float((TimeMLP.forward(model, noise, t) - shared_time_forward(model, noise, t)).abs().max())
    print(f"{a.threads} thread(s), {a.rounds} rounds, load average {os.getloadavg()[0]:.2f} (at end); CPU-time medians")
    print(f"{'part':>22} {'ms':>9} {'vs current':>10}")
    for k, base in (("ema", None), ("ema_foreach", "ema"), ("clip", None), ("clip_if_needed", "clip"), ("item", None),
                    ("sample per-row time", None), ("sample shared time", "sample per-row time")):
        print(f"{k:>22} {med[k]:>9.3f} {med[base] / med[k] if base else 1.0:>9.2f}x")
    print(f"shared-time forward: max |difference| {diff:.1e}")


if __name__ == "__main__":
    main()
