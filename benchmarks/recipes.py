"""Every recipe end to end at its default settings: wall time, peak memory, evaluation share and the quality
reached; then the chosen student's sampling speed against the teacher's full-step sampler.

Each recipe runs as its own child process (`distillrun recipe=NAME tracking=off quiet=true compute.threads=T
run_dir=OUT/NAME`); peak memory is that child's resource usage (os.wait4 -> ru_maxrss). The recipes that need
user files get generated ones: own_data a 65536-point spiral (.npy), own_teacher the MLP teacher that own_data
trained (weights re-saved without the NetDenoiser prefix, factory in OUT/user_teacher.py).

From each run folder (stage records hold seconds.train and seconds.eval; reference.json the teacher-at-full-steps
and floor evaluation; teacher/model.json the teacher's training seconds):
  eval share (distil)  sum(stage eval) / sum(stage train)
  eval share (all)     (reference + sum(stage eval)) / (teacher train + sum(stage train))
  quality              the stop metric of the chosen student, the teacher at full steps and the floor
Sampler throughput (`throughput`, also run per recipe unless --no-throughput): samples/s of the chosen student
at its steps and of the teacher at its full steps, on the same noise, interleaved (teacher, student, teacher, ...)
in one process with one thread; speed-up = student samples/s / teacher samples/s.

Usage (repository root; runs one recipe at a time; ~1 hour for all at one thread on an idle 2-core machine):
    python benchmarks/recipes.py [--only archipelago_progressive,digits_progressive] [--threads 1]
                                 [--out /tmp/recipes] [--src DIR]
    python benchmarks/recipes.py --throughput-only --out /tmp/recipes   # re-measure sampling on finished runs
--src DIR runs the package found in DIR (e.g. a baseline tree) instead of the installed one.
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

RECIPES = ["archipelago_progressive", "archipelago_consistency", "archipelago_both", "own_data", "own_teacher",
           "digits_progressive", "digits_consistency", "tiles_progressive"]
TARGET_S = {"archipelago_progressive": 180, "archipelago_consistency": 180, "archipelago_both": 180, "own_data": 180,
            "own_teacher": 180, "digits_progressive": 1200, "digits_consistency": 1200, "tiles_progressive": 1200}
USER_TEACHER = '''
from distillrun.nets.mlp import TimeMLP


def build_teacher(width={width}, depth={depth}):
    return TimeMLP(2, width=width, depth=depth)
'''


def child_env(src: str | None, threads: int, out: Path) -> dict:
    env = dict(os.environ, OMP_NUM_THREADS=str(threads), MLFLOW_DISABLE_TELEMETRY="true")
    paths = [str(Path(p).resolve()) for p in (src, out) if p]
    env["PYTHONPATH"] = os.pathsep.join(paths + ([env["PYTHONPATH"]] if env.get("PYTHONPATH") else []))
    return env


def run_child(argv: list[str], env: dict, log: Path) -> tuple[int, float, float]:
    """(exit code, wall seconds, peak resident MB) of one child process."""
    t0 = time.perf_counter()
    with open(log, "w") as f:
        # cwd = the log's folder, not the repository root: `python -c` puts its working folder first on sys.path,
        # which would import the checkout's package instead of --src
        p = subprocess.Popen(argv, stdout=f, stderr=subprocess.STDOUT, env=env, cwd=log.parent)
        _, status, usage = os.wait4(p.pid, 0)
    p.returncode = os.waitstatus_to_exitcode(status)
    return p.returncode, time.perf_counter() - t0, usage.ru_maxrss / 1024  # Linux: ru_maxrss in KiB


def user_files(out: Path) -> dict:
    """Overrides for the recipes that need the user's files (own_teacher needs own_data's finished teacher)."""
    import numpy as np
    import torch
    from safetensors.torch import load_file, save_file

    from distillrun.data.shapes2d import spiral

    points = out / "spiral.npy"
    if not points.exists():
        np.save(points, spiral(65536, 0).numpy())
    extra = {"own_data": [f"data.path={points}"]}
    weights = out / "own_data" / "teacher" / "weights.safetensors"
    if weights.exists():
        kwargs = json.loads((weights.parent / "model.json").read_text())["net"]["kwargs"]  # own_data's MLP sizes
        (out / "user_teacher.py").write_text(USER_TEACHER.format(**kwargs))
        state = {k.removeprefix("net."): v for k, v in load_file(str(weights)).items()}
        save_file({k: v.contiguous() for k, v in state.items()}, str(out / "user_teacher.safetensors"))
        extra["own_teacher"] = [f"data.path={points}", "teacher.factory=user_teacher:build_teacher",
                                f"teacher.weights={out / 'user_teacher.safetensors'}"]
    del torch
    return extra


def run_recipe(name: str, args, out: Path) -> dict:
    extra = user_files(out).get(name, [])
    cli = [sys.executable, "-c", "from distillrun.cli import main; main()"]
    base = [f"recipe={name}", "tracking=off", "quiet=true", f"compute.threads={args.threads}", *extra]
    if name == "archipelago_both":  # a two-job Hydra sweep: progressive and consistency one after the other
        argv = cli + ["--multirun", *base, "method=progressive,consistency", f"hydra.sweep.dir={out / name}"]
        folders = [out / name / "progressive", out / name / "consistency"]
    else:
        argv, folders = cli + base + [f"run_dir={out / name}"], [out / name]
    load = os.getloadavg()[0]
    code, wall, peak = run_child(argv, child_env(args.src, args.threads, out), out / f"{name}.log")
    return {"recipe": name, "code": code, "wall_s": wall, "peak_mb": peak, "load_before": load,
            "load_after": os.getloadavg()[0], "runs": [read_run(f) for f in folders if (f / "summary.json").exists()]}


def read_run(folder: Path) -> dict:
    summary = json.loads((folder / "summary.json").read_text())
    ref = summary["reference"]
    teacher_meta = json.loads((folder / "teacher" / "model.json").read_text()) if (folder / "teacher").exists() else {}
    train = sum(r["seconds"]["train"] for r in summary["stages"])
    ev = sum(r["seconds"]["eval"] for r in summary["stages"])
    teacher_s = teacher_meta.get("seconds", 0.0)
    metric = summary["stop_metric"]
    chosen = summary.get("chosen")
    q = next((r["metrics"] for r in summary["stages"] if chosen and r["index"] == chosen["index"]), {})
    return {"folder": str(folder), "method": summary["method"], "stages": len(summary["stages"]),
            "train_s": train, "eval_s": ev, "teacher_train_s": teacher_s, "reference_s": ref.get("seconds", 0.0),
            "share_distil": ev / train if train else float("nan"),
            "share_all": (ev + ref.get("seconds", 0.0)) / (train + teacher_s) if train else float("nan"),
            "metric": metric, "chosen_steps": chosen and chosen["steps"],
            "quality": q.get(f"quality/{metric}"), "quality_se": q.get(f"quality/{metric}_se"),
            "teacher_q": ref["teacher"].get(metric), "floor_q": ref["floor"].get(metric),
            "teacher_steps": summary["stages"][0]["teacher_steps"], "stopped_because": summary["stopped_because"]}


# ---------------------------------------------------------------------------------------- sampler throughput
def throughput(folder: Path, count: int, rounds: int, threads: int) -> dict:
    """Samples/s of the chosen student at its steps and of the teacher at its full steps (interleaved rounds)."""
    import torch

    from distillrun import evaluate, pipeline, verbs
    from distillrun.methods import method_named

    torch.set_num_threads(threads)
    cfg, summary = verbs.open_run(folder)
    chosen = summary.get("chosen")
    if not chosen:
        return {}
    student, meta = verbs.rebuild_student(folder / chosen["folder"])
    shape, classes = meta["net"]["data_shape"], meta["net"]["num_classes"]
    g = torch.Generator().manual_seed(0)
    bank = evaluate.Bench(torch.randn((count, *shape), generator=g), None, None, None, None, 0.0, 0, 0)
    if classes:
        bank.cond = torch.randint(0, classes, (count,), generator=g)
    student_fn = method_named(meta["method"]).sampler(cfg.method, student, meta["steps"], 0)
    if cfg.teacher.source == "oracle":
        from distillrun.data import load_dataset
        from distillrun.nets.oracle import OracleDenoiser
        from distillrun.schedule import Schedule
        teacher = OracleDenoiser(load_dataset(cfg.data).mixture, Schedule(cfg.teacher.schedule))
    elif cfg.teacher.source == "import":  # the user's network is not copied into the run folder
        from distillrun.denoiser import NetDenoiser
        from distillrun.schedule import Schedule
        from distillrun.teachers import import_teacher
        net = import_teacher(cfg.teacher.factory, cfg.teacher.factory_kwargs, cfg.teacher.weights, shape, classes)
        teacher = NetDenoiser(net, cfg.teacher.parameterization, Schedule(cfg.teacher.schedule)).requires_grad_(False)
    else:
        teacher, _ = verbs.rebuild_student(folder / "teacher")
    teacher_fn = pipeline.teacher_sampler(teacher, cfg.teacher.steps, cfg.teacher.sampler)
    times = {"teacher": [], "student": []}
    evaluate.draw(student_fn, bank)  # warm-up
    for _ in range(rounds):
        for k, fn in (("teacher", teacher_fn), ("student", student_fn)):
            t0 = time.perf_counter()
            evaluate.draw(fn, bank)
            times[k].append(time.perf_counter() - t0)
    t_s, s_s = statistics.median(times["teacher"]), statistics.median(times["student"])
    return {"student_steps": meta["steps"], "teacher_steps": cfg.teacher.steps, "count": count,
            "student_sps": count / s_s, "teacher_sps": count / t_s, "speedup": t_s / s_s,
            "teacher_kind": "oracle" if cfg.teacher.source == "oracle" else "network"}


def throughput_child(folder: Path, args) -> dict:
    """Run `throughput` in a fresh child (its own memory, one thread), return its JSON."""
    code = ("import json, sys; from pathlib import Path; sys.path.insert(0, 'benchmarks'); import recipes; "
            f"print(json.dumps(recipes.throughput(Path({str(folder)!r}), {args.count}, {args.rounds}, 1)))")
    code = code.replace("'benchmarks'", repr(str(Path(__file__).resolve().parent)))
    # cwd = the output folder: `python -c` puts its working folder first on sys.path, and from the repository root
    # that would import the checkout's package instead of --src
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         env=child_env(args.src, 1, Path(args.out)), cwd=args.out)
    if out.returncode:
        return {"error": out.stderr.strip().splitlines()[-1]}
    return json.loads(out.stdout.strip().splitlines()[-1])


def fmt(x, spec=".3g"):
    return "-" if x is None else format(x, spec)


def print_tables(results: list[dict]):
    print(f"\n{'recipe':>24} {'method':>11} {'exit':>4} {'wall s':>7} {'target':>6} {'peak MB':>8} {'stages':>6} "
          f"{'train s':>8} {'eval s':>7} {'eval/train':>10} {'eval/all':>8} {'metric':>7} {'chosen':>6} "
          f"{'quality ± se':>16} {'teacher':>8} {'floor':>7} {'load':>9}")
    for r in results:
        for run in r["runs"]:
            ok = "yes" if r["wall_s"] <= TARGET_S[r["recipe"]] else "NO"
            print(f"{r['recipe']:>24} {run['method']:>11} {r['code']:>4} {r['wall_s']:>7.0f} {ok:>6} "
                  f"{r['peak_mb']:>8.0f} "
                  f"{run['stages']:>6} {run['train_s']:>8.1f} {run['eval_s']:>7.1f} {100 * run['share_distil']:>9.1f}% "
                  f"{100 * run['share_all']:>7.1f}% {run['metric']:>7} {fmt(run['chosen_steps'], 'd'):>6} "
                  f"{fmt(run['quality']) + ' ± ' + fmt(run['quality_se'], '.2g'):>16} {fmt(run['teacher_q']):>8} "
                  f"{fmt(run['floor_q']):>7} {r['load_before']:>4.1f}/{r['load_after']:<4.1f}")
    print(f"\n{'recipe':>24} {'method':>11} {'student':>12} {'teacher':>12} {'speed-up':>8} {'quality ratio':>13}")
    for r in results:
        for run in r["runs"]:
            t = run.get("throughput") or {}
            if "speedup" not in t:
                print(f"{r['recipe']:>24} {run['method']:>11} {t.get('error', 'no chosen student')}")
                continue
            ratio = run["quality"] / run["teacher_q"] if run["quality"] is not None and run["teacher_q"] else None
            print(f"{r['recipe']:>24} {run['method']:>11} {t['student_sps']:>7.0f}/s@{t['student_steps']:<3} "
                  f"{t['teacher_sps']:>7.0f}/s@{t['teacher_steps']:<3} {t['speedup']:>7.1f}x {fmt(ratio, '.2f'):>13}"
                  f"{'  (oracle teacher)' if t['teacher_kind'] == 'oracle' else ''}")


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--only", default=",".join(RECIPES))
    p.add_argument("--threads", type=int, default=1)
    p.add_argument("--out", default="/tmp/distillrun-recipes")
    p.add_argument("--src", default=None, help="a folder holding the distillrun package to run instead")
    p.add_argument("--count", type=int, default=4096, help="samples per throughput draw")
    p.add_argument("--rounds", type=int, default=3, help="interleaved throughput rounds")
    p.add_argument("--no-throughput", action="store_true")
    p.add_argument("--throughput-only", action="store_true", help="skip the runs; read finished ones from --out")
    args = p.parse_args()
    out = Path(args.out).resolve()
    out.mkdir(parents=True, exist_ok=True)
    results_file = out / "results.json"
    results = json.loads(results_file.read_text()) if results_file.exists() else {}
    print(f"threads {args.threads}, load average {os.getloadavg()[0]:.2f}, src {args.src or 'installed'}")
    for name in args.only.split(","):
        if not args.throughput_only:
            results[name] = run_recipe(name, args, out)
            r = results[name]
            print(f"{name}: exit {r['code']}, {r['wall_s']:.0f} s, peak {r['peak_mb']:.0f} MB, "
                  f"load {r['load_before']:.1f}->{r['load_after']:.1f}", flush=True)
        if not args.no_throughput and name in results:
            for run in results[name]["runs"]:
                run["throughput"] = throughput_child(Path(run["folder"]), args)
        results_file.write_text(json.dumps(results, indent=1))
    print_tables([results[n] for n in args.only.split(",") if n in results])


if __name__ == "__main__":
    main()
