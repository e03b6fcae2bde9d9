"""Calibration on known mixtures: what damage does each quality metric detect at the default evaluation size?

Exact samples of the archipelago mixture (the default recipe's data, density known) are damaged in graded amounts
and scored by the pipeline's own evaluation (`evaluate.quality`) against an exact reference set, next to an undamaged
exact set that plays the teacher. Damage:
  off      a share of the points moved off the manifold: replaced by points drawn uniformly in the data's bounding
           box (widened by 10%) where the density is below that of 99.9% of the data
  drop     a dropped mode: island 2 of the mixture re-weighted to w (the other islands share 1 - w in their default
           proportions), and the damaged set draws no point from it (its share goes to the other islands)
  noise    every point blurred by Gaussian noise of sd s times the data's sd per axis
For every metric and grade: seen = (worsening against the exact set) / (combined se), as the stop rule computes it.
A metric detects a grade when seen >= z (default 2) in every repetition. The default stop rule's verdict (stop.panel
with its tolerances) is reported too: the smallest grade it flags `over` in every repetition.
Also: standard-error calibration, the spread of each metric over repeated exact sets against its mean reported se.

Usage (repository root):  OMP_NUM_THREADS=1 python benchmarks/calibration.py [--samples 4096] [--reps 3]
                                 [--out calibration.json]
Prints a markdown table (the one in benchmarks/README.md and README.md).
"""
from __future__ import annotations

import argparse
import json
import math
import sys
import time

import torch

from distillrun import evaluate, metrics, stopping
from distillrun.config import PANEL_DEFAULT, StopConfig
from distillrun.data.mixture import GaussianMixture, archipelago
from distillrun.metric_props import METRIC_PROPS

GRADES = {"off": [0.005, 0.01, 0.02, 0.05, 0.1, 0.2],
          "drop": [0.01, 0.02, 0.05, 0.08, 0.12],
          "noise": [0.01, 0.02, 0.05, 0.1, 0.2]}
DROPPED_ISLAND = 1  # the small round island (weight 0.08 in the default mixture)
METRICS = ["sw2", "mmd2", "mmd2_div4", "mmd2_div16", "precision", "recall", "density", "coverage", "c2st", "nll_gap"]


def reweighted(w: float) -> GaussianMixture:
    base = archipelago()
    weights = base.weights.clone()
    weights[DROPPED_ISLAND] = 0.0
    weights = weights / weights.sum() * (1 - w)
    weights[DROPPED_ISLAND] = w
    return GaussianMixture(weights, base.means, base.covs)


def off_manifold(mix: GaussianMixture, n: int, g: torch.Generator, threshold: float) -> torch.Tensor:
    """n points uniform in the data's widened bounding box where log p < threshold."""
    ref, _ = mix.sample(20000, g)
    lo, hi = ref.min(0).values, ref.max(0).values
    lo, hi = lo - 0.1 * (hi - lo), hi + 0.1 * (hi - lo)
    out = []
    while sum(len(o) for o in out) < n:
        u = lo + (hi - lo) * torch.rand(4 * n + 16, 2, generator=g)
        out.append(u[mix.log_prob(u) < threshold])
    return torch.cat(out)[:n].float()


def damaged(kind: str, grade: float, n: int, seed: int) -> tuple[GaussianMixture, torch.Tensor]:
    """(the mixture the reference and the exact set come from, a damaged sample set of n points)."""
    g = torch.Generator().manual_seed(10_000 + seed)
    if kind == "drop":
        mix = reweighted(grade)
        x, labels = mix.sample(n, g)
        keep = x[labels != DROPPED_ISLAND]
        refill, lab2 = mix.sample(4 * n, g)
        refill = refill[lab2 != DROPPED_ISLAND][: n - len(keep)]
        return mix, torch.cat([keep, refill])[torch.randperm(n, generator=g)]
    mix = archipelago()
    x, _ = mix.sample(n, g)
    if kind == "off":
        k = int(round(grade * n))
        threshold = float(torch.quantile(mix.log_prob(mix.sample(20000, g)[0]), 0.001))
        x[:k] = off_manifold(mix, k, g, threshold)
    elif kind == "noise":
        x = x + grade * mix.std().float() * torch.randn(x.shape, generator=g)
    return mix, x


def bench_for(mix: GaussianMixture, n: int, seed: int) -> evaluate.Bench:
    """The pipeline's Bench for exact data of `mix`: reference set, projections, median bandwidth, entropy."""
    g = torch.Generator().manual_seed(seed)
    reference, _ = mix.sample(n, g)
    b = evaluate.Bench(None, None, reference, None, metrics.random_projections(2, 128, seed),
                       metrics.median_bandwidth(reference, reference, seed=seed), 30, seed, mixture=mix)
    b.entropy = mix.entropy(200_000, seed)
    return b


