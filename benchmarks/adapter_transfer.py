"""Does a speed adapter transfer to a fine-tuned version of its teacher? Measured, not assumed.

The claim tested (latent consistency distillation, Luo et al. 2023: an acceleration adapter learned on one
teacher speeds up fine-tuned versions of it): distil adapter students from the original teacher; fine-tune that
teacher on a shifted variant of the data; put the original speed adapter on the fine-tuned teacher; score it.

Steps (all through the package, each run folder kept under --out):
  1. original/   distillrun with adapter students on the six-island mixture (the default job, adapter=lowrank)
  2. data.name=archipelago_moved: the same mixture with two islands moved (a data shift a user's fine-tuning
                 might make; its density is known too)
  3. finetuned/  the original teacher trained further on the moved data (same loss and schedule; lower LR);
                 saved as a user teacher (weights + factory distillrun.nets:build_net)
  4. direct/     distillrun on the moved data with the fine-tuned teacher imported and adapter students distilled
                 from it directly: its reference gives (a) the fine-tuned teacher at full steps, its baselines
                 (b) the fine-tuned teacher's own DDIM at each student's steps, its students (c)
  5. transfer    each stage adapter of original/ applied to the fine-tuned teacher (allow_other_base, scale 1;
                 also scale --scale-sweep), sampled at the stage's steps on direct/'s noise bank and scored
                 against the moved data with direct/'s metrics.

Prints one table per step count: (transfer), (a), (b), (c), and the original adapter on its own teacher scored
against the moved data (what the adapter does without the fine-tuned weights: the "no transfer" floor).

Usage (repository root; shortened settings are passed to both distillation runs with --set):
    python benchmarks/adapter_transfer.py [--out /tmp/adapter-transfer] [--rank 8] [--finetune-iterations 800]
                                          [--set method.iterations=150 ...]
"""
from __future__ import annotations

import argparse
import copy
import json
import os
import shutil
import sys
import time
from pathlib import Path

os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")

def compose_cfg(overrides: list[str]):
    from hydra import compose, initialize_config_module

    from distillrun.config import register_configs, validate

    register_configs()
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        cfg = compose("run", overrides=["tracking=off", "quiet=true", *overrides])
    validate(cfg)
    return cfg


def run(overrides: list[str]) -> tuple[object, dict]:
    from distillrun import pipeline
    from distillrun.recorder import recorder_for

    cfg = compose_cfg(overrides)
    with recorder_for(cfg) as rec:
        return cfg, pipeline.run(cfg, rec, "adapter_transfer")


def finetune(teacher_dir: Path, data_x, iterations: int, lr: float, seed: int, out: Path):
    """Train the original teacher further on the moved data; save it as a user teacher (net weights + factory)."""
    import torch

    from distillrun import checkpoint, teachers
    from distillrun.data import Dataset
    from distillrun.denoiser import NetDenoiser
    from distillrun.methods.teacher import denoising_loss
    from distillrun.schedule import Schedule
    from distillrun.training import LoopSpec, train_loop

    state, meta = checkpoint.load_model_files(teacher_dir)
    net = teachers.rebuild_network(meta["net"])
    den = NetDenoiser(net, meta["parameterization"], Schedule(meta["schedule"]))
    den.load_state_dict(state)
    data = Dataset("moved", data_x)
    spec = LoopSpec(iterations=iterations, lr=lr, warmup=0, decay="cosine", grad_clip=1.0, ema_decay=0.999,
                    save_every=10 ** 9)
    t0 = time.perf_counter()
    result = train_loop(den, denoising_loss, data.batches(512, "cpu"), spec,
                        generator=torch.Generator().manual_seed(seed), quiet=True)
    if result.failed:
        raise SystemExit(f"fine-tuning failed: {result.failed}")
    out.mkdir(parents=True, exist_ok=True)
    checkpoint.atomic_save_tensors(out / "weights.safetensors", result.model.net.state_dict())
    a = meta["net"]
    kwargs = {"kind": a["kind"], "data_shape": a["data_shape"], "num_classes": a["num_classes"], **a["kwargs"]}
    (out / "factory.json").write_text(json.dumps(kwargs))
    return kwargs, time.perf_counter() - t0, result.losses[-1]


