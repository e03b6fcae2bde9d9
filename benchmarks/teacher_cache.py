"""Sweeps that share a teacher, with the teacher cache off (before: every job trains the same teacher) and on
(after: the first job trains it, the others reuse it), side by side.

Sweeps (Hydra --multirun, the basic launcher: jobs one after the other), on archipelago_progressive, the default:
  methods     method=progressive,consistency
  tolerances  stop.tolerance=0.1,0.25,0.5
SHORTENED so that both modes fit in a few minutes: the teacher is trained at its default settings (what the
cache saves), the stages are cut to --stage-iterations per stage (default 100, recipe: 600/2000) and the
evaluation to eval.samples=1024, eval.bootstrap=10; tracking off; a fixed --threads (default 1) so the thread
chooser does not add its own variation. Each measurement uses a fresh cache folder, so "on" includes training
the teacher once. Modes alternate (off, on, on, off, ...) so a change in machine load hits both alike.

Usage (repository root): python benchmarks/teacher_cache.py [--sweeps methods,tolerances] [--rounds 1]
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

SWEEPS = {"methods": ["method=progressive,consistency"], "tolerances": ["stop.tolerance=0.1,0.25,0.5"]}


def run_sweep(name: str, cache: bool, args, root: Path) -> dict:
    out = Path(tempfile.mkdtemp(prefix=f"{name}-{'on' if cache else 'off'}-", dir=root))
    argv = [sys.executable, "-c", "from distillrun.cli import main; main()", "--multirun", *SWEEPS[name],
            "tracking=off", "quiet=true", f"compute.threads={args.threads}", f"method.iterations={args.stage_iterations}",
            "eval.samples=1024", "eval.bootstrap=10", f"hydra.sweep.dir={out / 'sweep'}",
            f"compute.teacher_cache={'true' if cache else 'false'}", f"compute.cache_dir={out / 'cache'}", *args.extra]
    env = dict(os.environ, MLFLOW_DISABLE_TELEMETRY="true", OMP_NUM_THREADS=str(args.threads))
    load = os.getloadavg()[0]
    t0 = time.perf_counter()
    p = subprocess.run(argv, env=env, capture_output=True, text=True, cwd=out)
    wall = time.perf_counter() - t0
    if p.returncode:
        raise RuntimeError(f"{name} (cache {cache}) failed:\n{p.stderr[-3000:]}")
    metas = [json.loads(m.read_text()) for m in sorted((out / "sweep").glob("*/teacher/model.json"))]
    return {"wall": wall, "load": (load + os.getloadavg()[0]) / 2, "jobs": len(metas),
            "trained": sum(1 for m in metas if m.get("seconds", 0) > 0),
            "teacher_s": sum(m.get("seconds", 0.0) for m in metas), "sha": {m["sha256"] for m in metas}}


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--sweeps", default="methods,tolerances")
    p.add_argument("--rounds", type=int, default=1)
    p.add_argument("--threads", type=int, default=1)
    p.add_argument("--stage-iterations", type=int, default=100)
    p.add_argument("--extra", nargs="*", default=[], help="more overrides for every job (e.g. a smoke test)")
    a = p.parse_args()
    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
    from distillrun import threads

    print(threads.describe_machine())
    print(f"{a.threads} thread(s); stages cut to {a.stage_iterations} iterations, eval.samples=1024, eval.bootstrap=10; "
          f"more overrides: {' '.join(a.extra) or 'none'}; load average at start {os.getloadavg()[0]:.2f}", flush=True)
    root = Path(tempfile.mkdtemp(prefix="distillrun-cache-bench-"))
    for name in a.sweeps.split(","):
        res = {False: [], True: []}
        for r in range(a.rounds):
            for cache in ((False, True) if r % 2 == 0 else (True, False)):
                res[cache].append(run_sweep(name, cache, a, root))
                x = res[cache][-1]
                print(f"  {name} cache {'on ' if cache else 'off'}: {x['wall']:.1f} s wall, {x['trained']} of "
                      f"{x['jobs']} jobs trained a teacher ({x['teacher_s']:.1f} s), load {x['load']:.2f}", flush=True)
        off, on = (statistics.median(x["wall"] for x in res[c]) for c in (False, True))
        same = len(set().union(*(x["sha"] for x in res[False] + res[True]))) == 1
        print(f"| {name} | {res[False][0]['jobs']} jobs | off {off:.1f} s | on {on:.1f} s | off / on {off / on:.2f} | "
              f"teacher weights identical in every job and mode: {same} |", flush=True)


if __name__ == "__main__":
    main()
