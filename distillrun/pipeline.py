"""The stage loop: teacher -> [stage -> evaluate -> stop rule -> checkpoint -> track] -> ... -> summary.

Run folder (resumable; every file written atomically, a stage counts as done once its metrics.json exists):
  config.yaml            resolved config (a rerun with a different one is refused unless fresh=true)
  plan.json              the stages: student steps, teacher steps, iterations
  teacher/               weights.safetensors + model.json of the teacher network (or the oracle-fitted init)
  reference.json         teacher-at-full-steps and floor quality on the fixed noise bank
  stage-NN/              weights.safetensors, model.json, metrics.json, samples.png, loss.json; while training
                         partial.safetensors, the mid-run state every checkpoint_every iterations (weights, EMA,
                         Adam moments, LR schedule, batch/noise generator, losses, iteration; as teacher/ has)
  summary.json           every stage with its verdict, why the run stopped, and the chosen student
  tracking.json          MLflow run ids, so a resumed run continues its records
  .lock                  held (flock) by the one process writing the folder
"""
from __future__ import annotations

import copy
import math
import shutil
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import torch
from omegaconf import DictConfig

from . import adapters, checkpoint, distributed, evaluate, report, runfolder, stopping, threads
from .data import DATASETS, load_dataset
from .methods import Method, StageJob, StageSpec, method_named
from .nets import NETS, fast_layout, kind_for
from .samplers import sample, uniform_grid
from .teachers import Teacher, import_teacher, prepare_teacher

RunFolderError = runfolder.RunFolderError  # re-exported: the CLI and tests name it here
open_run_dir = runfolder.open_run_dir
METRICS_FIELDS = {"index": int, "steps": int, "teacher_steps": int, "method": str, "iterations": int,
                  "failed": (str, type(None)), "metrics": dict, "seconds": dict}  # a stage's metrics.json


class DataError(ValueError):
    """The configured data cannot be loaded; str() is one line naming the file or key."""


def load_data(cfg):
    try:
        return load_dataset(cfg.data)
    except (ValueError, OSError) as e:
        raise DataError(f"data ({cfg.data.name}): {e}") from None
    except (MemoryError, RuntimeError) as e:  # torch and numpy refuse an allocation larger than the machine
        if not is_out_of_memory(e):
            raise
        raise DataError(f"data.n_train={cfg.data.n_train}: the {cfg.data.name} data does not fit in memory; "
                        "lower data.n_train") from None


def is_out_of_memory(e: BaseException) -> bool:
    return isinstance(e, MemoryError) or "can't allocate memory" in str(e) or "out of memory" in str(e).lower()


def preflight(cfg: DictConfig):
    """Everything that can be checked before any file is written or any training starts: the data, one forward
    pass of the configured network on it, the user's teacher (import, weights, one forward pass), the run
    folder's config, the tracking store. Returns the loaded data. The global RNG is left as it was."""
    data = load_data(cfg)
    if cfg.data.path and DATASETS[cfg.data.name].reads_path:
        _check_spread(cfg, data)
    if cfg.teacher.source != "import" and NETS[cfg.net.kind].images != data.is_image:
        raise DataError(f"net.kind={cfg.net.kind} does not fit data of shape {data.shape}; "
                        f"use net={kind_for(data.is_image)}")
    if cfg.net.class_cond and data.labels is None:
        raise DataError(f"net.class_cond=true (method={cfg.method.name}) but data.name={cfg.data.name} has no labels; "
                        "give labelled data, or net.class_cond=false where the method allows it")
    with torch.random.fork_rng(devices=[]):  # user code and network init must not shift the run's seed
        if cfg.teacher.source == "import":
            net = import_teacher(cfg.teacher.factory, cfg.teacher.factory_kwargs, cfg.teacher.weights, data.shape,
                                 data.num_classes if cfg.net.class_cond else 0)
        else:
            net = _try_network(cfg, data)
        if cfg.adapter.enabled:
            _check_adapter(cfg, net)
    runfolder.check(cfg)
    if cfg.tracking.enabled:
        from .tracking import check_reachable
        check_reachable(cfg.tracking.uri)
    return data


