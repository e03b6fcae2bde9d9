"""Adapter students against full students: trainable parameters, saved file size, quality and time per stage.

For each recipe, one teacher is trained (or reused) and then distilled twice with the same seed and settings:
once with full students (every weight trains and is saved) and once with adapter students (adapter=lowrank:
only the low-rank factors train and are saved). The teacher folder of the first run is copied into the second,
so both start from the same teacher bit for bit. Both runs go through the real pipeline (distillrun.pipeline.run)
in this process, one after the other, so a timing ratio under load is only as good as the load was steady: the
load average is printed next to the numbers.

Per stage it prints: steps, the stop metric of the full and the adapter student (± standard error), the teacher's
own DDIM at those steps, trainable parameters (adapter / full), saved bytes (adapter / full) and training seconds.

Usage (repository root):
    python benchmarks/adapters.py [--recipe archipelago_progressive] [--rank 8] [--out /tmp/adapters]
                                  [--set key=value ...]      # shortened settings, e.g. method.iterations=150
"""
from __future__ import annotations

import argparse
import json
import os
import shutil
import sys
import time
from pathlib import Path

os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")


def run(recipe: str, run_dir: Path, overrides: list[str], teacher_from: Path | None = None) -> dict:
    """One pipeline run; with teacher_from, a new run folder starts with that run's trained teacher (its
    config.yaml written first, as the run itself would write it, so the folder is taken as this run's)."""
    from hydra import compose, initialize_config_module
    from omegaconf import OmegaConf

    from distillrun import pipeline
    from distillrun.config import register_configs, validate
    from distillrun.recorder import recorder_for

    register_configs()
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        cfg = compose("run", overrides=[f"recipe={recipe}", f"run_dir={run_dir}", "tracking=off", "quiet=true",
                                        *overrides])
    validate(cfg)
    if teacher_from is not None and not (run_dir / "teacher").exists():
        run_dir.mkdir(parents=True, exist_ok=True)
        shutil.copytree(teacher_from / "teacher", run_dir / "teacher")
        (run_dir / "config.yaml").write_text(OmegaConf.to_yaml(cfg, resolve=True))
    with recorder_for(cfg) as rec:
        return pipeline.run(cfg, rec, recipe)


def rows(summary: dict) -> dict[int, dict]:
    return {r["steps"]: r for r in summary["stages"] if r["metrics"]}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--recipe", default="archipelago_progressive")
    ap.add_argument("--rank", type=int, default=8)
    ap.add_argument("--out", type=Path, default=Path("/tmp/distillrun-adapters"))
    ap.add_argument("--set", nargs="*", default=[], metavar="KEY=VALUE", help="overrides for both runs")
    ap.add_argument("--adapter-set", nargs="*", default=[], metavar="KEY=VALUE", help="overrides for the adapter run")
    ap.add_argument("--tag", default="", help="suffix of the adapter run's folder (several adapter settings, one full run)")
    args = ap.parse_args()
    out = args.out / args.recipe
    full_dir, ad_dir = out / "full", out / f"adapter-r{args.rank}{args.tag}"
    load0 = os.getloadavg()
    t0 = time.perf_counter()
    full = run(args.recipe, full_dir, ["stop.tolerance=1000", *args.set])  # resumed (stages reloaded) if it exists
    t_full = time.perf_counter() - t0
    t0 = time.perf_counter()
    ad = run(args.recipe, ad_dir, ["stop.tolerance=1000", "adapter=lowrank", f"adapter.rank={args.rank}",
                                   *args.set, *args.adapter_set], teacher_from=full_dir)
    t_ad = time.perf_counter() - t0
    load1 = os.getloadavg()
    metric = full["stop_metric"]
    f_rows, a_rows = rows(full), rows(ad)
    print(f"recipe {args.recipe}, rank {args.rank}, overrides {args.set + args.adapter_set}")
    print(f"load average before {load0[0]:.1f}, after {load1[0]:.1f}; wall full {t_full:.0f} s, adapter {t_ad:.0f} s")
    ref = full["reference"]["teacher"]
    print(f"teacher at full steps: {metric} {ref[metric]:.4g} ± {ref.get(metric + '_se', float('nan')):.2g}")
    extra = "nll_gap" if "quality/nll_gap" in next(iter(f_rows.values()))["metrics"] else None
    print(f"| steps | full {metric} | adapter {metric} | teacher DDIM |" + (f" full {extra} | adapter {extra} |" if extra else "")
          + " trainable adapter/full | saved bytes adapter/full | train s full | train s adapter | time ratio |")
    print("|---" * (9 + 2 * bool(extra)) + "|")
    table = []
    for steps in sorted(f_rows, reverse=True):
        f, a = f_rows[steps], a_rows.get(steps)
        if a is None:
            continue
        fm, am = f["metrics"], a["metrics"]
        fs = {k: fm[f"size/{k}"] for k in ("trainable_params", "saved_bytes")}
        as_ = {k: am[f"size/{k}"] for k in ("trainable_params", "saved_bytes")}
        row = {"steps": steps, "full": fm[f"quality/{metric}"], "full_se": fm.get(f"quality/{metric}_se"),
               "adapter": am[f"quality/{metric}"], "adapter_se": am.get(f"quality/{metric}_se"),
               "ddim": fm.get(f"baseline/{metric}"), "params": (as_["trainable_params"], fs["trainable_params"]),
               "bytes": (as_["saved_bytes"], fs["saved_bytes"]),
               "train_s": (f["seconds"]["train"], a["seconds"]["train"])}
        table.append(row)
        ex = ""
        if extra:
            row["extra"] = (fm[f"quality/{extra}"], fm[f"quality/{extra}_se"], am[f"quality/{extra}"], am[f"quality/{extra}_se"])
            ex = " {:.4g} ± {:.2g} | {:.4g} ± {:.2g} |".format(*row["extra"])
        print(f"| {steps} | {row['full']:.4g} ± {row['full_se']:.2g} | {row['adapter']:.4g} ± {row['adapter_se']:.2g} | "
              f"{row['ddim']:.4g} |{ex} {as_['trainable_params']}/{fs['trainable_params']} = "
              f"{as_['trainable_params'] / fs['trainable_params']:.1%} | {as_['saved_bytes']}/{fs['saved_bytes']} = "
              f"{as_['saved_bytes'] / fs['saved_bytes']:.1%} | {row['train_s'][0]:.1f} | {row['train_s'][1]:.1f} | "
              f"{row['train_s'][1] / row['train_s'][0]:.2f} |")
    (out / f"result-r{args.rank}{args.tag}.json").write_text(json.dumps({"recipe": args.recipe, "rank": args.rank, "metric": metric,
                                                 "load": [load0[0], load1[0]], "rows": table}, indent=2))


if __name__ == "__main__":
    sys.exit(main())
