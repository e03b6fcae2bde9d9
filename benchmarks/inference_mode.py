"""torch.inference_mode against torch.no_grad for evaluation sampling (evaluate.draw uses no_grad).

inference_mode also skips view tracking and version counters. Both variants run the same draw (the recipe's
network with fresh weights, the evaluation's chunking), interleaved round by round in one process; CPU-time
medians. Usage (repository root; ~2 minutes): OMP_NUM_THREADS=1 python benchmarks/inference_mode.py [--rounds 5]
"""
import argparse
import os
import statistics
import time

import torch

from distillrun.denoiser import NetDenoiser
from distillrun.nets.mlp import TimeMLP
from distillrun.nets.unet import SmallUNet
from distillrun.samplers import sample, uniform_grid
from distillrun.schedule import Schedule

CHUNK = 2048  # evaluate.CHUNK


def draw(net, noise, steps, mode):
    with mode():
        return torch.cat([sample(net, noise[i:i + CHUNK], uniform_grid(steps)) for i in range(0, len(noise), CHUNK)])


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--threads", type=int, default=1)
    p.add_argument("--rounds", type=int, default=5)
    a = p.parse_args()
    torch.set_num_threads(a.threads)
    torch.manual_seed(0)
    sch = Schedule("cosine")
    cases = {"mlp 931k, DDIM 32 steps, 4096 samples": (NetDenoiser(TimeMLP(2), "v", sch), torch.randn(4096, 2), 32),
             "unet 518k, DDIM 8 steps, 1000 images": (NetDenoiser(SmallUNet(1, 16), "v", sch).to(
                 memory_format=torch.channels_last), torch.randn(1000, 1, 16, 16), 8)}
    print(f"torch {torch.__version__}, {a.threads} thread(s), {a.rounds} rounds, load average at start "
          f"{os.getloadavg()[0]:.2f}; CPU-time medians, interleaved")
    print(f"{'scenario':>40} {'no_grad ms':>10} {'inference_mode ms':>17} {'speed-up':>8} {'identical':>9}")
    for name, (net, noise, steps) in cases.items():
        net.requires_grad_(False)
        same = torch.equal(draw(net, noise, steps, torch.no_grad), draw(net, noise, steps, torch.inference_mode))
        ms = {torch.no_grad: [], torch.inference_mode: []}
        for r in range(a.rounds):
            for mode in (list(ms) if r % 2 == 0 else list(ms)[::-1]):
                c0 = time.process_time()
                draw(net, noise, steps, mode)
                ms[mode].append(1e3 * (time.process_time() - c0))
        base, new = (statistics.median(v) for v in ms.values())
        print(f"{name:>40} {base:>10.1f} {new:>17.1f} {base / new:>8.2f} {str(same):>9}", flush=True)
    print(f"load average at end {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
