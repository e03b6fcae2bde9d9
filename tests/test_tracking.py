"""Tracking: parent/child runs, resume by id, batching limits, disabled mode, fail-fast checks.

Outside references: everything is read back with MLflow's own MlflowClient (get_parent_run,
search_runs, get_metric_history, list_artifacts) and compared with MLflow's documented limits in
mlflow.utils.validation; SQLite URLs are parsed with SQLAlchemy's make_url.
"""
import os
import shlex
import subprocess
import sys
from pathlib import Path

import pytest
from omegaconf import OmegaConf

from distillrun import tracking
from distillrun.tracking import TrackingError, Tracker

os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")  # no usage reports from tests (MLflow env var)


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """One SQLite store per module: MLflow creates its tables on first use, which takes seconds."""
    root = tmp_path_factory.mktemp("mlflow")
    uri = f"sqlite:///{root}/t.db"
    from mlflow import MlflowClient

    return {"uri": uri, "root": root, "client": MlflowClient(tracking_uri=uri)}


def _open(store, experiment):
    return Tracker.open(store["uri"], experiment, artifact_location=str(store["root"] / "artifacts" / experiment))


def _run_pipeline(store, monkeypatch):
    tracker = _open(store, "nesting")
    sizes = []
    real = tracker.client.log_batch
    monkeypatch.setattr(tracker.client, "log_batch", lambda run_id, **kw: (
        sizes.append({k: len(v) for k, v in kw.items()}), real(run_id, **kw))[1])
    params = {"method": {"name": "progressive", "lr": 3e-4}, "note": "x" * 700,
              **{f"extra.k{i}": i for i in range(150)}}
    pid = tracker.start_pipeline("pipeline", params, tags={"recipe": "spiral-tiny"})
    s1 = tracker.start_stage("stage-01", {"steps": 4})
    tracker.log_metrics({"quality": 0.25, "nll_gap": None}, step=4)
    tracker.log_series("loss", [1.0 / (i + 1) for i in range(2500)])
    picture = store["root"] / "grid.txt"
    picture.write_text("pixels")
    tracker.log_artifact(picture, "samples")
    tracker.end_stage()
    s2 = tracker.start_stage("stage-02", {"steps": 2})
    tracker.end_stage("FAILED")
    tracker.close()
    return pid, s1, s2, sizes


def test_parent_child_runs_read_back(store, monkeypatch):
    from mlflow.utils.validation import MAX_METRICS_PER_BATCH, MAX_PARAM_VAL_LENGTH, MAX_PARAMS_TAGS_PER_BATCH

    pid, s1, s2, sizes = _run_pipeline(store, monkeypatch)
    client = store["client"]
    assert client.get_parent_run(s1).info.run_id == pid  # MLflow's own reading of the nesting
    exp = client.get_experiment_by_name("nesting").experiment_id
    children = client.search_runs([exp], filter_string=f"tags.`mlflow.parentRunId` = '{pid}'")
    assert {r.info.run_id for r in children} == {s1, s2}
    status = {r.info.run_id: r.info.status for r in children}
    assert status == {s1: "FINISHED", s2: "FAILED"}
    parent = client.get_run(pid)
    assert parent.info.status == "FINISHED" and parent.data.tags["recipe"] == "spiral-tiny"
    assert parent.data.params["method.lr"] == "0.0003" and parent.data.params["extra.k149"] == "149"
    assert len(parent.data.params["note"]) == tracking.PARAM_VALUE_LIMIT <= MAX_PARAM_VAL_LENGTH
    stage = client.get_run(s1)
    assert stage.data.params == {"steps": "4"} and stage.data.metrics == {"quality": 0.25, "loss": 1 / 2500}
    history = client.get_metric_history(s1, "loss")
    assert sorted(m.step for m in history) == list(range(2500))
    assert [a.path for a in client.list_artifacts(s1, "samples")] == ["samples/grid.txt"]
    assert max(s.get("metrics", 0) for s in sizes) <= MAX_METRICS_PER_BATCH
    assert max(s.get("params", 0) for s in sizes) <= MAX_PARAMS_TAGS_PER_BATCH