def _check_spread(cfg, data) -> None:
    """Quality metrics scale distances by the median pairwise one, which is 0 when most samples coincide."""
    _, counts = torch.unique(data.x.flatten(1), dim=0, return_counts=True)
    if 2 * int(counts.max()) > len(data.x):
        raise DataError(f"data.path={cfg.data.path}: {int(counts.max())} of its {len(data.x)} samples are one and the "
                        "same point; valid: at least 2 samples, none repeated in more than half of them")


def _check_adapter(cfg, net) -> None:
    """Adapter settings against the (untrained or imported) teacher network: every layer pattern matches a layer;
    an adapter.start_from file fits its layers, and names this teacher unless allow_other_base (checked here for
    imported teachers, whose weights are known; a trained teacher's are checked when stage 1 starts)."""
    adapters.attach(copy.deepcopy(net), adapters.spec_from(cfg.adapter))
    if cfg.adapter.start_from:
        start = adapters.Adapter.read(cfg.adapter.start_from)
        probe = copy.deepcopy(net)
        start.check_fits(probe)
        if cfg.teacher.source == "import":
            start.apply(probe, allow_other_base=cfg.adapter.allow_other_base, override_key="adapter.allow_other_base")


def _try_network(cfg, data):
    """Build the configured network and run it on two data points: a size it cannot take fails here.
    Returns the network."""
    from .methods.teacher import network_for

    try:
        net, _ = network_for(cfg, data)
        with torch.no_grad():
            out = net(data.x[:2], torch.full((min(2, len(data.x)),), 0.5),
                      data.labels[:2] if cfg.net.class_cond else None)
        if out.shape != data.x[:2].shape:
            raise ValueError(f"output shape {tuple(out.shape)}")
    except Exception as e:  # the sizes do not fit together: name the keys, not the layer
        first = (str(e).strip().splitlines() or [type(e).__name__])[0][:160]
        sizes = NETS[cfg.net.kind].size_keys
        shown = ", ".join(f"net.{k}={list(cfg.net[k]) if k == 'mults' else cfg.net[k]}" for k in sizes)
        raise DataError(f"net={cfg.net.kind} ({shown}) cannot take data of shape {data.shape} ({first}); "
                        f"change those sizes or the data") from None
    return net


def plan_stages(cfg: DictConfig) -> list[StageSpec]:
    return method_named(cfg.method.name).plan(cfg)


def teacher_sampler(teacher, steps: int, sampler: str = "ddim") -> Callable:
    """The teacher on a uniform grid of `steps` (its full steps, or a baseline at a student's steps)."""
    teacher = fast_layout(teacher)
    return lambda noise, cond: sample(teacher, noise, uniform_grid(steps), sampler, cond=cond,
                                      generator=torch.Generator().manual_seed(steps))


def describe_plan(cfg: DictConfig, stages: list[StageSpec]) -> str:
    lines = [f"method {cfg.method.name}: teacher at {cfg.teacher.steps} steps ({cfg.teacher.source}), "
             f"{len(stages)} stages, {sum(s.iterations for s in stages)} student iterations"]
    lines += [f"  stage {s.index}: {s.teacher_steps} -> {s.steps} steps, {s.iterations} iterations" for s in stages]
    return "\n".join(lines)


def reference_quality(cfg, bench, teacher: Teacher, run_dir: Path) -> dict:
    """Teacher at full steps and the floor, computed once per run and cached in reference.json."""
    path = run_dir / "reference.json"
    samples, secs = evaluate.cached_draw(bench, f"teacher@{cfg.teacher.steps}",
                                         teacher_sampler(teacher.denoiser, cfg.teacher.steps, cfg.teacher.sampler))
    if path.exists():
        hint = f"delete {path} to recompute it"
        ref = checkpoint.read_json(path, {"teacher": dict, "floor": dict, "steps": int}, hint)
        if ref["steps"] != cfg.teacher.steps:
            raise checkpoint.CheckpointError(f"{path}: made for teacher.steps={ref['steps']}, not {cfg.teacher.steps}; "
                                             f"{hint}")
        return ref
    checkpoint.kill_point("reference:evaluate")
    t0 = time.perf_counter()
    ref = {"teacher": evaluate.quality(bench, samples), "floor": evaluate.quality(bench, bench.floor_set),
           "steps": cfg.teacher.steps, "samples": int(bench.noise.shape[0]), "seconds": secs + time.perf_counter() - t0}
    checkpoint.atomic_write_json(path, ref)
    return ref


