"""Crash and resume: the real CLI is SIGKILLed at chosen points and rerun on the same run folder; the result
must equal an uninterrupted run bit for bit, and the MLflow store must hold one parent and one child per stage.

Outside references: POSIX signal semantics (SIGKILL cannot be caught, so nothing of ours runs at the kill;
Python's subprocess reports it as returncode -9); MLflow's own MlflowClient reads the store back (runs, the
mlflow.parentRunId tag the UI nests by, metric histories). Kills are placed by the DISTILLRUN_KILL_AT test
hook (distillrun/checkpoint.py), so each one lands exactly where the test says.
"""
import json
import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pytest
from conftest import TINY, compose_run

from distillrun import checkpoint

# 3 progressive stages (8 -> 4 -> 2 -> 1 steps), a resume point every 10 iterations, one torch thread.
SMALL = ["teacher.iterations=60", "teacher.warmup=10", "teacher.steps=8", "method.iterations=20",
         "checkpoint_every=10", *TINY, "stop.tolerance=1000",
         "compute.teacher_cache=false"]  # these tests kill the teacher's training: it must not come from the cache
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "MLFLOW_DISABLE_TELEMETRY": "true", "PYTHONWARNINGS": "ignore"}


def cli(args, cwd, kill_at=None):
    """Run `python -m distillrun.cli args` to completion; returns the CompletedProcess."""
    env = {k: v for k, v in ENV.items() if k != "DISTILLRUN_KILL_AT"}
    if kill_at:
        env["DISTILLRUN_KILL_AT"] = kill_at
    return subprocess.run([sys.executable, "-m", "distillrun.cli", *args], cwd=cwd, env=env,
                          capture_output=True, text=True)


def fresh_store(tmp_path_factory, folder: Path) -> str:
    """A new, empty MLflow SQLite store in folder, copied from one made once per session (making one runs
    MLflow's schema migrations, ~7 s). Returns its tracking URI."""
    template = tmp_path_factory.getbasetemp() / "mlflow-template.db"
    if not template.exists():
        from mlflow import MlflowClient
        MlflowClient(tracking_uri=f"sqlite:///{template}").search_experiments()
    folder.mkdir(parents=True, exist_ok=True)
    shutil.copy(template, folder / "store.db")
    return f"sqlite:///{folder / 'store.db'}"


def reference_run(tmp_path_factory, extra=()):
    """The same run uninterrupted and in-process (same seed, one thread): the result a resume must equal."""
    from distillrun import pipeline
    from distillrun.recorder import recorder_for

    folder = tmp_path_factory.mktemp("reference")
    cfg = compose_run(*SMALL, *extra, f"run_dir={folder / 'run'}", "tracking.enabled=false")
    with recorder_for(cfg) as rec:
        pipeline.run(cfg, rec)
    return folder / "run"


def read(path):
    return json.loads(Path(path).read_text())


def assert_same_results(run: Path, ref: Path, stages: int):
    """Same weights (sha256 of the safetensors bytes), metrics, losses and choice as the uninterrupted run."""
    assert read(run / "teacher/model.json")["sha256"] == read(ref / "teacher/model.json")["sha256"]
    assert read(run / "reference.json")["teacher"] == read(ref / "reference.json")["teacher"]
    for i in range(1, stages + 1):
        a, b = run / f"stage-{i:02d}", ref / f"stage-{i:02d}"
        assert read(a / "model.json")["sha256"] == read(b / "model.json")["sha256"], a
        assert read(a / "metrics.json")["metrics"] == read(b / "metrics.json")["metrics"], a
        assert read(a / "loss.json") == read(b / "loss.json"), a
    assert read(run / "summary.json")["chosen"] == read(ref / "summary.json")["chosen"]
    left = [p.name for p in run.rglob("*") if p.name.endswith(".tmp") or p.name == "partial.safetensors"]
    assert left == []  # no temp files and no mid-run states once the run is done


def state_iteration(path: Path) -> int:
    return checkpoint.load_state(path)[1]["iteration"]


def mlflow_runs(uri):
    from mlflow import MlflowClient

    client = MlflowClient(tracking_uri=uri)
    exp = client.get_experiment_by_name("distillrun")
    runs = client.search_runs([exp.experiment_id])
    parents = [r for r in runs if "mlflow.parentRunId" not in r.data.tags]
    children = [r for r in runs if "mlflow.parentRunId" in r.data.tags]
    return client, parents, children


def assert_one_record(uri, run: Path, stages: int, iterations: int, teacher_iterations: int):
    """One parent and one child per stage, all FINISHED, every curve and metric logged exactly once."""
    client, parents, children = mlflow_runs(uri)
    assert len(parents) == 1 and len(children) == stages
    parent = parents[0]
    assert parent.info.run_id == read(run / "tracking.json")["pipeline"] and parent.info.status == "FINISHED"
    assert len(client.get_metric_history(parent.info.run_id, "teacher/loss")) == teacher_iterations
    assert len(client.get_metric_history(parent.info.run_id, "teacher/sw2")) == 1
    assert sorted(c.data.params["stage"] for c in children) == [str(i) for i in range(1, stages + 1)]
    for c in children:
        assert c.data.tags["mlflow.parentRunId"] == parent.info.run_id and c.info.status == "FINISHED"
        assert len(client.get_metric_history(c.info.run_id, "loss")) == iterations
        assert len(client.get_metric_history(c.info.run_id, "quality/sw2")) == 1


