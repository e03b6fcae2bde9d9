"""End to end: the default recipe at tiny size through pipeline.run, with a real MLflow store.

Outside references: the MLflow store is read back with MLflow's own MlflowClient (runs, the
mlflow.parentRunId tag that the UI nests by, params, metric histories); the run folder is read with
json/safetensors. Sizes are tiny, so these tests assert on structure and the stop rule, not quality.
"""
import json
import os

import pytest
from hydra import compose, initialize_config_module

from distillrun import pipeline
from distillrun.config import register_configs, validate
from distillrun.recorder import recorder_for

os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")
TINY = ["teacher.iterations=150", "teacher.steps=8", "method.iterations=30", "eval.samples=256",
        "eval.bootstrap=5", "eval.projections=16", "compute.threads=1", "quiet=true", "data.n_train=4096",
        "net.width=32", "net.depth=2"]


def make_cfg(tmp_path, *extra):
    register_configs()
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        cfg = compose("run", overrides=[*TINY, f"run_dir={tmp_path / 'run'}",
                                        f"tracking.uri=sqlite:///{tmp_path / 'store.db'}",
                                        f"tracking.artifacts={tmp_path / 'artifacts'}", *extra])
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
    # Absolute tolerance on the NLL gap: 1-step DDIM-distilled students of a 150-iteration teacher
    # land far from the mixture, so a bound of 0.05 nats must trip before the 1-step target.
    cfg = make_cfg(tmp_path, "stop=absolute", "stop.metric=nll_gap", "stop.tolerance=0.05", "stop.z=0")
    summary = run(cfg)
    verdicts = [s["verdict"] for s in summary["stages"]]
    assert verdicts[-1] == "over" and "left the tolerance" in summary["stopped_because"]
    within = [s for s in summary["stages"] if s["verdict"] == "within"]
    assert summary["chosen"] == (None if not within else
                                 {"index": within[-1]["index"], "steps": within[-1]["steps"],
                                  "folder": f"stage-{within[-1]['index']:02d}"})
    client, runs = runs_of(cfg)
    tags = [r.data.tags.get("distillrun.verdict") for r in runs if "mlflow.parentRunId" in r.data.tags]
    assert "over" in tags


def test_changed_config_is_refused_on_resume(loose, tmp_path):
    cfg, _ = loose
    from omegaconf import OmegaConf
    changed = OmegaConf.merge(cfg, {"method": {"lr": 0.1}})
    with pytest.raises(pipeline.RunFolderError, match="method.lr"):
        pipeline.open_run_dir(changed)
