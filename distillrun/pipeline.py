"""The stage loop: teacher -> [stage -> evaluate -> stop rule -> checkpoint -> track] -> ... -> summary.

Run folder (resumable; every file written atomically, a stage counts as done once its metrics.json exists):
  config.yaml            resolved config (a rerun with a different one is refused unless fresh=true)
  plan.json              the stages: student steps, teacher steps, iterations
  teacher/               weights.safetensors + model.json of the teacher network (or the oracle-fitted init)
  reference.json         teacher-at-full-steps and floor quality on the fixed noise bank
  stage-NN/              weights.safetensors, model.json, metrics.json, samples.png; partial.* while training
  summary.json           every stage with its verdict, why the run stopped, and the chosen student
  tracking.json          MLflow run ids, so a resumed run continues its records
"""
from __future__ import annotations

import math
import shutil
import time
from pathlib import Path

import torch
from omegaconf import DictConfig, OmegaConf

from . import checkpoint, evaluate, report, stopping
from .data import load_dataset
from .stages import StageSpec, method_for, teacher_sampler
from .teachers import Teacher, prepare_teacher

# Keys that may change between a run and its resume: they do not change what a stage computes.
RESUMABLE_KEYS = ("run_dir", "dry_run", "quiet", "fresh", "tracking", "stop", "compute")


class RunFolderError(ValueError):
    """The run folder cannot be used as asked; str() is one line."""


class DataError(ValueError):
    """The configured data cannot be loaded; str() is one line naming the file or key."""


def load_data(cfg):
    try:
        return load_dataset(cfg.data)
    except (ValueError, OSError) as e:
        raise DataError(f"data ({cfg.data.name}): {e}") from None


def preflight(cfg: DictConfig):
    """Everything that can be checked before any file is written or any training starts: the data, the
    user's teacher (import, weights, one forward pass), the tracking store. Returns the loaded data."""
    data = load_data(cfg)
    if cfg.teacher.source == "import":
        from .methods.teacher import import_teacher_net
        import_teacher_net(cfg.teacher.factory, cfg.teacher.factory_kwargs, cfg.teacher.weights, data.shape,
                           data.num_classes if cfg.net.class_cond else 0)
    if cfg.net.kind == "mlp" and data.is_image or cfg.net.kind == "unet" and not data.is_image:
        raise DataError(f"net.kind={cfg.net.kind} does not fit data of shape {data.shape}; "
                        f"use net={'unet' if data.is_image else 'mlp'}")
    if cfg.net.class_cond and data.labels is None:
        raise DataError(f"net.class_cond=true but data.name={cfg.data.name} has no labels")
    if cfg.tracking.enabled:
        from .tracking import check_reachable
        check_reachable(cfg.tracking.uri)
    return data


def plan_stages(cfg: DictConfig) -> list[StageSpec]:
    return method_for(cfg.method.name).plan(cfg)


def describe_plan(cfg: DictConfig, stages: list[StageSpec]) -> str:
    lines = [f"method {cfg.method.name}: teacher at {cfg.teacher.steps} steps ({cfg.teacher.source}), "
             f"{len(stages)} stages, {sum(s.iterations for s in stages)} student iterations"]
    lines += [f"  stage {s.index}: {s.teacher_steps} -> {s.steps} steps, {s.iterations} iterations" for s in stages]
    return "\n".join(lines)


def open_run_dir(cfg: DictConfig) -> Path:
    """Create or reuse the run folder; refuse one made by a config that differs in keys that matter."""
    run_dir = Path(cfg.run_dir)
    saved = run_dir / "config.yaml"
    current = OmegaConf.to_container(cfg, resolve=True)
    if saved.exists():
        try:
            before = OmegaConf.to_container(OmegaConf.load(saved), resolve=True)
        except Exception:
            raise RunFolderError(f"{saved}: unreadable config; delete the run folder or pass fresh=true") from None
        changed = sorted(_diff(before, current))
        if changed and not cfg.fresh:
            raise RunFolderError(f"{run_dir} was made by a different config (changed: {', '.join(changed[:8])}); "
                                 "use another run_dir, or fresh=true to discard its stages")
        if changed:
            for p in run_dir.iterdir():
                shutil.rmtree(p) if p.is_dir() else p.unlink()
    run_dir.mkdir(parents=True, exist_ok=True)
    checkpoint.atomic_write_bytes(saved, OmegaConf.to_yaml(cfg, resolve=True).encode())
    return run_dir


