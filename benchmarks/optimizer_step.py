"""One Adam step on CPU: torch.optim.Adam's implementations side by side (training.make_optimizer uses fused).

  for-loop  the CPU default (foreach=False, fused=False): a Python loop over parameter tensors
  foreach   multi-tensor kernels (foreach=True)
  fused     one fused kernel over all tensors (fused=True)
Same network and random gradients for each; steps interleaved by round; CPU-time medians.
Usage (repository root; ~1 minute): OMP_NUM_THREADS=1 python benchmarks/optimizer_step.py [--threads 1]
"""
import argparse
import os
import statistics
import time

import torch

from distillrun.nets.mlp import TimeMLP
from distillrun.nets.unet import SmallUNet

VARIANTS = {"for-loop": dict(foreach=False), "foreach": dict(foreach=True), "fused": dict(fused=True)}


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--threads", type=int, default=1)
    p.add_argument("--rounds", type=int, default=5)
    p.add_argument("--steps", type=int, default=100)
    a = p.parse_args()
    torch.set_num_threads(a.threads)
    torch.manual_seed(0)
    nets = {"MLP 931k (2D recipes)": lambda: TimeMLP(2, width=256, depth=4),
            "MLP 3.7M (width 512)": lambda: TimeMLP(2, width=512, depth=4),
            "U-Net 518k (digits recipes)": lambda: SmallUNet(1, 16, base=32)}
    print(f"torch {torch.__version__}, {a.threads} thread(s), {a.rounds} rounds x {a.steps} steps, load average at "
          f"start {os.getloadavg()[0]:.2f}; ms per step, CPU-time medians")
    print(f"{'network':>28} " + " ".join(f"{k:>9}" for k in VARIANTS) + f" {'for-loop/fused':>14}")
    for name, make in nets.items():
        opts = {}
        for k, kw in VARIANTS.items():
            net = make()
            for q in net.parameters():
                q.grad = torch.randn_like(q)
            opts[k] = torch.optim.Adam(net.parameters(), lr=1e-4, **kw)
            opts[k].step()  # state allocated outside the timing
        ms = {k: [] for k in VARIANTS}
        for r in range(a.rounds):
            for k in (list(VARIANTS) if r % 2 == 0 else list(VARIANTS)[::-1]):
                c0 = time.process_time()
                for _ in range(a.steps):
                    opts[k].step()
                ms[k].append(1e3 * (time.process_time() - c0) / a.steps)
        med = {k: statistics.median(v) for k, v in ms.items()}
        print(f"{name:>28} " + " ".join(f"{med[k]:>9.3f}" for k in VARIANTS) +
              f" {med['for-loop'] / med['fused']:>14.2f}", flush=True)
    print(f"load average at end {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
