"""Evaluation cost of a whole pipeline, baseline against current code, side by side in one process.

Takes a finished run folder (e.g. from `python benchmarks/recipes.py --only archipelago_progressive`), rebuilds its
teacher and every stage's student, and repeats the pipeline's evaluation -- the reference (teacher at full steps,
floor) and each stage's `pipeline.evaluate_stage` (student draw, quality, divergences, the teacher's DDIM baseline
at the stage's steps and its quality) -- once with the baseline package and once with the current one, alternating
which goes first. The baseline package is a copy made by benchmarks/baseline_tree.py, imported under another name.
Reported: seconds per part (draws vs scoring) and in total, the ratio baseline / current, the largest relative
difference of any metric between the two (identical code paths give 0), and the evaluation share of the run's own
recorded training seconds (stage records' seconds.train, teacher/model.json's seconds).

Usage (repository root):
    python benchmarks/baseline_tree.py /tmp/distillrun-base
    OMP_NUM_THREADS=1 python benchmarks/eval_cost.py RUN_DIR --baseline /tmp/distillrun-base [--threads 1]
The networks themselves are rebuilt by the current package; the baseline runs them with the per-row time
embedding they had before (shared_time.per_row_time).
"""
from __future__ import annotations

import argparse
import contextlib
import importlib
import importlib.util
import json
import math
import os
import sys
import time
from pathlib import Path

import torch

sys.path.insert(0, str(Path(__file__).parent))
from shared_time import per_row_time  # noqa: E402

import distillrun  # noqa: E402
from distillrun import verbs  # noqa: E402
from distillrun.data import load_dataset  # noqa: E402


def load_package(src: Path, name: str = "distillrun_base"):
    """The distillrun package found in src/, imported as `name` (its relative imports stay inside the copy)."""
    spec = importlib.util.spec_from_file_location(name, src / "distillrun" / "__init__.py",
                                                  submodule_search_locations=[str(src / "distillrun")])
    mod = importlib.util.module_from_spec(spec)
    sys.modules[name] = mod
    spec.loader.exec_module(mod)
    return mod


class Variant:
    """One package's evaluation of the run: bench, reference, then stage after stage. `patch`: a context manager
    entered around each of this variant's steps (the baseline's per-row time embedding)."""

    def __init__(self, label: str, pkg_name: str, cfg, data, teacher, patch=contextlib.nullcontext):
        self.label, self.patch = label, patch
        self.evaluate = importlib.import_module(f"{pkg_name}.evaluate")
        self.pipeline = importlib.import_module(f"{pkg_name}.pipeline")
        # A package from before the method seam keeps the teacher sampler and the method table in stages.py.
        self.stages = importlib.import_module(f"{pkg_name}.stages") if not hasattr(self.pipeline, "RunParts") \
            else None
        self.teacher_sampler = (self.stages or self.pipeline).teacher_sampler
        self.cfg, self.data, self.teacher = cfg, data, teacher
        self.seconds = {"bench": 0.0, "reference": 0.0}
        self.metrics = {}
        self.previous = None
        self.draw_seconds = 0.0  # of all the above: time inside evaluate.draw (sampling), the rest is scoring
        e = self.evaluate
        if not hasattr(e, "_timed_for"):  # wrap once per module; the variant running now is charged
            draw = e.draw

            def timed_draw(*args, **kwargs):  # the module's own calls (cached_draw, pipeline) go through this name
                t0 = time.perf_counter()
                try:
                    return draw(*args, **kwargs)
                finally:
                    e._timed_for.draw_seconds += time.perf_counter() - t0
            e.draw = timed_draw
        e._timed_for = self

    def setup(self):
        self.evaluate._timed_for = self
        with self.patch():
            self._setup()

    def _setup(self):
        t0 = time.perf_counter()
        e = self.evaluate
        self.bench = e.make_bench(self.data, self.cfg.eval.samples, self.cfg.eval.projections, self.cfg.eval.bootstrap,
                                  self.cfg.eval.seed, cond_needed=self.teacher.num_classes > 0)
        self.seconds["bench"] = time.perf_counter() - t0
        t0 = time.perf_counter()
        steps = self.cfg.teacher.steps
        samples, _ = e.cached_draw(self.bench, f"teacher@{steps}",
                                   self.teacher_sampler(self.teacher.denoiser, steps, self.cfg.teacher.sampler))
        self.metrics["reference/teacher"] = e.quality(self.bench, samples)
        self.metrics["reference/floor"] = e.quality(self.bench, self.bench.floor_set)
        self.seconds["reference"] = time.perf_counter() - t0
        self.previous = samples

    def stage(self, spec, student):
        self.evaluate._timed_for = self
        with self.patch():
            self._stage(spec, student)

    def _stage(self, spec, student):
        if self.stages is not None:
            method = self.stages.method_for(self.cfg.method.name)
            out, x, secs = self.pipeline.evaluate_stage(self.cfg, self.bench, spec, method, student, self.teacher,
                                                        self.previous)
        else:
            methods = importlib.import_module(f"{self.pipeline.__name__.rpartition('.')[0]}.methods")
            run = self.pipeline.RunParts(self.cfg, methods.method_named(self.cfg.method.name), self.data,
                                         self.teacher, Path("."), True, self.bench)
            out, x, secs = self.pipeline.evaluate_stage(run, spec, student, self.previous)
        self.metrics[f"stage-{spec.index:02d}"] = out
        self.seconds[f"stage-{spec.index:02d}"] = secs
        self.previous = x