# Where each default kill lands, and what the folder must show right after it (proof the kill hit there).
# The first four run with tracking off (it may change between a run and its resume), the rest with MLflow on.
KILLS = [
    ("teacher:iteration=35", lambda r: not (r / "teacher/model.json").exists()
     and state_iteration(r / "teacher/partial.safetensors") == 30),  # mid-teacher, 5 iterations past a save
    ("write:stage-01/partial.safetensors", lambda r: not (r / "stage-01/partial.safetensors").exists()
     and any(r.glob("stage-01/.partial.safetensors.*.tmp"))),  # mid-stage, half-way through writing its state
    ("stage-02:weights", lambda r: (r / "stage-02/weights.safetensors").exists()
     and not (r / "stage-02/metrics.json").exists()),  # between a stage's weights and its completion marker
    ("stage-03:evaluate", lambda r: not (r / "stage-03/metrics.json").exists()
     and state_iteration(r / "stage-03/partial.safetensors") == 10),  # trained, killed during evaluation
]
TRACKED_KILLS = [
    ("tracking:stage-02", lambda r: "1" in read(r / "tracking.json")["stages"]
     and "2" not in read(r / "tracking.json")["stages"]),  # MLflow child created, its id not yet recorded
]


def kill_chain(tmp_path, uri, kills, tracked_kills, extra=()):
    """Kill the same command at each point in turn (untracked, then tracked), then let it finish."""
    run = tmp_path / "run"
    args = [*SMALL, *extra, f"run_dir={run}"]
    tracked = [f"tracking.uri={uri}", f"tracking.artifacts={tmp_path / 'artifacts'}"]
    for where, landed, more in [(w, f, ["tracking.enabled=false"]) for w, f in kills] + \
                               [(w, f, tracked) for w, f in tracked_kills]:
        p = cli([*args, *more], tmp_path, kill_at=where)
        assert p.returncode == -signal.SIGKILL, (where, p.returncode, p.stderr[-2000:])
        assert landed(run), where
    p = cli([*args, *tracked], tmp_path)
    assert p.returncode == 0, p.stderr[-2000:]
    return run


def test_killed_at_five_points_resumes_to_the_uninterrupted_result(tmp_path, tmp_path_factory):
    ref = reference_run(tmp_path_factory)
    uri = fresh_store(tmp_path_factory, tmp_path)
    run = kill_chain(tmp_path, uri, KILLS, TRACKED_KILLS)
    assert_same_results(run, ref, stages=3)
    assert_one_record(uri, run, stages=3, iterations=20, teacher_iterations=60)


SLOW_KILLS = [
    ("teacher:iteration=10", lambda r: state_iteration(r / "teacher/partial.safetensors") == 10),  # just after a save
    ("write:teacher/model.json", lambda r: (r / "teacher/weights.safetensors").exists()
     and not (r / "teacher/model.json").exists()),
    ("reference:evaluate", lambda r: not (r / "reference.json").exists()),
    ("stage-01:iteration=20", lambda r: not (r / "stage-01/weights.safetensors").exists()),  # last iteration
    ("write:stage-01/metrics.json", lambda r: not (r / "stage-01/metrics.json").exists()),
    ("stage-02:iteration=5", lambda r: not (r / "stage-02/partial.safetensors").exists()),  # before any save
    ("write:stage-02/weights.safetensors", lambda r: not (r / "stage-02/model.json").exists()),
    ("write:run/summary.json", lambda r: (r / "stage-03/metrics.json").exists() and not (r / "summary.json").exists()),
]
SLOW_TRACKED_KILLS = [
    ("tracking:pipeline", lambda r: read(r / "tracking.json")["pipeline"] is None),  # parent created, id unsaved
    ("tracking:stage-01", lambda r: read(r / "tracking.json")["stages"] == {}),
    ("tracking:stage-03", lambda r: "3" not in read(r / "tracking.json")["stages"]),
]


@pytest.mark.slow
@pytest.mark.parametrize("method", ["progressive", "consistency"])
def test_killed_at_eleven_more_points_resumes_to_the_uninterrupted_result(tmp_path, tmp_path_factory, method):
    # consistency: an EMA target network in the mid-stage state; ancestral teacher sampling seeds by steps.
    extra = ["teacher.sampler=ancestral"] + (["method=consistency", "method.steps=[4,2,1]", "method.grid_points=8"]
                                             if method == "consistency" else [])
    ref = reference_run(tmp_path_factory, extra)
    uri = fresh_store(tmp_path_factory, tmp_path)
    run = kill_chain(tmp_path, uri, SLOW_KILLS, SLOW_TRACKED_KILLS, extra)
    assert_same_results(run, ref, stages=3)
    assert_one_record(uri, run, stages=3, iterations=20, teacher_iterations=60)


def test_kill_hook_is_inert_when_unset():
    # The hook reads the environment once at import; this test process has no DISTILLRUN_KILL_AT.
    assert "DISTILLRUN_KILL_AT" not in os.environ and checkpoint.KILL_AT is None
    checkpoint.kill_point("stage-01:evaluate")  # returns: nothing named, nothing killed
