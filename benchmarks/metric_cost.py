"""What the stop rule's new metrics cost: one stage's scoring with and without them, interleaved, as a ratio.

Both sides score the same exact archipelago sample set against the same reference, at the default evaluation size,
in one process, alternating which goes first:
  before   the metrics scored before the panel existed: sw2 (bootstrap se), mmd2 at the median bandwidth (block se),
           nll_gap, mode coverage
  now      evaluate.quality as the pipeline calls it: the above plus mmd2 at 1/4 and 1/16 of the median bandwidth,
           k-NN precision/recall/density/coverage and the classifier two-sample test
Also each new metric alone. Run-once costs (the reference's k-NN radii and kernel sums) are paid before timing, as in
a run. Reported: median seconds of each over the repeats, the ratio now / before, and the machine load (uptime).

Usage (repository root):  python benchmarks/metric_cost.py [--samples 4096] [--repeats 5] [--threads 2]
A stage's share of training follows from a run folder's records: `--run RUN_DIR` prints eval / train per stage.
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import time
from pathlib import Path

import torch

from distillrun import evaluate, metrics
from distillrun.data.mixture import archipelago


def before(bench: evaluate.Bench, x: torch.Tensor) -> dict:
    out = {}
    ref = bench.reference
    out["sw2"], out["sw2_se"] = metrics.sliced_w2_bootstrap(x, ref, bench.projections, reps=bench.bootstrap,
                                                            seed=bench.seed)
    within = bench.cache.setdefault("within1", metrics.kernel_mean_within(ref, bench.bandwidth))
    out["mmd2"] = metrics.mmd2_rbf(x, ref, bench.bandwidth, within_y=within)
    out["mmd2_se"] = metrics.mmd2_block_se(x, ref, bench.bandwidth, seed=bench.seed)
    gap = metrics.nll_gap(bench.mixture.log_prob, x, bench.entropy)
    out["nll_gap"] = gap["gap"]
    out["mode_tv"] = metrics.mode_coverage(bench.mixture.responsibilities(x), bench.mixture.weights)["tv"]
    return out


def timed(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def stage_shares(run_dir: Path) -> None:
    print(f"\nevaluation against training per stage, {run_dir}:")
    print("| stage | steps | train s | eval s | eval / train |\n| --- | --- | --- | --- | --- |")
    tot_t = tot_e = 0.0
    for f in sorted(run_dir.glob("stage-*/metrics.json")):
        r = json.loads(f.read_text())
        t, e = r["seconds"]["train"], r["seconds"]["eval"]
        tot_t, tot_e = tot_t + t, tot_e + e
        print(f"| {r['index']} | {r['steps']} | {t:.1f} | {e:.1f} | {e / t:.1%} |")
    if tot_t:
        print(f"| all | | {tot_t:.1f} | {tot_e:.1f} | {tot_e / tot_t:.1%} |")


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--samples", type=int, default=4096)
    p.add_argument("--repeats", type=int, default=5)
    p.add_argument("--threads", type=int, default=2)
    p.add_argument("--run", type=Path, default=None)
    args = p.parse_args(argv)
    torch.set_num_threads(args.threads)
    mix = archipelago()
    g = torch.Generator().manual_seed(0)
    ref, _ = mix.sample(args.samples, g)
    x, _ = mix.sample(args.samples, g)
    bench = evaluate.Bench(None, None, ref, None, metrics.random_projections(2, 128, 1234),
                           metrics.median_bandwidth(ref, ref, seed=1234), 30, 1234, mixture=mix)
    bench.entropy = mix.entropy(200_000, 0)
    evaluate.quality(bench, x), before(bench, x)  # warm-up: imports, run-once reference terms
    widths = [bench.bandwidth] + [bench.bandwidth / d for d in evaluate.MMD_DIVISORS]
    parts = {
        "mmd2 at 3 widths (value + block se)": lambda: (metrics.mmd2_multiscale(x, ref, widths, bench.reference_within),
                                                       metrics.mmd2_multiscale_block_se(x, ref, widths)),
        "mmd2 at the median width (value + block se)": lambda: (
            metrics.mmd2_rbf(x, ref, bench.bandwidth, within_y=bench.cache["within1"]),
            metrics.mmd2_block_se(x, ref, bench.bandwidth)),
        "precision/recall/density/coverage": lambda: metrics.manifold_metrics(ref, x, real_radii=bench.reference_radii),
        "classifier two-sample test": lambda: metrics.classifier_two_sample(x, ref, seed=1234),
        "sw2 (bootstrap se)": lambda: metrics.sliced_w2_bootstrap(x, ref, bench.projections, reps=30, seed=1234),
    }
    times = {"before": [], "now": []}
    part_times = {k: [] for k in parts}
    for r in range(args.repeats):
        order = ["before", "now"] if r % 2 == 0 else ["now", "before"]
        for side in order:
            times[side].append(timed(lambda: before(bench, x) if side == "before" else evaluate.quality(bench, x)))
        for k, fn in parts.items():
            part_times[k].append(timed(fn))
    load = os.getloadavg()
    med = {k: statistics.median(v) for k, v in times.items()}
    print(f"n = {args.samples}, {args.threads} threads, {args.repeats} interleaved repeats, load average "
          f"{load[0]:.1f} / {load[1]:.1f} / {load[2]:.1f} (1/5/15 min)")
    print("| scoring of one sample set | median s |\n| --- | --- |")
    print(f"| before (sw2, mmd2, nll_gap, mode coverage) | {med['before']:.3f} |")
    print(f"| now (evaluate.quality) | {med['now']:.3f} |")
    print(f"| ratio now / before | {med['now'] / med['before']:.2f} |")
    for k, v in part_times.items():
        print(f"| {k} | {statistics.median(v):.3f} |")
    if args.run:
        stage_shares(args.run)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
