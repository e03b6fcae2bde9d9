"""End to end: the default recipe at tiny size through pipeline.run, with a real MLflow store.

Outside references: the MLflow store is read back with MLflow's own MlflowClient (runs, the
mlflow.parentRunId tag that the UI nests by, params, metric histories); the run folder is read with
json/safetensors. Sizes are tiny, so these tests assert on structure and the stop rule, not quality.
"""
import json
import os

import pytest
import torch
from conftest import TINY as TINY_SIZES, compose_run
from safetensors.torch import load_file

from distillrun import pipeline
from distillrun.config import validate
from distillrun.denoiser import NetDenoiser
from distillrun.nets.mlp import TimeMLP
from distillrun.recorder import recorder_for
from distillrun.schedule import Schedule

TINY = ["teacher.iterations=150", "teacher.steps=8", "method.iterations=30", *TINY_SIZES]


def make_cfg(tmp_path, *extra):
    cfg = compose_run(*TINY, f"run_dir={tmp_path / 'run'}", f"tracking.uri=sqlite:///{tmp_path / 'store.db'}",
                      f"tracking.artifacts={tmp_path / 'artifacts'}", *extra)
    validate(cfg)
    return cfg


def run(cfg):
    with recorder_for(cfg) as rec:
        return pipeline.run(cfg, rec, "archipelago_progressive")


def runs_of(cfg):
    from mlflow import MlflowClient

    client = MlflowClient(tracking_uri=cfg.tracking.uri)
    exp = client.get_experiment_by_name(cfg.tracking.experiment)
    return client, client.search_runs([exp.experiment_id])


@pytest.fixture(scope="module")
def loose(tmp_path_factory):
    """A loose tolerance: every stage passes and the run reaches its 1-step target."""
    tmp = tmp_path_factory.mktemp("loose")
    cfg = make_cfg(tmp, "stop.tolerance=1000")
    return cfg, run(cfg)


def test_run_folder_holds_every_stage(loose):
    cfg, summary = loose
    run_dir = tmp = cfg.run_dir
    assert [s["steps"] for s in summary["stages"]] == [4, 2, 1]  # 8 -> 4 -> 2 -> 1 (halving)
    assert summary["chosen"]["steps"] == 1 and "reached the target" in summary["stopped_because"]
    for i in (1, 2, 3):
        folder = os.path.join(run_dir, f"stage-{i:02d}")
        for name in ("weights.safetensors", "model.json", "metrics.json", "samples.png", "loss.json"):
            assert os.path.exists(os.path.join(folder, name)), (folder, name)
        metrics = json.load(open(os.path.join(folder, "metrics.json")))["metrics"]
        for key in ("quality/sw2", "quality/sw2_se", "quality/mmd2", "quality/nll_gap", "baseline/sw2",
                    "divergence/teacher_rms", "divergence/stage_teacher_rms", "divergence/teacher_switch"):
            assert key in metrics
    on_disk = json.load(open(os.path.join(tmp, "summary.json")))
    assert on_disk["chosen"] == summary["chosen"]
    assert all(s["verdict"] == "within" for s in on_disk["stages"])
    assert not os.path.exists(os.path.join(run_dir, "stage-01", "partial.safetensors"))


def test_mlflow_has_parent_and_one_child_per_stage(loose):
    cfg, summary = loose
    client, runs = runs_of(cfg)
    parents = [r for r in runs if "mlflow.parentRunId" not in r.data.tags]
    children = [r for r in runs if "mlflow.parentRunId" in r.data.tags]
    assert len(parents) == 1 and len(children) == 3
    parent = parents[0]
    assert all(c.data.tags["mlflow.parentRunId"] == parent.info.run_id for c in children)
    assert parent.data.params["method.name"] == "progressive" and parent.data.metrics["chosen/steps"] == 1
    assert parent.data.tags["distillrun.teacher_threads"] == "1"
    assert parent.data.tags["distillrun.teacher_cache"].startswith("stored ")  # trained here, then cached
    names = sorted(c.info.run_name for c in children)
    assert names[0] == "progressive · stage 1 · 4 steps"
    for c in children:
        assert {"method", "stage", "steps"} <= set(c.data.params)
        assert c.data.params["threads"] == "1"  # compute.threads=1: the count each stage trained with
        assert {"quality/sw2", "baseline/sw2", "divergence/teacher_rms", "seconds/train"} <= set(c.data.metrics)
        assert len(client.get_metric_history(c.info.run_id, "loss")) == 30  # the whole loss curve


def test_resume_of_a_finished_run_adds_no_runs(loose):
    cfg, summary = loose
    again = run(cfg)
    assert [s["metrics"] for s in again["stages"]] == [s["metrics"] for s in summary["stages"]]
    _, runs = runs_of(cfg)
    assert len(runs) == 4  # the parent was reopened, no stage run duplicated