def evaluation_size(cfg, data, run_dir: Path | None = None) -> int:
    """eval.samples, or with eval.detect set, the size at which the stop rule's metrics detect a worsening of
    eval.detect at stop.z. A pilot scores exact data against exact data at eval.samples (the teacher's se is about
    the same); a mean's se falls as 1/sqrt(n), so n = eval.samples * (z * sqrt(2) * se / eval.detect)^2, the
    largest over the judged metrics, rounded up to a multiple of 256 (at least 512). Kept in reference.json, so a
    resumed run reuses it."""
    n0 = cfg.eval.samples
    if cfg.eval.detect is None:
        return n0
    if run_dir is not None and (run_dir / "reference.json").exists():
        import json
        kept = json.loads((run_dir / "reference.json").read_text()).get("samples")
        if kept:
            return int(kept)
    pilot = evaluate.make_bench(data, n0, cfg.eval.projections, cfg.eval.bootstrap, cfg.eval.seed + 7,
                                cond_needed=False)
    q = evaluate.quality(pilot, pilot.floor_set)
    n = 512
    for m in stopping.rule_metrics(cfg.stop):
        se = q.get(f"{m}_se", math.nan)
        if math.isfinite(se) and se > 0:
            n = max(n, stopping.samples_for(n0, cfg.stop.z * math.sqrt(2) * se, cfg.eval.detect))
    print(f"eval.detect={cfg.eval.detect:g}: evaluating on {n} samples (pilot at {n0})", flush=True)
    return n


def student_samples(cfg, method: Method, student, steps: int, bench) -> torch.Tensor:
    """The student's samples on the run's noise bank."""
    return evaluate.draw(method.sampler(cfg.method, student, steps, cfg.eval.seed), bench)


def evaluate_stage(run: "RunParts", spec: StageSpec, student, previous_samples):
    """Quality, baseline and divergence of one stage's student; returns (metrics, student samples, seconds)."""
    cfg, bench = run.cfg, run.bench
    t0 = time.perf_counter()
    x = student_samples(cfg, run.method, student, spec.steps, bench)
    own = run.method.evaluate(cfg, bench, spec, student, run.teacher.denoiser, run.teacher.num_classes)
    if own is not None:  # the method scores its own students (guided: at every w of a grid)
        return own, x, time.perf_counter() - t0
    out = evaluate.prefixed("quality", evaluate.quality(bench, x))
    full = bench.cache[f"teacher@{cfg.teacher.steps}"]
    out.update(evaluate.divergence(bench, x, full, "teacher"))
    if previous_samples is not None:
        out.update(evaluate.divergence(bench, x, previous_samples, "stage_teacher"))
    if cfg.eval.baseline:
        base, _ = evaluate.cached_draw(bench, f"teacher@{spec.steps}",
                                       teacher_sampler(run.teacher.denoiser, spec.steps, "ddim"))
        out.update(evaluate.prefixed("baseline", evaluate.quality(bench, base)))
    return out, x, time.perf_counter() - t0


def stage_record(cfg, spec: StageSpec, metrics: dict, result, eval_seconds: float) -> dict:
    return {"index": spec.index, "steps": spec.steps, "teacher_steps": spec.teacher_steps, "method": cfg.method.name,
            "iterations": len(result.losses), "failed": result.failed, "metrics": metrics,
            "seconds": {"train": result.seconds, "eval": eval_seconds}, "its_per_s": result.its_per_s,
            "threads": threads.last_summary() or str(cfg.compute.threads),
            "final_loss": result.losses[-1] if result.losses else math.nan}