def main() -> None:
    from omegaconf import OmegaConf

    from distillrun import adapters, checkpoint, evaluate, pipeline
    from distillrun.denoiser import NetDenoiser
    from distillrun.samplers import sample, uniform_grid
    from distillrun.schedule import Schedule

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=Path("/tmp/distillrun-adapter-transfer"))
    ap.add_argument("--rank", type=int, default=8)
    ap.add_argument("--finetune-iterations", type=int, default=800)
    ap.add_argument("--finetune-lr", type=float, default=5e-4)
    ap.add_argument("--scale-sweep", type=float, nargs="*", default=[0.5, 1.5])
    ap.add_argument("--set", nargs="*", default=[], metavar="KEY=VALUE")
    args = ap.parse_args()
    out = args.out
    out.mkdir(parents=True, exist_ok=True)
    common = ["stop.tolerance=1000", "adapter=lowrank", f"adapter.rank={args.rank}", *args.set]
    load0 = os.getloadavg()[0]

    # 1. adapter students on the original teacher
    cfg_o, sum_o = run([f"run_dir={out / 'original'}", *common])
    # 2. the shifted data (same size and seed as the original's)
    moved = pipeline.load_data(OmegaConf.merge(cfg_o, {"data": {"name": "archipelago_moved"}})).x
    # 3. fine-tuned teacher
    ft = out / "finetuned"
    if not (ft / "weights.safetensors").exists():
        kwargs, ft_seconds, ft_loss = finetune(out / "original" / "teacher", moved, args.finetune_iterations,
                                               args.finetune_lr, 11, ft)
    kwargs = json.loads((ft / "factory.json").read_text())
    # 4. adapter students distilled directly from the fine-tuned teacher, on the moved data
    imported = ["teacher=import", "teacher.factory=distillrun.nets:build_net", f"teacher.weights={ft / 'weights.safetensors'}",
                *[f"+teacher.factory_kwargs.{k}={json.dumps(v).replace(' ', '')}" for k, v in kwargs.items()],
                "data=archipelago_moved", f"teacher.steps={cfg_o.teacher.steps}"]
    cfg_d, sum_d = run([f"run_dir={out / 'direct'}", *common, *imported])
    # 5. transfer: the original's stage adapters on the fine-tuned teacher, on direct/'s bench
    data = pipeline.load_data(cfg_d)
    bench = evaluate.make_bench(data, cfg_d.eval.samples, cfg_d.eval.projections, cfg_d.eval.bootstrap, cfg_d.eval.seed,
                               cond_needed=False)
    metric = sum_d["stop_metric"]

    def build(weights_state):
        from distillrun.nets import build_net

        net = build_net(**kwargs)
        net.load_state_dict(weights_state)
        return net.requires_grad_(False)

    ft_state = checkpoint.read_tensors(ft / "weights.safetensors")
    orig_state = {k[4:]: v for k, v in checkpoint.load_model_files(out / "original" / "teacher")[0].items()}
    sch = Schedule(cfg_o.teacher.schedule)
    param = cfg_o.teacher.parameterization

    def score(net, steps):
        den = NetDenoiser(adapters.merged_copy(net), param, sch)
        x = evaluate.draw(lambda noise, cond: sample(den, noise, uniform_grid(steps), "ddim"), bench)
        q = evaluate.quality(bench, x)
        return q[metric], q.get(f"{metric}_se", float("nan"))

    direct = {r["steps"]: r for r in sum_d["stages"] if r["metrics"]}
    ref = sum_d["reference"]["teacher"]
    lines = [f"load average {load0:.1f} -> {os.getloadavg()[0]:.1f}; settings {args.set}; rank {args.rank}; "
             f"fine-tune {args.finetune_iterations} iterations at lr {args.finetune_lr}",
             f"(a) fine-tuned teacher at {cfg_o.teacher.steps} steps: {metric} {ref[metric]:.4g} ± {ref[metric + '_se']:.2g}",
             f"| steps | transfer (scale 1) | " + " | ".join(f"transfer (scale {s:g})" for s in args.scale_sweep) +
             f" | (b) fine-tuned DDIM | (c) direct adapter student | original adapter on original teacher |",
             "|---" * (5 + len(args.scale_sweep)) + "|"]
    result = []
    for r in sum_o["stages"]:
        if not r["metrics"] or r["steps"] not in direct:
            continue
        folder = out / "original" / f"stage-{r['index']:02d}"
        state, meta = checkpoint.load_model_files(folder)
        ad = adapters.Adapter.from_payload(state, meta["adapter"], str(folder))
        cells = {}
        for s in [1.0, *args.scale_sweep]:
            cells[s] = score(ad.apply(build(ft_state), scale=s, allow_other_base=True), r["steps"])
        none = score(ad.apply(build(orig_state)), r["steps"])
        d = direct[r["steps"]]["metrics"]
        row = {"steps": r["steps"], "transfer": cells, "ddim": (d[f"baseline/{metric}"], d.get(f"baseline/{metric}_se")),
               "direct": (d[f"quality/{metric}"], d.get(f"quality/{metric}_se")), "original_adapter": none}
        result.append(row)
        pm = lambda v: f"{v[0]:.4g} ± {v[1]:.2g}"  # noqa: E731
        lines.append(f"| {r['steps']} | {pm(cells[1.0])} | " + " | ".join(pm(cells[s]) for s in args.scale_sweep) +
                     f" | {pm(row['ddim'])} | {pm(row['direct'])} | {pm(none)} |")
    print("\n".join(lines))
    (out / "transfer.json").write_text(json.dumps({"metric": metric, "reference": ref, "rows": [
        {**row, "transfer": {str(k): v for k, v in row["transfer"].items()}} for row in result]}, indent=2))
    (out / "transfer.md").write_text("\n".join(lines) + "\n")


if __name__ == "__main__":
    sys.exit(main())