def test_tight_tolerance_stops_early_and_names_last_passing_stage(tmp_path):
    # Absolute tolerance of 3 nats on the NLL gap, z = 0: at this size (teacher gap ~21.1 nats) the 4-step student
    # is within (~22.0) and the 2-step student over (~27.8), so the run must end at stage 2 of 3, choosing stage 1.
    # The rule itself is the project's (stop early at the first stage judged over, keep the last one within).
    cfg = make_cfg(tmp_path, "stop=absolute", "stop.metric=nll_gap", "stop.tolerance=3", "stop.z=0")
    summary = run(cfg)
    planned = json.load(open(os.path.join(cfg.run_dir, "plan.json")))
    verdicts = [s["verdict"] for s in summary["stages"]]
    assert len(planned) == 3 and verdicts == ["within", "over"]  # ends AT the first stage judged over
    assert "stage 2 (2 steps) left the tolerance" in summary["stopped_because"]
    assert summary["chosen"] == {"index": 1, "steps": 4, "folder": "stage-01"}  # the last stage within
    assert os.path.exists(os.path.join(cfg.run_dir, "stage-02", "metrics.json"))
    assert not os.path.exists(os.path.join(cfg.run_dir, "stage-03"))  # no later stage was started
    client, runs = runs_of(cfg)
    tags = sorted(r.data.tags.get("distillrun.verdict") for r in runs if "mlflow.parentRunId" in r.data.tags)
    assert tags == ["over", "within"]


def test_changed_config_is_refused_on_resume(loose, tmp_path):
    cfg, _ = loose
    from omegaconf import OmegaConf
    changed = OmegaConf.merge(cfg, {"method": {"lr": 0.1}})
    with pytest.raises(pipeline.RunFolderError, match="method.lr"):
        pipeline.open_run_dir(changed)


# ------------------------------------------------------------------ stage chaining (progressive distillation)
def rebuilt_denoiser(folder):
    """The stage's saved network, rebuilt by hand from its model.json and safetensors file (safetensors' loader)."""
    meta = json.loads((folder / "model.json").read_text())
    net = TimeMLP(dim=2, **meta["net"]["kwargs"])
    net.load_state_dict({k.removeprefix("net."): v for k, v in load_file(str(folder / "weights.safetensors")).items()})
    return NetDenoiser(net, meta["parameterization"], Schedule(meta["schedule"]))


def two_ddim_steps_target(teacher, x_t, t, steps):
    """Salimans & Ho 2022, Alg. 2, transcribed: two DDIM steps of the teacher t -> t' = t - 1/(2N) -> t'' = t - 1/N
    (z_s = alpha_s x_hat + sigma_s eps_hat, Song et al. 2021, Eq. 12 at eta = 0), then
    x~ = (z_t'' - (sigma_t''/sigma_t) z_t) / (alpha_t'' - (sigma_t''/sigma_t) alpha_t). The teacher sees float32
    inputs (a network's dtype); the step arithmetic is float64."""
    sch = teacher.schedule
    t, t1 = t.double(), t.double() - 0.5 / steps
    (a, s), (a1, s1), (a2, s2) = ((c[:, None] for c in sch.alpha_sigma(v)) for v in (t, t1, t - 1.0 / steps))
    predict = lambda x, time: (p.double() for p in teacher.predict(x.float(), time.float()))  # noqa: E731  net dtype
    x0_hat, eps_hat = predict(x_t, t)
    z1 = a1 * x0_hat + s1 * eps_hat
    x0_hat, eps_hat = predict(z1, t1)
    z2 = a2 * x0_hat + s2 * eps_hat
    return (z2 - (s2 / s) * x_t.double()) / (a2 - (s2 / s) * a)


