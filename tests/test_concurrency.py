"""Two runs writing one local MLflow store at once (as `--multirun` with a parallel launcher does) lose nothing.

Outside references: SQLite's locking (one writer at a time; a writer that waits past its busy timeout gets
"database is locked", https://www.sqlite.org/lockingv3.html); MLflow's own MlflowClient reads the store back.
The store is new, so both processes also race to create its tables (MLflow's schema migration), which is
what `distillrun -m ...` does on a first sweep with the default store.
"""
import os
import subprocess
import sys

import pytest
from test_resume import ENV, SMALL, mlflow_runs

from distillrun import tracking


def test_two_runs_at_once_into_one_new_store_keep_every_record(tmp_path):
    uri = f"sqlite:///{tmp_path / 'store.db'}"
    procs = [subprocess.Popen([sys.executable, "-m", "distillrun.cli", *SMALL, f"seed={seed}",
                               f"run_dir={tmp_path / f'run{seed}'}", f"tracking.uri={uri}",
                               f"tracking.artifacts={tmp_path / 'artifacts'}"],
                              cwd=tmp_path, env=ENV, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
             for seed in (0, 1)]
    outs = [p.communicate() for p in procs]
    assert [p.returncode for p in procs] == [0, 0], [err[-2000:] for _, err in outs]
    client, parents, children = mlflow_runs(uri)
    assert len(parents) == 2 and len(children) == 6
    for parent in parents:
        assert parent.info.status == "FINISHED" and parent.data.params["seed"] in ("0", "1")
        mine = [c for c in children if c.data.tags["mlflow.parentRunId"] == parent.info.run_id]
        assert sorted(c.data.params["stage"] for c in mine) == ["1", "2", "3"]
        for c in mine:
            assert c.info.status == "FINISHED" and len(client.get_metric_history(c.info.run_id, "loss")) == 20
            assert "quality/sw2" in c.data.metrics
            assert sorted(a.path for a in client.list_artifacts(c.info.run_id)) == ["metrics.json", "samples.png"]
    assert os.path.exists(tmp_path / ".store.db.lock")  # how the table creation was serialised


class Flaky:
    """Fails with SQLite's lock error `fails` times, then answers."""

    def __init__(self, fails: int):
        self.fails, self.calls = fails, 0

    def __call__(self):
        self.calls += 1
        if self.calls <= self.fails:
            raise RuntimeError("(sqlite3.OperationalError) database is locked")
        return "ok"


def test_locked_store_is_retried_then_reported_in_one_line(monkeypatch):
    monkeypatch.setattr(tracking.time, "sleep", lambda s: None)
    tracker = tracking.Tracker(None, "sqlite:///x.db", "0")
    flaky = Flaky(tracking.LOCKED_RETRIES)
    assert tracker._call("log", flaky) == "ok" and flaky.calls == tracking.LOCKED_RETRIES + 1
    stuck = Flaky(10**6)
    with pytest.raises(tracking.TrackingError, match="log failed .*database is locked") as e:
        tracker._call("log", stuck)
    assert stuck.calls == tracking.LOCKED_RETRIES + 1 and "\n" not in str(e.value)
    calls = []

    def other_error():
        calls.append(1)
        raise RuntimeError("no such table: runs")
    with pytest.raises(tracking.TrackingError, match="no such table"):
        tracker._call("log", other_error)
    assert calls == [1]  # any other error is reported at once, not retried
