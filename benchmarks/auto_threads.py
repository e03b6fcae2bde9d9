"""compute.threads=auto against fixed thread counts on the default 2D stage workload, idle and with one busy
competing process; optionally with the OpenMP wait policy set (OMP_WAIT_POLICY, read when the OpenMP runtime
starts, so every measurement runs in a fresh child process).

Workload: `training.train_loop` on archipelago_progressive's stage-1 student and loss (the recipe's network,
batch and method settings, fresh weights; speed does not depend on them), ITERATIONS iterations (default 600,
one default stage), under `threads.run_policy(SETTING)` exactly as the pipeline runs a stage, so `auto` pays
its own probing inside the timed loop. Competitor: one `python -c "while True: pass"` process started before
and stopped after the scenario's measurements. Settings run in rotating order, round by round, so a change in
machine load hits all of them alike; the table gives medians and the ratio of each setting's time to the best
fixed setting's (1.00 = as fast as the best fixed count; > 1 = slower).

Usage (repository root; each measurement is a child process; ~1 minute per measurement at load 0):
    python benchmarks/auto_threads.py [--settings 1,2,auto] [--scenarios idle,busy] [--rounds 3]
        [--iterations 600] [--wait-policy passive]   # adds "2+passive", "auto+passive" style settings
"""
from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent


def child(setting: str, iterations: int) -> None:
    import torch

    sys.path.insert(0, str(HERE))
    import overhead

    from distillrun import threads

    cfg, data, teacher, student, net, loss_fn, spec, batch = overhead.build(overhead.SCENARIOS["progressive-2d"])
    draw = data.batches(batch, torch.device("cpu"))
    count = setting if setting == "auto" else int(setting)
    torch.set_num_threads(threads.core_limit() if count == "auto" else count)
    overhead.stage_loop(student, loss_fn, draw, spec, 5, 0)  # pays the one-time imports (torch._dynamo)
    with threads.run_policy(count) as policy:
        t0 = time.perf_counter()
        overhead.stage_loop(student, loss_fn, draw, spec, iterations, 1)
        seconds = time.perf_counter() - t0
        chosen = policy.last_summary()
    print(json.dumps({"seconds": seconds, "chosen": chosen, "threads_at_end": torch.get_num_threads()}))


def measure(setting: str, iterations: int) -> dict:
    base, _, policy = setting.partition("+")
    env = dict(os.environ, MLFLOW_DISABLE_TELEMETRY="true")
    env.pop("OMP_NUM_THREADS", None)  # the child sets its own count
    env.pop("OMP_WAIT_POLICY", None)
    if policy:
        env["OMP_WAIT_POLICY"] = policy.upper()
    p = subprocess.run([sys.executable, __file__, "--child", base, "--iterations", str(iterations)], env=env,
                       capture_output=True, text=True, cwd=HERE.parent)
    if p.returncode:
        raise RuntimeError(f"child {setting} failed:\n{p.stderr[-3000:]}")
    return json.loads(p.stdout.strip().splitlines()[-1])


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--settings", default="1,2,auto")
    p.add_argument("--scenarios", default="idle,busy")
    p.add_argument("--rounds", type=int, default=3)
    p.add_argument("--iterations", type=int, default=600)
    p.add_argument("--wait-policy", default=None, help="also run every setting with OMP_WAIT_POLICY=this")
    p.add_argument("--child", default=None, help=argparse.SUPPRESS)
    a = p.parse_args()
    if a.child:
        child(a.child, a.iterations)
        return
    sys.path.insert(0, str(HERE.parent))
    import torch

    from distillrun import threads

    settings = a.settings.split(",")
    if a.wait_policy:
        settings += [f"{s}+{a.wait_policy}" for s in a.settings.split(",") if s != "1"]  # 1 thread: no waiting
    print(f"{threads.describe_machine()}")
    print(f"torch {torch.__version__}; {a.iterations} iterations of archipelago_progressive's stage loop per "
          f"measurement, {a.rounds} rounds; load average at start {os.getloadavg()[0]:.2f} "
          f"(1, 5, 15 min: {', '.join(f'{x:.2f}' for x in os.getloadavg())})", flush=True)
    for scenario in a.scenarios.split(","):
        spinner = None
        if scenario == "busy":
            spinner = subprocess.Popen([sys.executable, "-c", "while True: pass"])
            time.sleep(1.0)
        try:
            results: dict[str, list] = {s: [] for s in settings}
            loads = [os.getloadavg()[0]]
            for r in range(a.rounds):
                order = settings[r % len(settings):] + settings[:r % len(settings)]
                for s in (order if r % 2 == 0 else order[::-1]):
                    results[s].append(measure(s, a.iterations))
                    print(f"  {scenario} round {r + 1} {s}: {a.iterations / results[s][-1]['seconds']:.2f} it/s "
                          f"(chose {results[s][-1]['chosen']})", flush=True)
                loads.append(os.getloadavg()[0])
        finally:
            if spinner is not None:
                spinner.kill()
                spinner.wait()
        med = {s: statistics.median(x["seconds"] for x in v) for s, v in results.items()}
        fixed = [s for s in settings if s.partition("+")[0] != "auto"]
        best = min(fixed, key=med.get) if fixed else None
        print(f"\n{scenario}: load average {min(loads):.2f}-{max(loads):.2f} during the scenario "
              f"({'one busy competitor of ours included' if spinner else 'nothing of ours besides the child'})")
        print(f"| setting | it/s (median) | time / best fixed ({best}) | rounds: it/s | auto's choices |")
        print("| --- | --- | --- | --- | --- |")
        for s in settings:
            per = ", ".join(f"{a.iterations / x['seconds']:.1f}" for x in results[s])
            chosen = "; ".join(sorted({str(x["chosen"]) for x in results[s]})) if s.startswith("auto") else ""
            print(f"| {s} | {a.iterations / med[s]:.2f} | {med[s] / med[best]:.2f} | {per} | {chosen} |")
        print(flush=True)


if __name__ == "__main__":
    main()