def max_rel_diff(a: dict, b: dict) -> float:
    worst = 0.0
    for key, va in a.items():
        for k, x in va.items():
            y = b[key][k]
            if math.isnan(x) and math.isnan(y):
                continue
            worst = max(worst, abs(x - y) / max(abs(x), abs(y), 1e-300) if x != y else 0.0)
    return worst


def main():
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("run_dir", type=Path)
    p.add_argument("--baseline", type=Path, required=True, help="folder holding the baseline distillrun package")
    p.add_argument("--threads", type=int, default=1)
    a = p.parse_args()
    torch.set_num_threads(a.threads)
    load_package(a.baseline.resolve())
    cfg, summary = verbs.open_run(a.run_dir)
    data = load_dataset(cfg.data)
    from distillrun.teachers import Teacher
    teacher_net, _ = verbs.rebuild_student(a.run_dir / "teacher")
    oracle = None
    if cfg.teacher.source == "oracle":
        from distillrun.nets.oracle import OracleDenoiser
        from distillrun.schedule import Schedule
        oracle = OracleDenoiser(data.mixture, Schedule(cfg.teacher.schedule))
    num_classes = data.num_classes if cfg.net.class_cond else 0
    teacher = Teacher(oracle or teacher_net, teacher_net, {"num_classes": num_classes}, torch.device("cpu"), [], 0.0)
    from distillrun.methods import StageSpec
    specs = [StageSpec(**s) for s in json.loads((a.run_dir / "plan.json").read_text())]
    records = {r["index"]: r for r in summary["stages"]}
    specs = [s for s in specs if s.index in records and not records[s.index]["failed"]]
    # The networks are rebuilt by the current package; per_row_time gives the baseline their old per-row embedding.
    variants = [Variant("baseline", "distillrun_base", cfg, data, teacher, per_row_time),
                Variant("current", "distillrun", cfg, data, teacher)]
    print(f"run {a.run_dir} ({summary['method']}, {len(specs)} stages), {a.threads} thread(s), "
          f"load average {os.getloadavg()[0]:.2f}; baseline {a.baseline}, current {Path(distillrun.__file__).parent}")
    order = list(range(len(variants)))
    for v in variants:
        v.setup()
    for n, spec in enumerate(specs):
        student, _ = verbs.rebuild_student(a.run_dir / f"stage-{spec.index:02d}")
        for i in (order if n % 2 else order[::-1]):
            variants[i].stage(spec, student)
    base = variants[0]
    labels = [v.label for v in variants]
    print(f"{'part':>12} " + " ".join(f"{l + ' s':>12}" for l in labels) + " " +
          " ".join(f"{'base/' + l:>14}" for l in labels[1:]))
    for key in base.seconds:
        print(f"{key:>12} " + " ".join(f"{v.seconds[key]:>12.2f}" for v in variants) + " " +
              " ".join(f"{base.seconds[key] / v.seconds[key]:>14.2f}" for v in variants[1:]))
    stage_keys = [k for k in base.seconds if k.startswith("stage-")]
    total = {v.label: sum(v.seconds[k] for k in stage_keys) for v in variants}
    ref = {v.label: v.seconds["reference"] for v in variants}
    print(f"{'stages':>12} " + " ".join(f"{total[l]:>12.2f}" for l in labels) + " " +
          " ".join(f"{total['baseline'] / total[l]:>14.2f}" for l in labels[1:]))
    for v in variants:
        scoring = ref[v.label] + total[v.label] - v.draw_seconds
        print(f"{v.label:>12}: of reference + stages, sampling {v.draw_seconds:.2f} s, scoring {scoring:.2f} s")
    for v in variants[1:]:
        worst = max_rel_diff(base.metrics, v.metrics)
        print(f"max relative difference of any metric, baseline vs {v.label}: {worst:.1e}")
    train = sum(records[s.index]["seconds"]["train"] for s in specs)
    teacher_s = json.loads((a.run_dir / "teacher" / "model.json").read_text()).get("seconds", 0.0)
    print(f"training seconds recorded in the run: stages {train:.1f}, teacher {teacher_s:.1f}")
    print("eval share of stage training (sum eval / sum train):                 " +
          "  ".join(f"{l} {100 * total[l] / train:.1f}%" for l in labels))
    print("eval share incl. teacher+reference ((ref + eval) / (teacher + train)): " +
          "  ".join(f"{l} {100 * (ref[l] + total[l]) / (train + teacher_s):.1f}%" for l in labels))
    print(f"load average at end {os.getloadavg()[0]:.2f}")


if __name__ == "__main__":
    main()
