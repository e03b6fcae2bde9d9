"""Break the package on purpose, one line at a time, and report which default-suite tests notice.

Each mutation is a patch (file, exact old text, new text) applied to a fresh copy of the package in a temporary
folder; the tests named for it then run against that copy (the copy comes first on PYTHONPATH and is the working
folder, so it shadows the installed package; this is checked before any test runs). A patch whose old text is not
found exactly once stops the script: the code moved and the patch must be updated. The unmutated copy runs first
(every listed test must pass there, or no "caught" below means anything).

    python tests/mutations.py                 # all mutations, a table at the end
    python tests/mutations.py stop_ignores_over no_chaining     # some of them
    python tests/mutations.py --list

Exit code 0 when the baseline passes and every mutation is caught, 1 otherwise. Run by tests/test_mutations.py
(marked slow: about a minute per mutation on one core).
"""
from __future__ import annotations

import argparse
import os
import re
import shutil
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
COPIED = ("distillrun", "configs", "recipes", "tests", "benchmarks", "docs", "pyproject.toml", "README.md")


@dataclass(frozen=True)
class Mutation:
    name: str
    what: str  # the decision it breaks, in words
    file: str  # relative to the repository root
    old: str  # exact text, found exactly once
    new: str
    tests: tuple[str, ...]  # pytest arguments (files or node ids) relative to the repository root
    # The same break written for the code after the method seam (one module per method): (file, old, new).
    # Exactly one of the patch and its alternatives must apply; drop these once the seam is on main.
    alternatives: tuple[tuple[str, str, str], ...] = ()