def test_each_stage_distils_the_previous_stage_student(tmp_path, monkeypatch):
    # Salimans & Ho 2022, Alg. 2: the student of stage k-1 is the teacher of stage k, and stage k's student starts
    # as a copy of it. Data: the archipelago Gaussian mixture; stage 1's teacher is its exact denoiser (teacher=oracle,
    # the posterior mean, Bishop 2006, Eq. 2.116 per component). The targets each stage trained against are recorded
    # and recomputed here from the previous stage's saved weights.
    from distillrun.data.mixture import archipelago
    from distillrun.methods import progressive
    from distillrun.nets.oracle import OracleDenoiser

    targets, starts = [], {}
    original_loss, original_target = progressive.progressive_loss, progressive.two_teacher_steps

    def recording_loss(teacher, steps, *args, **kwargs):
        inner = original_loss(teacher, steps, *args, **kwargs)

        def loss(model, *rest):
            starts.setdefault(steps, {k: v.detach().clone() for k, v in model.state_dict().items()})
            return inner(model, *rest)
        return loss

    def recording_target(teacher, x_t, t, steps, *args, **kwargs):
        out = original_target(teacher, x_t, t, steps, *args, **kwargs)
        if sum(s == steps for s, *_ in targets) < 2:  # the first two iterations of each stage
            targets.append((steps, x_t.detach().clone(), t.detach().clone(), out.detach().clone()))
        return out

    monkeypatch.setattr(progressive, "progressive_loss", recording_loss)
    monkeypatch.setattr(progressive, "two_teacher_steps", recording_target)
    cfg = compose_run(*TINY_SIZES, "teacher=oracle", "teacher.iterations=40", "teacher.steps=8", "method.iterations=3",
                      "tracking=off", "stop.tolerance=1000", f"run_dir={tmp_path / 'run'}")
    with recorder_for(cfg) as rec:
        summary = pipeline.run(cfg, rec)
    assert [s["steps"] for s in summary["stages"]] == [4, 2, 1]
    run_dir = tmp_path / "run"
    oracle = OracleDenoiser(archipelago(), Schedule(cfg.teacher.schedule))
    teachers = {4: oracle, 2: rebuilt_denoiser(run_dir / "stage-01"), 1: rebuilt_denoiser(run_dir / "stage-02")}
    assert sorted({s for s, *_ in targets}) == [1, 2, 4] and len(targets) == 6
    for steps, x_t, t, target in targets:
        expected = two_ddim_steps_target(teachers[steps], x_t, t, steps)
        torch.testing.assert_close(target.double(), expected, rtol=1e-4, atol=1e-4, msg=f"student steps {steps}")
        if steps < 4:  # the check can tell teachers apart: the exact denoiser would have set other targets
            assert (two_ddim_steps_target(oracle, x_t, t, steps) - expected).abs().max() > 1e-2
    for steps, folder in ((4, "teacher"), (2, "stage-01"), (1, "stage-02")):
        saved = load_file(str(run_dir / folder / "weights.safetensors"))
        assert starts[steps].keys() == saved.keys()
        for k in saved:
            assert torch.equal(starts[steps][k], saved[k]), (folder, k)


def test_consistency_stages_continue_the_student_and_keep_the_teacher(tmp_path, monkeypatch):
    # Song et al. 2023, Alg. 2 distils the teacher's ODE, so every stage's teacher is the run's teacher (here the
    # exact mixture denoiser, teacher=oracle); a later stage (fewer sampling steps) continues training the previous
    # stage's consistency model rather than starting again (this project's staging). Recorded at each stage's first
    # loss call, checked against the previous stage's saved weights.
    from distillrun.methods import consistency
    from distillrun.nets.oracle import OracleDenoiser

    teachers, starts = [], []
    original_loss = consistency.consistency_loss

    def recording_loss(teacher, *args, **kwargs):
        inner = original_loss(teacher, *args, **kwargs)
        teachers.append(teacher)
        first = []

        def loss(model, *rest):
            if not first:
                first.append(1)
                starts.append({k: v.detach().clone() for k, v in model.state_dict().items()})
            return inner(model, *rest)
        return loss

    monkeypatch.setattr(consistency, "consistency_loss", recording_loss)
    cfg = compose_run(*TINY_SIZES, "teacher=oracle", "teacher.iterations=40", "teacher.steps=8", "method=consistency",
                      "method.steps=[2,1]", "method.grid_points=8", "method.iterations=3", "tracking=off",
                      "stop.tolerance=1000", f"run_dir={tmp_path / 'run'}")
    with recorder_for(cfg) as rec:
        summary = pipeline.run(cfg, rec)
    assert [s["steps"] for s in summary["stages"]] == [2, 1] and len(teachers) == len(starts) == 2
    assert all(isinstance(t, OracleDenoiser) for t in teachers)
    run_dir = tmp_path / "run"
    for start, folder in zip(starts, ("teacher", "stage-01")):
        saved = load_file(str(run_dir / folder / "weights.safetensors"))
        net = {k.split("net.", 1)[1]: v for k, v in start.items() if "net." in k}  # the wrapped network's weights
        assert net.keys() == {k.split("net.", 1)[1] for k in saved}, folder
        for k, v in saved.items():
            assert torch.equal(net[k.split("net.", 1)[1]], v), (folder, k)


def test_eval_detect_sizes_the_evaluation_to_the_target(tmp_path):
    # eval.detect: a pilot on exact data at eval.samples measures the panel's standard errors; a mean's se falls as
    # 1/sqrt(n) (textbook), so at the size chosen the smallest detectable worsening z sqrt2 se must be at about the
    # target. Checked by scoring exact data again at that size (another draw): within 25% of the target.
    import math

    from distillrun import evaluate, stopping

    cfg = make_cfg(tmp_path, "eval.samples=512", "eval.detect=0.008")
    data = pipeline.load_data(cfg)
    n = pipeline.evaluation_size(cfg, data)
    assert n > 512 and n % 256 == 0
    bench = evaluate.make_bench(data, n, 16, 5, 99, cond_needed=False)
    q = evaluate.quality(bench, bench.floor_set)
    detect = max(cfg.stop.z * math.sqrt(2) * q[f"{m}_se"] for m in stopping.rule_metrics(cfg.stop))
    assert 0.75 * 0.008 < detect < 1.25 * 0.008
    assert pipeline.evaluation_size(make_cfg(tmp_path, "eval.samples=512"), data) == 512  # no target: as configured