def attach_verdict(cfg, record: dict, reference: dict) -> dict:
    """Judge a stage with the current stop rule (re-judged on resume, so a looser tolerance continues)."""
    if record["failed"]:
        v = stopping.Verdict(stopping.FAILED, math.nan, math.nan, math.nan, f"training failed: {record['failed']}")
    elif (own := method_named(cfg.method.name).judge(cfg, record["metrics"])) is not None:
        v = own
    else:
        quality = {k.split("/", 1)[1]: val for k, val in record["metrics"].items() if k.startswith("quality/")}
        v = stopping.judge_rule(quality, reference["teacher"], cfg.stop)
    return {**record, "verdict": v.verdict, "rule": v.reason, "limit": v.limit, "margin": v.margin,
            "decided_by": v.metric or None, "seen": v.seen, "detectable": v.detectable, "panel": v.panel}


@dataclass
class RunParts:
    """What every stage of one run shares. Under torchrun, ranks other than 0 train in lockstep with rank 0
    (DDP) but write, evaluate and record nothing: is_main is False and bench is None there."""
    cfg: DictConfig
    method: Method
    data: object
    teacher: Teacher
    run_dir: Path
    is_main: bool
    bench: evaluate.Bench | None = None
    adapter_start: adapters.Adapter | None = None  # adapter.start_from's contents: where stage 1's adapter starts
    train_cfg: DictConfig | None = None  # cfg as the stages train with it (adapter.lr in place of method.lr)


def run(cfg: DictConfig, recorder, recipe: str | None = None, data=None) -> dict | None:
    """Run (or resume) the whole pipeline; returns the summary written to summary.json (None on ranks other
    than 0 under torchrun). `data` is what preflight(cfg) returned, if the caller already ran it."""
    from .teachers import resolve_device

    with threads.run_policy(cfg.compute.threads, probe=resolve_device(cfg.compute.device).type == "cpu"):
        return _run_pipeline(cfg, recorder, recipe, data)


def _run_pipeline(cfg: DictConfig, recorder, recipe: str | None, data) -> dict | None:
    torch.manual_seed(cfg.seed)
    data = data if data is not None else preflight(cfg)
    stages = plan_stages(cfg)
    is_main = distributed.is_main()
    run_dir = open_run_dir(cfg) if is_main else Path(cfg.run_dir)  # locked for rank 0 until the end of the run
    distributed.barrier()  # the other ranks wait until the folder is ready (fresh=true may have emptied it)
    try:
        return _run(cfg, recorder, recipe, data, stages, run_dir)
    finally:
        if is_main:
            runfolder.unlock(run_dir)


def _run(cfg: DictConfig, recorder, recipe, data, stages: list[StageSpec], run_dir: Path) -> dict | None:
    is_main = distributed.is_main()
    if is_main:
        checkpoint.atomic_write_json(run_dir / "plan.json", [vars(s) for s in stages])
        recorder.start(run_dir, recipe)
    teacher = prepare_teacher(cfg, data, run_dir)
    run = RunParts(cfg, method_named(cfg.method.name), data, teacher, run_dir, is_main)
    run.train_cfg = cfg
    if cfg.adapter.enabled:
        if cfg.adapter.start_from:
            run.adapter_start = adapters.Adapter.read(cfg.adapter.start_from)
        if cfg.adapter.lr is not None:
            from omegaconf import OmegaConf

            run.train_cfg = OmegaConf.merge(cfg, {"method": {"lr": cfg.adapter.lr}})
    previous_samples = reference = None
    if is_main:
        recorder.teacher(teacher)
        samples = evaluation_size(cfg, data, run_dir)
        run.bench = evaluate.make_bench(data, samples, cfg.eval.projections, cfg.eval.bootstrap,
                                        cfg.eval.seed, cond_needed=teacher.num_classes > 0)
        reference = reference_quality(cfg, run.bench, teacher, run_dir)
        for line in stopping.power_warnings(reference["teacher"], cfg.stop, samples):
            print(f"warning: {line}", flush=True)
        recorder.reference(reference)
        previous_samples = run.bench.cache[f"teacher@{cfg.teacher.steps}"]
    records, previous, stage_teacher = [], teacher.init_student, teacher.denoiser
    for spec in stages:
        record, student, x = run_stage(run, spec, stage_teacher, previous, previous_samples)
        go_on = None
        if is_main:
            record = attach_verdict(cfg, record, reference)
            records.append(record)
            recorder.stage(record, run_dir / f"stage-{spec.index:02d}")
            go_on = record["verdict"] == stopping.WITHIN
        if not distributed.share_flag(go_on):  # rank 0's verdict, on every rank
            break
        previous, previous_samples = student, x
        if run.method.chains_teacher:
            stage_teacher = student
    if not is_main:
        return None
    summary = summarize(cfg, stages, records, reference, run_dir)
    if any(r["metrics"] for r in records):  # no point to draw when stage 1 failed (the log axis needs one)
        report.write_plots(summary, run_dir)
        run.method.summary_plots(summary, run_dir)
    recorder.finish(summary, run_dir)
    return summary