PIPELINE = "tests/test_pipeline.py"
CONSISTENCY = "tests/test_consistency.py::test_loss_follows_song_2023_algorithm_2"
MUTATIONS = [
    Mutation("stop_ignores_over", "(a) the pipeline stops only on a failed stage, never on an 'over' verdict",
             "distillrun/pipeline.py",
             'if not distributed.share_flag(record["verdict"] == stopping.WITHIN):',
             'if not distributed.share_flag(record["verdict"] != stopping.FAILED):',
             (PIPELINE, "tests/test_stopping.py"),
             (("distillrun/pipeline.py", 'go_on = record["verdict"] == stopping.WITHIN',
               'go_on = record["verdict"] != stopping.FAILED'),)),
    Mutation("no_chaining", "(b) a stage's student never becomes the next stage's teacher",
             "distillrun/pipeline.py",
             '        previous, previous_samples = student, x\n        if cfg.method.name == "progressive":\n'
             '            stage_teacher = student\n',
             '        previous, previous_samples = student, x\n        if cfg.method.name == "progressive":\n'
             '            pass\n',
             (PIPELINE, "tests/test_progressive.py"),
             (("distillrun/pipeline.py", "        if run.method.chains_teacher:\n            stage_teacher = student\n",
               "        if run.method.chains_teacher:\n            pass\n"),)),
    Mutation("lowest_interval_never_drawn", "(c) the consistency loss never samples the lowest interval of its grid",
             "distillrun/methods/consistency.py",
             "n = torch.randint(0, sigmas.shape[0] - 1, (x0.shape[0],), generator=generator)",
             "n = torch.randint(1, sigmas.shape[0] - 1, (x0.shape[0],), generator=generator)",
             ("tests/test_consistency.py",)),
    Mutation("target_at_wrong_level", "(d) the consistency target network is evaluated at sigma_{n+1}, not sigma_n",
             "distillrun/methods/consistency.py",
             "f_target = target(x_hat, sigma_n, cond)",
             "f_target = target(x_hat, sigma_next, cond)",
             ("tests/test_consistency.py",)),
    Mutation("v_target_wrong", "(e) the v-parameterisation target swaps alpha and sigma (v = sigma eps - alpha x0)",
             "distillrun/denoiser.py",
             "return v_from_x0_eps(x0, eps, alpha, sigma)",
             "return v_from_x0_eps(x0, eps, sigma, alpha)",
             ("tests/test_teacher_loss.py", "tests/test_progressive.py")),
    Mutation("eps_x0_targets_swapped", "(e) the eps- and x0-parameterisation targets are swapped",
             "distillrun/denoiser.py",
             'return eps if parameterization == "eps" else x0',
             'return x0 if parameterization == "eps" else eps',
             ("tests/test_teacher_loss.py", "tests/test_progressive.py")),
    Mutation("stop_rule_skipped", "the stop rule is skipped: every stage runs whatever its verdict",
             "distillrun/pipeline.py",
             'if not distributed.share_flag(record["verdict"] == stopping.WITHIN):',
             'if not distributed.share_flag(True):',
             (PIPELINE, "tests/test_stopping.py"),
             (("distillrun/pipeline.py", 'go_on = record["verdict"] == stopping.WITHIN', "go_on = True"),)),
    Mutation("chooses_most_steps", "the chosen student is the passing one with the most steps, not the fewest",
             "distillrun/stopping.py",
             'return min(passing, key=lambda s: (s["steps"], -s["index"])) if passing else None',
             'return max(passing, key=lambda s: (s["steps"], -s["index"])) if passing else None',
             (PIPELINE, "tests/test_stopping.py")),
    Mutation("student_restarts", "a stage's student starts again from the teacher's network, not the last student",
             "distillrun/pipeline.py",
             "        previous, previous_samples = student, x\n",
             "        previous_samples = x\n",
             (PIPELINE,)),
    Mutation("student_is_its_own_teacher", "progressive stages get their own student as teacher (wrong teacher fed)",
             "distillrun/stages.py",
             "loss_fn = progressive.progressive_loss(fast_layout(teacher), spec.steps, m.loss)",
             "loss_fn = progressive.progressive_loss(fast_layout(student), spec.steps, m.loss)",
             (PIPELINE, "tests/test_progressive.py"),
             (("distillrun/methods/progressive.py",
               "return progressive_loss(fast_layout(job.teacher), job.spec.steps, cfg.method.loss)",
               "return progressive_loss(fast_layout(job.student), job.spec.steps, cfg.method.loss)"),)),
    Mutation("student_times_shifted", "progressive student times shifted one grid step down (i in 0..N-1)",
             "distillrun/methods/progressive.py",
             "return torch.randint(1, steps + 1, (batch,), generator=generator, dtype=torch.float64) / steps",
             "return torch.randint(0, steps, (batch,), generator=generator, dtype=torch.float64) / steps",
             ("tests/test_progressive.py",)),
    Mutation("heun_becomes_euler", "the consistency teacher's Heun step silently falls back to Euler",
             "distillrun/methods/consistency.py",
             "    return x_ve + h * 0.5 * (d + ode_slope(teacher, x_euler, s_to, cond))",
             "    return x_euler",
             ("tests/test_consistency.py",)),
    Mutation("noised_at_lower_level", "the consistency model's input is noised to sigma_n instead of sigma_{n+1}",
             "distillrun/methods/consistency.py",
             "x_next = x0 + broadcast(sigma_next, x0) * z",
             "x_next = x0 + broadcast(sigma_n, x0) * z",
             (CONSISTENCY,)),
]


def make_copy(dest: Path) -> Path:
    """The repository's sources in dest, with the config groups and recipes also inside the package (where an
    installed distillrun has them), so `import distillrun.configs` resolves within the copy."""
    ignore = shutil.ignore_patterns("__pycache__", "*.egg-info", "*.pyc")
    for name in COPIED:
        src = ROOT / name
        if src.is_dir():
            shutil.copytree(src, dest / name, ignore=ignore)
        elif src.exists():
            shutil.copy2(src, dest / name)
    shutil.copytree(ROOT / "configs", dest / "distillrun" / "configs", ignore=ignore, dirs_exist_ok=True)
    shutil.copytree(ROOT / "recipes", dest / "distillrun" / "recipes", ignore=ignore, dirs_exist_ok=True)
    return dest


def apply(mutation: Mutation, copy: Path) -> str:
    """Apply the one patch of `mutation` whose old text is found exactly once in its file; returns that file.
    Stops the script when none or several apply (the code moved: update the patch)."""
    patches = ((mutation.file, mutation.old, mutation.new), *mutation.alternatives)
    found = [(f, old, new) for f, old, new in patches
             if (copy / f).exists() and (copy / f).read_text().count(old) == 1]
    if len(found) != 1:
        raise SystemExit(f"mutation {mutation.name}: {len(found)} of its {len(patches)} patches apply, not one "
                         f"(the code moved; update the patch): {mutation.old!r} in {mutation.file}")
    file, old, new = found[0]
    path = copy / file
    path.write_text(path.read_text().replace(old, new))
    return file


