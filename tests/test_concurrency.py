"""Two runs writing one local MLflow store at once (as `--multirun` with a parallel launcher does) lose nothing.

Outside references: SQLite's locking (one writer at a time; a writer that waits past its busy timeout gets
"database is locked", https://www.sqlite.org/lockingv3.html); MLflow's own MlflowClient reads the store back.
The store is new, so both processes also race to create its tables (MLflow's schema migration), which is
what `distillrun -m ...` does on a first sweep with the default store.
"""
import contextlib
import os
import sqlite3
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


def test_locked_store_is_retried_then_reported_in_one_line(tmp_path, monkeypatch):
    # A really locked SQLite file: a connection holding BEGIN EXCLUSIVE keeps every other connection from
    # writing, and a writer that will not wait (Python's sqlite3, timeout=0) gets SQLite's own
    # "database is locked" (https://www.sqlite.org/lockingv3.html, https://www.sqlite.org/lang_transaction.html).
    path = tmp_path / "store.db"
    with contextlib.closing(sqlite3.connect(path)) as setup:
        setup.execute("CREATE TABLE metrics (value REAL)")
        setup.commit()
    holder = sqlite3.connect(path, isolation_level=None)
    holder.execute("BEGIN EXCLUSIVE")

    def write(table="metrics"):
        with contextlib.closing(sqlite3.connect(path, timeout=0)) as con, con:
            con.execute(f"INSERT INTO {table} VALUES (1.0)")

    def rows():
        with contextlib.closing(sqlite3.connect(path, timeout=5)) as con:
            return con.execute("SELECT COUNT(*) FROM metrics").fetchone()[0]

    sleeps, release_at = [], [3]

    def sleep(seconds):  # the back-off; the lock holder commits during the third one (first part only)
        sleeps.append(seconds)
        if len(sleeps) in release_at:
            holder.execute("COMMIT")
    monkeypatch.setattr(tracking.time, "sleep", sleep)
    tracker = tracking.Tracker(None, f"sqlite:///{path}", "0")
    tracker._call("log", write)
    assert len(sleeps) == 3 and rows() == 1  # retried while locked, written once the lock was gone

    holder.execute("BEGIN EXCLUSIVE")  # now held for good: every retry fails, then one line reports it
    sleeps.clear()
    release_at.clear()
    with pytest.raises(tracking.TrackingError, match="log failed .*database is locked") as e:
        tracker._call("log", write)
    assert len(sleeps) == tracking.LOCKED_RETRIES and "\n" not in str(e.value)
    holder.execute("ROLLBACK")
    holder.close()
    assert rows() == 1  # the refused writes left nothing behind

    sleeps.clear()  # any other SQLite error is reported at once, not retried
    with pytest.raises(tracking.TrackingError, match="no such table: runs"):
        tracker._call("log", write, "runs")
    assert sleeps == []