def _diff(a: dict, b: dict, prefix: str = "") -> set[str]:
    keys = set(a) | set(b)
    out = set()
    for k in keys:
        key = f"{prefix}{k}"
        if not prefix and k in RESUMABLE_KEYS:
            continue
        if isinstance(a.get(k), dict) and isinstance(b.get(k), dict):
            out |= _diff(a[k], b[k], key + ".")
        elif a.get(k) != b.get(k):
            out.add(key)
    return out


def reference_quality(cfg, bench, teacher: Teacher, run_dir: Path) -> dict:
    """Teacher at full steps and the floor, computed once per run and cached in reference.json."""
    path = run_dir / "reference.json"
    samples, secs = evaluate.cached_draw(bench, f"teacher@{cfg.teacher.steps}",
                                         teacher_sampler(teacher.denoiser, cfg.teacher.steps, cfg.teacher.sampler))
    if path.exists():
        return checkpoint.read_json(path, {"teacher": dict, "floor": dict})
    t0 = time.perf_counter()
    ref = {"teacher": evaluate.quality(bench, samples), "floor": evaluate.quality(bench, bench.floor_set),
           "steps": cfg.teacher.steps, "seconds": secs + time.perf_counter() - t0}
    checkpoint.atomic_write_json(path, ref)
    return ref


def evaluate_stage(cfg, bench, spec: StageSpec, method, student, teacher: Teacher, previous_samples):
    """Quality, baseline and divergence of one stage's student; returns (metrics, student samples)."""
    t0 = time.perf_counter()
    x = evaluate.draw(method.sampler(cfg, student, spec.steps), bench)
    out = evaluate.prefixed("quality", evaluate.quality(bench, x))
    full = bench.cache[f"teacher@{cfg.teacher.steps}"]
    out.update(evaluate.divergence(bench, x, full, "teacher"))
    if previous_samples is not None:
        out.update(evaluate.divergence(bench, x, previous_samples, "stage_teacher"))
    if cfg.eval.baseline:
        base, _ = evaluate.cached_draw(bench, f"teacher@{spec.steps}",
                                       teacher_sampler(teacher.denoiser, spec.steps, "ddim"))
        out.update(evaluate.prefixed("baseline", evaluate.quality(bench, base)))
    return out, x, time.perf_counter() - t0


def stage_record(cfg, spec: StageSpec, metrics: dict, result, eval_seconds: float) -> dict:
    return {"index": spec.index, "steps": spec.steps, "teacher_steps": spec.teacher_steps, "method": cfg.method.name,
            "iterations": len(result.losses), "failed": result.failed, "metrics": metrics,
            "seconds": {"train": result.seconds, "eval": eval_seconds}, "its_per_s": result.its_per_s,
            "final_loss": result.losses[-1] if result.losses else math.nan}


def attach_verdict(cfg, record: dict, reference: dict) -> dict:
    """Judge a stage with the current stop rule (re-judged on resume, so a looser tolerance continues)."""
    if record["failed"]:
        v = stopping.Verdict(stopping.FAILED, math.nan, math.nan, math.nan, f"training failed: {record['failed']}")
    else:
        quality = {k.split("/", 1)[1]: val for k, val in record["metrics"].items() if k.startswith("quality/")}
        v = stopping.judge(quality, reference["teacher"], cfg.stop.metric, cfg.stop.tolerance, cfg.stop.mode, cfg.stop.z)
    return {**record, "verdict": v.verdict, "rule": v.reason, "limit": v.limit, "margin": v.margin}