def finished_record(done: Path, spec: StageSpec) -> dict:
    """A stage's metrics.json (its completion marker), checked against the fields and the stage it is for."""
    hint = f"delete {done.parent} to run the stage again"
    record = checkpoint.read_json(done, METRICS_FIELDS, hint)
    if (record["index"], record["steps"]) != (spec.index, spec.steps):
        raise checkpoint.CheckpointError(f"{done}: is for stage {record['index']} at {record['steps']} steps, "
                                         f"not stage {spec.index} at {spec.steps}; {hint}")
    return record


def stage_seed(cfg, spec: StageSpec) -> int:
    """Seed of the generator behind every random draw of a stage's training."""
    return cfg.seed * 1000 + spec.index


def make_student(run: RunParts, previous):
    """The method's student for the next stage; with adapter students, the frozen teacher plus adapters
    (carried over from the previous stage's student, or new ones, or adapter.start_from's at stage 1)."""
    student = run.method.make_student(run.cfg, previous, run.data)
    if run.cfg.adapter.enabled:
        adapters.adapt_student(student, run.cfg.adapter, run.adapter_start)
    return student


def load_student(student, stage_dir: Path) -> None:
    """A finished stage's weights into the student built for it: the whole network, or (adapter students)
    the saved adapter onto the run's teacher."""
    if not adapters.is_adapter_student(student):
        runfolder.load_model_into(student, stage_dir)
        return
    state, meta = checkpoint.load_model_files(stage_dir, f"delete {stage_dir} to recompute it")
    if "adapter" not in meta:
        raise checkpoint.CheckpointError(f"{stage_dir / checkpoint.MODEL_FILE}: holds a full student, but this run "
                                         f"makes adapter students (adapter.enabled=true); delete {stage_dir} to "
                                         "recompute it")
    adapters.load_into_student(student, state, meta["adapter"], str(stage_dir / checkpoint.WEIGHTS_FILE))


def save_student(run: RunParts, spec: StageSpec, student, stage_dir: Path) -> None:
    """weights.safetensors + model.json of a stage: the whole network, or (adapter students) the adapter alone
    with its base teacher's content hash and where `draw` finds that teacher."""
    meta = run.teacher.student_meta(run.method, run.cfg.method, student, spec)
    if not adapters.is_adapter_student(student):
        checkpoint.save_model(stage_dir, student.state_dict(), meta)
        return
    info = {"method": run.cfg.method.name, "stage": spec.index, "steps": spec.steps}
    tensors, desc = adapters.student_payload(student, run.cfg.adapter.train_also, info)
    base = {"folder": "teacher"} if run.cfg.teacher.source != "import" else \
        {"weights": str(Path(run.cfg.teacher.weights).resolve())}
    checkpoint.save_model(stage_dir, tensors, {**meta, "adapter": desc, "base": base})