def test_resume_reopens_same_runs(store):
    tracker = _open(store, "resume")
    pid = tracker.start_pipeline("pipeline", {"method": {"lr": 0.1}})
    sid = tracker.start_stage("stage-01", {"steps": 4})
    tracker.log_series("loss", [3.0, 2.0])
    tracker.close("KILLED")  # the process died here
    client = store["client"]
    exp = client.get_experiment_by_name("resume").experiment_id
    before = len(client.search_runs([exp]))

    again = _open(store, "resume")
    assert again.start_pipeline("pipeline", {"method": {"lr": 0.2}}, resume_run_id=pid) == pid
    assert client.get_run(pid).info.status == "RUNNING"
    assert again.stage_runs() == {"stage-01": sid}
    assert again.start_stage("stage-01", {"steps": 4}, resume_run_id=sid) == sid
    again.log_series("loss", [1.0], step_offset=2)
    again.close()
    assert len(client.search_runs([exp])) == before  # continued, not duplicated
    assert [m.value for m in sorted(client.get_metric_history(sid, "loss"), key=lambda m: m.step)] == [3.0, 2.0, 1.0]
    parent = client.get_run(pid)
    assert parent.info.status == "FINISHED" and parent.data.params["method.lr"] == "0.1"
    assert parent.data.tags[tracking.CHANGED_TAG] == "method.lr: 0.1 -> 0.2"


def test_resume_rejects_foreign_stage(store):
    tracker = _open(store, "foreign")
    tracker.start_pipeline("a")
    other = tracker.client.create_run(tracker.experiment_id, run_name="unrelated").info.run_id
    with pytest.raises(TrackingError, match=f"run {other} is not a stage of run"):
        tracker.start_stage("stage-01", resume_run_id=other)
    tracker.close()


def test_disabled_tracker_writes_nothing(tmp_path):
    uri = f"sqlite:///{tmp_path}/off.db"
    tracker = Tracker.open(uri, "x", enabled=False)
    assert tracker.start_pipeline("p", {"a": 1}) is None
    tracker.start_stage("s", {"b": 2})
    tracker.log_params({"c": 3})
    tracker.log_metrics({"q": 1.0}, step=1)
    tracker.log_series("loss", [1.0, 2.0])
    tracker.log_artifact(tmp_path / "missing.png")
    tracker.set_tags({"t": "v"})
    tracker.end_stage("FAILED")
    tracker.close()
    assert list(tmp_path.iterdir()) == []


def test_import_is_cheap():
    code = "import sys, distillrun.tracking; print('mlflow' in sys.modules)"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=Path(__file__).parents[1])
    assert out.stdout.strip() == "False"


def test_unreachable_server_fails_in_one_line():
    uri = "http://127.0.0.1:9"  # discard port: nothing listens there
    with pytest.raises(TrackingError) as exc:
        tracking.check_reachable(uri, timeout=2.0)
    text = str(exc.value)
    assert uri in text and "\n" not in text


def test_sqlite_folder_not_writable(tmp_path):
    blocker = tmp_path / "afile"
    blocker.write_text("a file where the store's folder should be")
    uri = f"sqlite:///{blocker}/sub/t.db"
    with pytest.raises(TrackingError) as exc:
        tracking.check_reachable(uri)
    assert uri in str(exc.value) and "\n" not in str(exc.value)
    tracking.check_reachable(f"sqlite:///{tmp_path}/new/folder/t.db")  # MLflow creates missing folders


def test_ui_hint(tmp_path, monkeypatch):
    from sqlalchemy.engine import make_url

    monkeypatch.chdir(tmp_path)
    words = shlex.split(tracking.ui_hint("sqlite:///mlflow.db"))
    assert words[:3] == ["mlflow", "ui", "--backend-store-uri"]
    assert make_url(words[3]).database == str(tmp_path / "mlflow.db")  # absolute: works from any folder
    assert tracking.ui_hint("http://tracking.example:5000") == "open http://tracking.example:5000"


def test_flatten_nested_config():
    cfg = {"method": {"name": "progressive", "lr": 3e-4}, "net": {"mults": [1, 2]}, "extra": {}, "seed": 0}
    expected = {"method.name": "progressive", "method.lr": "0.0003", "net.mults": "[1, 2]",
                "extra": "{}", "seed": "0"}
    assert tracking.flatten(cfg) == expected
    assert tracking.flatten(OmegaConf.create(cfg)) == expected  # Hydra configs arrive as DictConfig
    assert tracking.flatten({"b": 1}, prefix="stage.") == {"stage.b": "1"}