def environment(copy: Path) -> dict:
    env = {**os.environ, "PYTHONPATH": f"{copy}{os.pathsep}{os.environ.get('PYTHONPATH', '')}".rstrip(os.pathsep),
           "OMP_NUM_THREADS": "1", "MLFLOW_DISABLE_TELEMETRY": "true", "PYTHONDONTWRITEBYTECODE": "1"}
    env.pop("DISTILLRUN_KILL_AT", None)
    return env


def check_shadowing(copy: Path) -> None:
    probe = "import distillrun, distillrun.configs; print(distillrun.__file__); print(distillrun.configs.__file__)"
    out = subprocess.run([sys.executable, "-c", probe], cwd=copy, env=environment(copy), capture_output=True,
                         text=True, check=True).stdout.split()
    if not all(Path(p).resolve().is_relative_to(copy.resolve()) for p in out):
        raise SystemExit(f"the copy in {copy} does not shadow the installed package: {out}")


def run_tests(copy: Path, tests) -> tuple[list[str], str]:
    """Run pytest on `tests` in the copy; returns (failed or erroring test ids, pytest's last line)."""
    done = subprocess.run([sys.executable, "-m", "pytest", "-q", "-rfE", "-p", "no:cacheprovider", *tests],
                          cwd=copy, env=environment(copy), capture_output=True, text=True)
    lines = done.stdout.splitlines()
    failed = sorted({m.group(1) for line in lines if (m := re.match(r"(?:FAILED|ERROR) (\S+)", line))})
    last = lines[-1] if lines else done.stderr.strip()[-300:]
    if done.returncode not in (0, 1):  # 2-5: interrupted, internal error, usage error, nothing collected
        failed = failed or [f"pytest exit {done.returncode}: {last}"]
    return failed, last


def short(test_id: str) -> str:
    return test_id.removeprefix("tests/")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("names", nargs="*", help="mutations to run (default: all)")
    parser.add_argument("--list", action="store_true", help="list the mutations and exit")
    args = parser.parse_args(argv)
    chosen = [m for m in MUTATIONS if not args.names or m.name in args.names]
    unknown = set(args.names) - {m.name for m in MUTATIONS}
    if unknown:
        parser.error(f"unknown mutation(s): {', '.join(sorted(unknown))}; see --list")
    if args.list:
        for m in MUTATIONS:
            print(f"{m.name:28s} {m.what}")
        return 0
    with tempfile.TemporaryDirectory(prefix="distillrun-mutations-") as tmp:
        pristine = make_copy(Path(tmp) / "pristine")
        for m in chosen:  # every patch must apply before anything runs
            apply(m, make_copy(Path(tmp) / f"check-{m.name}"))
            shutil.rmtree(Path(tmp) / f"check-{m.name}")
        check_shadowing(pristine)
        tests = sorted({t for m in chosen for t in m.tests})
        t0 = time.perf_counter()
        failed, last = run_tests(pristine, tests)
        print(f"baseline (no mutation): {len(failed)} failing in {time.perf_counter() - t0:.0f} s; {last}", flush=True)
        for f in failed:
            print(f"  FAILS WITHOUT A MUTATION: {short(f)}")
        rows = []
        for m in chosen:
            copy = make_copy(Path(tmp) / m.name)
            file = apply(m, copy)
            t0 = time.perf_counter()
            caught, last = run_tests(copy, m.tests)
            rows.append((m, file, caught))
            print(f"{m.name}: {'caught by ' + ', '.join(map(short, caught)) if caught else 'NOT CAUGHT'} "
                  f"({time.perf_counter() - t0:.0f} s; {last})", flush=True)
            shutil.rmtree(copy)
    print("\n| mutation | what it breaks | file | caught by (tests run: the listed files) |")
    print("|---|---|---|---|")
    for m, file, caught in rows:
        print(f"| {m.name} | {m.what} | {file} | {'<br>'.join(map(short, caught)) or '**NOT CAUGHT**'} |")
    return 0 if not failed and all(caught for *_, caught in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