def run_stage(run: RunParts, spec: StageSpec, stage_teacher, previous, previous_samples):
    """Train (or load, if already done) one stage and, on rank 0, evaluate and save it; returns (record,
    student, samples), record and samples None on other ranks. A kill at any point leaves either a finished
    stage (metrics.json written last) or one that trains again from its last mid-run state."""
    cfg, method = run.cfg, run.method
    stage_dir = run.run_dir / f"stage-{spec.index:02d}"
    student = make_student(run, previous)
    trainable = adapters.trainable_count(student)
    done = stage_dir / "metrics.json"
    if done.exists():
        record = finished_record(done, spec)
        if record["failed"] is None:
            load_student(student, stage_dir)
            student.requires_grad_(False)
            if not run.is_main:
                return None, student, None
            (stage_dir / "partial.safetensors").unlink(missing_ok=True)  # a kill came between metrics.json and this
            return record, student, student_samples(cfg, method, student, spec.steps, run.bench)
        if run.is_main:
            shutil.rmtree(stage_dir)  # a failed stage is tried again from its start
    if run.is_main:
        stage_dir.mkdir(parents=True, exist_ok=True)
    # a stage teacher with adapters runs with them folded into its weights (same outputs, cheaper calls)
    job = StageJob(spec, adapters.frozen_teacher(stage_teacher), student, run.data,
                   torch.Generator().manual_seed(stage_seed(cfg, spec)), stage_dir / "partial.safetensors",
                   run.teacher.device, cfg.quiet)
    result = method.train(run.train_cfg or cfg, job)
    student = result.model
    student.requires_grad_(False)
    if not run.is_main:
        return None, student, None
    if result.failed:
        record = stage_record(cfg, spec, {}, result, 0.0)
        checkpoint.atomic_write_json(done, record)
        return record, student, None
    checkpoint.kill_point(f"{stage_dir.name}:evaluate")
    metrics, x, eval_seconds = evaluate_stage(run, spec, student, previous_samples)
    record = stage_record(cfg, spec, metrics, result, eval_seconds)
    save_student(run, spec, student, stage_dir)
    # what the student costs to train and to ship, next to its quality (tables, MLflow, compare)
    record["metrics"].update({"size/trainable_params": trainable,
                              "size/saved_bytes": (stage_dir / checkpoint.WEIGHTS_FILE).stat().st_size})
    checkpoint.kill_point(f"{stage_dir.name}:weights")
    checkpoint.atomic_write_json(stage_dir / "loss.json", {"loss": result.losses})
    report.sample_picture(x, run.bench, stage_dir / "samples.png",
                          f"{cfg.method.name} stage {spec.index}: {report.n_steps(spec.steps)}")
    checkpoint.atomic_write_json(done, record)
    (stage_dir / "partial.safetensors").unlink(missing_ok=True)
    return record, student, x


def summarize(cfg, stages, records, reference, run_dir: Path) -> dict:
    chosen = stopping.choose(records)
    last = records[-1] if records else None
    if last and last["verdict"] == stopping.FAILED:
        why = f"stage {last['index']} failed: {last['rule']}"
    elif last and last["verdict"] == stopping.OVER:
        why = f"stage {last['index']} ({report.n_steps(last['steps'])}) left the tolerance: {last['rule']}"
    else:
        why = f"reached the target of {report.n_steps(stages[-1].steps)}" if stages else "nothing to do"
    students = f"adapter rank {cfg.adapter.rank}" if cfg.adapter.enabled else "full"
    judged = [r for r in records if r.get("decided_by")]
    summary = {"method": cfg.method.name, "students": students, "stop_rule": cfg.stop.metric,
               # the metric that decided the last judged stage (tables and plots show it); the rule's own, if one
               "stop_metric": judged[-1]["decided_by"] if judged else stopping.rule_metrics(cfg.stop)[0],
               "panel": list(cfg.stop.panel) if cfg.stop.metric == stopping.PANEL else None,
               "tolerance": stopping.tolerance_of(cfg.stop), "mode": cfg.stop.mode, "z": cfg.stop.z,
               "power_warnings": stopping.power_warnings(reference["teacher"], cfg.stop, reference.get("samples", 0)),
               "reference": reference, "stages": records, "stopped_because": why,
               "chosen": None if chosen is None else {"index": chosen["index"], "steps": chosen["steps"],
                                                      "folder": f"stage-{chosen['index']:02d}"},
               "failed": bool(last and last["verdict"] == stopping.FAILED)}
    checkpoint.atomic_write_json(run_dir / "summary.json", summary)
    return summary
