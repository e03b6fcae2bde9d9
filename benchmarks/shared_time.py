"""Sampling with the time embedding computed once per step (all rows share t) against once per row.

Samplers pass one time for the whole batch as a stride-0 expanded tensor; the nets then embed it once and
broadcast the (1, width) embedding (denoiser.shared_time). The baseline switches that off (every row embeds its
own copy of t), in the same process, interleaved round by round. For the MLP the shared part is the time MLP and
every block's embedding projection: about a third of the multiply-adds per row.

Usage (repository root; ~2 minutes): OMP_NUM_THREADS=1 python benchmarks/shared_time.py [--threads 1] [--rounds 5]
"""
import argparse
import contextlib
import os
import statistics
import time

import torch

import distillrun.methods.consistency as consistency_mod
import distillrun.nets.mlp as mlp_mod
from distillrun.denoiser import NetDenoiser
from distillrun.methods.consistency import ConsistencyModel, consistency_sample
from distillrun.nets.mlp import TimeMLP
from distillrun.nets.unet import SmallUNet
from distillrun.samplers import sample, uniform_grid
from distillrun.schedule import Schedule


@contextlib.contextmanager
def per_row_time():
    """The baseline: every row embeds its own t."""
    saved = mlp_mod.shared_time, consistency_mod.shared_time
    mlp_mod.shared_time = consistency_mod.shared_time = lambda t: False
    try:
        yield
    finally:
        mlp_mod.shared_time, consistency_mod.shared_time = saved


def scenarios():
    torch.manual_seed(0)
    sch = Schedule("cosine")
    mlp = NetDenoiser(TimeMLP(2, width=256, depth=4), "v", sch).requires_grad_(False)  # the 2D recipes' net
    unet = NetDenoiser(SmallUNet(1, 16, base=32), "v", sch).requires_grad_(False).to(
        memory_format=torch.channels_last)  # the digits recipes' net, as fast_layout runs it
    cm = ConsistencyModel(NetDenoiser(TimeMLP(2, width=256, depth=4), "v", sch), 0.5, 0.002).requires_grad_(False)
    x2, x16 = torch.randn(4096, 2), torch.randn(512, 1, 16, 16)
    return {
        "mlp 931k, DDIM 64 steps, 4096 samples": lambda: sample(mlp, x2, uniform_grid(64)),
        "mlp 931k, DDIM 4 steps, 4096 samples": lambda: sample(mlp, x2, uniform_grid(4)),
        "consistency mlp, 4 steps, 4096 samples": lambda: consistency_sample(
            cm, x2, [20.0, 0.8, 0.4, 0.2], torch.Generator().manual_seed(0)),
        "unet 518k, DDIM 16 steps, 512 images": lambda: sample(unet, x16, uniform_grid(16)),
    }


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--threads", type=int, default=1)
    p.add_argument("--rounds", type=int, default=5)
    a = p.parse_args()
    torch.set_num_threads(a.threads)
    print(f"torch {torch.__version__}, {a.threads} thread(s), {a.rounds} rounds, load average at start "
          f"{os.getloadavg()[0]:.2f}; CPU-time medians, variants interleaved")
    print(f"{'scenario':>40} {'per-row ms':>10} {'shared ms':>9} {'speed-up':>8} {'max |diff|':>10}")
    for name, fn in scenarios().items():
        with per_row_time():
            ref = fn()
        got = fn()
        times = {"per-row": [], "shared": []}
        for r in range(a.rounds):
            for label in (("per-row", "shared") if r % 2 == 0 else ("shared", "per-row")):
                ctx = per_row_time() if label == "per-row" else contextlib.nullcontext()
                with ctx:
                    c0 = time.process_time()
                    fn()
                    times[label].append(1e3 * (time.process_time() - c0))
        base, new = statistics.median(times["per-row"]), statistics.median(times["shared"])
        print(f"{name:>40} {base:>10.1f} {new:>9.1f} {base / new:>8.2f} {(got - ref).abs().max().item():>10.1e}",
              flush=True)
    print(f"load average at end {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