def run(cfg: DictConfig, recorder, recipe: str | None = None, data=None) -> dict:
    """Run (or resume) the whole pipeline; returns the summary written to summary.json.
    `data` is what preflight(cfg) returned, if the caller already ran it."""
    torch.set_num_threads(cfg.compute.threads)
    torch.manual_seed(cfg.seed)
    data = data if data is not None else preflight(cfg)
    stages = plan_stages(cfg)
    run_dir = open_run_dir(cfg)
    checkpoint.atomic_write_json(run_dir / "plan.json", [vars(s) for s in stages])
    recorder.start(run_dir, recipe)
    teacher = prepare_teacher(cfg, data, run_dir)
    recorder.teacher(teacher)
    bench = evaluate.make_bench(data, cfg.eval.samples, cfg.eval.projections, cfg.eval.bootstrap, cfg.eval.seed,
                                cond_needed=teacher.num_classes > 0)
    reference = reference_quality(cfg, bench, teacher, run_dir)
    recorder.reference(reference)
    method = method_for(cfg.method.name)
    records, previous = [], teacher.init_student
    previous_samples = bench.cache[f"teacher@{cfg.teacher.steps}"]
    stage_teacher = teacher.denoiser
    for spec in stages:
        record, student, x = run_stage(cfg, spec, method, stage_teacher, previous, data, bench, teacher,
                                       previous_samples, run_dir)
        record = attach_verdict(cfg, record, reference)
        records.append(record)
        recorder.stage(record, run_dir / f"stage-{spec.index:02d}")
        if record["verdict"] != stopping.WITHIN:
            break
        previous, previous_samples = student, x
        if cfg.method.name == "progressive":
            stage_teacher = student
    summary = summarize(cfg, stages, records, reference, run_dir)
    report.write_plots(summary, run_dir)
    recorder.finish(summary, run_dir)
    return summary


def run_stage(cfg, spec, method, stage_teacher, previous, data, bench, teacher, previous_samples, run_dir):
    """Train (or load, if already done) one stage and evaluate it."""
    stage_dir = run_dir / f"stage-{spec.index:02d}"
    student = method.make_student(cfg, previous, data)
    done = stage_dir / "metrics.json"
    if done.exists():
        record = checkpoint.read_json(done, {"index": int, "steps": int, "metrics": dict})
        if record["failed"] is None:
            state, _ = checkpoint.load_model_files(stage_dir)
            student.load_state_dict(state)
            student.requires_grad_(False)
            return record, student, evaluate.draw(method.sampler(cfg, student, spec.steps), bench)
        shutil.rmtree(stage_dir)  # a failed stage is tried again from its start
    stage_dir.mkdir(parents=True, exist_ok=True)
    g = torch.Generator().manual_seed(cfg.seed * 1000 + spec.index)
    result = method.train(cfg, spec, stage_teacher, student, data, g, stage_dir / "partial.safetensors", cfg.quiet, teacher.device)
    student = result.model
    student.requires_grad_(False)
    if result.failed:
        record = stage_record(cfg, spec, {}, result, 0.0)
        checkpoint.atomic_write_json(done, record)
        return record, student, None
    metrics, x, eval_seconds = evaluate_stage(cfg, bench, spec, method, student, teacher, previous_samples)
    record = stage_record(cfg, spec, metrics, result, eval_seconds)
    checkpoint.save_model(stage_dir, student.state_dict(), teacher.student_meta(cfg, spec))
    checkpoint.atomic_write_json(stage_dir / "loss.json", {"loss": result.losses})
    report.sample_picture(x, bench, stage_dir / "samples.png", f"{cfg.method.name} stage {spec.index}: {spec.steps} steps")
    checkpoint.atomic_write_json(done, record)
    (stage_dir / "partial.safetensors").unlink(missing_ok=True)
    return record, student, x


def summarize(cfg, stages, records, reference, run_dir: Path) -> dict:
    chosen = stopping.choose(records)
    last = records[-1] if records else None
    if last and last["verdict"] == stopping.FAILED:
        why = f"stage {last['index']} failed: {last['rule']}"
    elif last and last["verdict"] == stopping.OVER:
        why = f"stage {last['index']} ({last['steps']} steps) left the tolerance: {last['rule']}"
    else:
        why = f"reached the target of {stages[-1].steps} steps" if stages else "nothing to do"
    summary = {"method": cfg.method.name, "stop_metric": cfg.stop.metric, "tolerance": cfg.stop.tolerance,
               "mode": cfg.stop.mode, "reference": reference, "stages": records, "stopped_because": why,
               "chosen": None if chosen is None else {"index": chosen["index"], "steps": chosen["steps"],
                                                      "folder": f"stage-{chosen['index']:02d}"},
               "failed": bool(last and last["verdict"] == stopping.FAILED)}
    checkpoint.atomic_write_json(run_dir / "summary.json", summary)
    return summary
