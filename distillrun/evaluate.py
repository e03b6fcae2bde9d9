"""Per-stage evaluation: quality against the data, divergence from the teacher on a fixed noise bank,
the teacher's own DDIM at the same step count as a baseline, and the floor of every metric.

Every metric is reported with a standard error so the stop rule can tell a real loss from noise.
Names (used in the run folder, MLflow and the README): quality/<m>, quality/<m>_se, baseline/<m>,
floor/<m>, teacher/<m> for m in sw2, mmd2, fd (images), nll_gap, mode_tv, modes_dropped (mixture);
divergence/teacher_{rms,median,p90,switch} and divergence/stage_teacher_{...}.
"""
from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Callable

import torch

from . import metrics
from .data import Dataset

CHUNK = 2048  # samples per sampler call: bounds memory for image nets


@dataclass
class Bench:
    """Everything fixed for a run's evaluation: noise bank, data reference, projections, kernel width."""

    noise: torch.Tensor  # (n, *shape), the same starting noise for every model and stage
    cond: torch.Tensor | None  # (n,) labels for class-conditional models
    reference: torch.Tensor  # n data points scored against
    floor_set: torch.Tensor  # n more data points: the metric's value for exact data (the floor)
    projections: torch.Tensor
    bandwidth: float
    bootstrap: int
    seed: int
    mixture: object = None
    entropy: float | None = None
    feature_net: torch.nn.Module | None = None
    reference_feats: torch.Tensor | None = None
    cache: dict = field(default_factory=dict)  # "teacher@256" -> samples, reused across stages
    reference_within: float | None = None  # MMD^2's reference-only kernel term, computed once per run


def make_bench(data: Dataset, samples: int, projections: int, bootstrap: int, seed: int,
               cond_needed: bool) -> Bench:
    g = torch.Generator().manual_seed(seed)
    noise = torch.randn((samples, *data.shape), generator=g)
    cond = None
    if cond_needed:
        cond = data.labels[torch.randint(0, len(data.labels), (samples,), generator=g)]
    reference, floor_set = data.reference(samples, seed + 1), data.reference(samples, seed + 2)
    if data.mixture is None and floor_set is reference:
        # Finite data smaller than the bank: the floor compares a bootstrap resample with the data.
        floor_set = data.x[torch.randint(0, data.x.shape[0], (data.x.shape[0],), generator=g)]
    bench = Bench(noise, cond, reference, floor_set, None, 0.0, bootstrap, seed, mixture=data.mixture)
    if data.mixture is not None:
        bench.entropy = data.mixture.entropy(200_000, seed)
    if data.is_image:
        from .features import feature_net_for, features
        bench.feature_net = feature_net_for(data.x, data.labels, seed=seed)
        bench.reference_feats = features(bench.feature_net, reference)
    dim = bench.reference_feats.shape[1] if data.is_image else reference[0].numel()
    bench.projections = metrics.random_projections(dim, projections, seed)
    ref = bench.reference_feats if data.is_image else reference
    bench.bandwidth = metrics.median_bandwidth(ref, ref, seed=seed)
    return bench


@torch.no_grad()
def draw(sample_fn: Callable, bench: Bench) -> torch.Tensor:
    """sample_fn(noise, cond) over the noise bank in chunks."""
    out = []
    for i in range(0, bench.noise.shape[0], CHUNK):
        cond = bench.cond[i:i + CHUNK] if bench.cond is not None else None
        out.append(sample_fn(bench.noise[i:i + CHUNK], cond).detach().float().cpu())
    return torch.cat(out)


def quality(bench: Bench, x: torch.Tensor) -> dict[str, float]:
    """Quality of samples x against the data reference, each with a standard error."""
    out: dict[str, float] = {}
    if not torch.isfinite(x).all():
        return {"sw2": float("nan"), "sw2_se": float("nan")}
    feats = x
    if bench.feature_net is not None:
        from .features import features
        feats = features(bench.feature_net, x)
        out["fd"] = metrics.frechet_from_features(feats, bench.reference_feats)
        out["fd_se"] = metrics.bootstrap_se(metrics.frechet_from_features, feats, bench.reference_feats,
                                            reps=bench.bootstrap, seed=bench.seed)
    ref = bench.reference_feats if bench.feature_net is not None else bench.reference
    out["sw2"], out["sw2_se"] = metrics.sliced_w2_bootstrap(feats, ref, bench.projections, reps=bench.bootstrap,
                                                            seed=bench.seed)
    if bench.reference_within is None:
        bench.reference_within = metrics.kernel_mean_within(ref, bench.bandwidth)
    out["mmd2"] = metrics.mmd2_rbf(feats, ref, bench.bandwidth, within_y=bench.reference_within)
    out["mmd2_se"] = metrics.mmd2_block_se(feats, ref, bench.bandwidth, seed=bench.seed)
    if bench.mixture is not None:
        gap = metrics.nll_gap(bench.mixture.log_prob, x, bench.entropy)
        out["nll_gap"], out["nll_gap_se"] = gap["gap"], gap["se"]
        cov = metrics.mode_coverage(bench.mixture.responsibilities(x), bench.mixture.weights)
        out["mode_tv"], out["modes_dropped"] = cov["tv"], float(cov["dropped"])
    return out


def mode_labels(bench: Bench, x: torch.Tensor) -> torch.Tensor | None:
    if bench.mixture is not None:
        return bench.mixture.responsibilities(x).argmax(1)
    return None


def divergence(bench: Bench, student: torch.Tensor, teacher: torch.Tensor, name: str) -> dict[str, float]:
    """divergence/<name>_{rms,median,p90,switch}: same-noise distances between student and teacher samples."""
    ls, lt = mode_labels(bench, student), mode_labels(bench, teacher)
    d = metrics.divergence(student, teacher, ls, lt)
    out = {f"divergence/{name}_{k}": d[k] for k in ("rms", "median", "p90")}
    if "switch_share" in d:
        out[f"divergence/{name}_switch"] = d["switch_share"]
    return out


def prefixed(prefix: str, values: dict[str, float]) -> dict[str, float]:
    return {f"{prefix}/{k}": v for k, v in values.items()}


def cached_draw(bench: Bench, key: str, sample_fn: Callable) -> tuple[torch.Tensor, float]:
    """Samples for `key` (e.g. 'teacher@16'), drawn once per run; returns (samples, seconds spent now)."""
    if key in bench.cache:
        return bench.cache[key], 0.0
    t0 = time.perf_counter()
    bench.cache[key] = draw(sample_fn, bench)
    return bench.cache[key], time.perf_counter() - t0