def seen(q: dict, exact: dict, m: str, z: float) -> float:
    return stopping.judge(q, exact, m, 0.0, "absolute", z).seen


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    p.add_argument("--samples", type=int, default=4096)
    p.add_argument("--reps", type=int, default=3)
    p.add_argument("--se-reps", type=int, default=8, help="exact sets for the standard-error calibration")
    p.add_argument("--z", type=float, default=2.0)
    p.add_argument("--out", default=None)
    args = p.parse_args(argv)
    torch.set_num_threads(1)
    n, z = args.samples, args.z
    stop = StopConfig(z=args.z)
    rows = {}  # (kind, grade) -> list over reps of {metric: seen} plus "panel" verdicts
    t0 = time.perf_counter()
    calls = 0
    for kind, grades in GRADES.items():
        for rep in range(args.reps):
            seed = 100 * rep + 1
            mix_cache = {}
            for grade in grades:
                mix, x = damaged(kind, grade, n, seed + int(grade * 1e4))
                key = (kind, round(float(mix.weights[DROPPED_ISLAND]), 4)) if kind == "drop" else (kind, None)
                if key not in mix_cache:  # reference and exact set of this mixture, scored once per rep
                    bench = bench_for(mix, n, seed)
                    exact_x, _ = mix.sample(n, torch.Generator().manual_seed(seed + 7))
                    mix_cache[key] = (bench, evaluate.quality(bench, exact_x))
                    calls += 1
                bench, exact = mix_cache[key]
                q = evaluate.quality(bench, x)
                calls += 1
                entry = {m: seen(q, exact, m, z) for m in METRICS}
                verdict = stopping.judge_rule(q, exact, stop)
                entry["panel"], entry["decided_by"] = verdict.verdict, verdict.metric
                entry["values"] = {m: (q[m], exact[m]) for m in METRICS}
                rows.setdefault(f"{kind}:{grade}", []).append(entry)
            print(f"{kind} rep {rep}: {time.perf_counter() - t0:.0f} s", file=sys.stderr, flush=True)
    # standard-error calibration on exact sets
    mix = archipelago()
    bench = bench_for(mix, n, 1)
    vals = {m: [] for m in METRICS}
    ses = {m: [] for m in METRICS}
    for r in range(args.se_reps):
        q = evaluate.quality(bench, mix.sample(n, torch.Generator().manual_seed(500 + r))[0])
        calls += 1
        for m in METRICS:
            vals[m].append(q[m])
            ses[m].append(q[f"{m}_se"])
    se_cal = {m: {"spread": float(torch.tensor(vals[m]).std()), "mean_se": sum(ses[m]) / len(ses[m]),
                  "mean": sum(vals[m]) / len(vals[m])} for m in METRICS}
    seconds = time.perf_counter() - t0
    # the table
    print(f"\nCalibration at n = {n} samples, z = {z:g}, {args.reps} repetitions "
          f"({calls} evaluations in {seconds:.0f} s, {seconds / calls:.2f} s each, 1 thread)\n")
    head = ["metric"] + [f"{k}: smallest detected" for k in GRADES] + ["se / spread (exact sets)"]
    print("| " + " | ".join(head) + " |")
    print("|" + " --- |" * len(head))

    def smallest(kind, test):
        for grade in GRADES[kind]:
            if all(test(e) for e in rows[f"{kind}:{grade}"]):
                return grade
        return None

    def fmt(kind, grade):
        if grade is None:
            return "not at " + f"{GRADES[kind][-1]:g}"
        return f"{grade:g}"

    for m in METRICS:
        cells = []
        for kind in GRADES:
            g_min = smallest(kind, lambda e: e[m] >= z)
            med = [sorted(e[m] for e in rows[f"{kind}:{gr}"])[len(rows[f"{kind}:{gr}"]) // 2] for gr in GRADES[kind]]
            cells.append(f"{fmt(kind, g_min)} (seen {', '.join(f'{v:.1f}' for v in med)})")
        c = se_cal[m]
        ratio = c["mean_se"] / c["spread"] if c["spread"] > 0 else math.nan
        print(f"| {m} | " + " | ".join(cells) + f" | {ratio:.2f} |")
    cells = []
    for kind in GRADES:
        g_min = smallest(kind, lambda e: e["panel"] == stopping.OVER)
        deciders = sorted({e["decided_by"] for gr in GRADES[kind] for e in rows[f"{kind}:{gr}"] if e["panel"] == "over"})
        cells.append(f"{fmt(kind, g_min)} (over by {', '.join(deciders) or '-'})")
    print(f"| **default rule** ({' + '.join(PANEL_DEFAULT)}, tolerance {stopping.tolerance_of(stop):g}) | " + " | ".join(cells)
          + " | |")
    print("\ngrades: off = share of points moved off the manifold " + str(GRADES["off"]) +
          "; drop = weight of the dropped island " + str(GRADES["drop"]) +
          "; noise = blur sd in units of the data's sd " + str(GRADES["noise"]))
    print("seen = median over repetitions, per grade in that order; se / spread: mean reported se over the std of the "
          "metric across exact sets (1 = calibrated, > 1 conservative)")
    if args.out:
        with open(args.out, "w") as f:
            json.dump({"samples": n, "z": z, "reps": args.reps, "rows": rows, "se_calibration": se_cal,
                       "seconds": seconds, "panel": list(stop.panel), "tolerance": stopping.tolerance_of(stop),
                       "higher_better": {m: METRIC_PROPS[m].higher_better for m in METRICS}}, f, indent=1)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
