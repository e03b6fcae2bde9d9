"""Experiment tracking behind one small object; the only module that imports mlflow (lazily).

One parent run per pipeline and one child run per stage, linked by the `mlflow.parentRunId` tag
(how the MLflow UI nests runs). Every call goes through `MlflowClient` with an explicit run id,
never the global active-run stack, so a resumed pipeline reopens its runs by id and several
processes can write one store. `Tracker.open(..., enabled=False)` gives a `NullTracker` whose
methods do nothing, so pipeline code needs no ifs.
"""
from __future__ import annotations

import contextlib
import fcntl
import os
import shlex
import time
from pathlib import Path
from typing import Any, Iterable, Mapping
from urllib.parse import urlparse

PARAM_VALUE_LIMIT = 500  # longest param value every MLflow server accepts (recent ones take 6000)
TAG_VALUE_LIMIT = 5000  # same idea for tag values (recent servers take 8000)
METRICS_PER_BATCH = 1000  # MLflow LogBatch request limits: 1000 metrics, 100 params, 100 tags
PARAMS_TAGS_PER_BATCH = 100
REACH_TIMEOUT_S = 5.0  # a tracking server that needs longer than this to answer is treated as down
PARENT_TAG = "mlflow.parentRunId"
ROLE_TAG = "distillrun.role"  # pipeline | stage
CHANGED_TAG = "distillrun.params_changed"  # params whose value differs on a resumed run
STATUSES = ("FINISHED", "FAILED", "KILLED")
# SQLite lets one writer in at a time and gives up after its busy timeout (5 s in Python's sqlite3); a call
# that failed with "database is locked" was rolled back, so it is retried with backoff (0.05 s doubling,
# about 25 s in all) before the run is stopped. The first connection to a new store (table creation)
# is serialised across processes by a lock file next to it, waited for at most STORE_LOCK_WAIT_S.
LOCKED_RETRIES = 9
STORE_LOCK_WAIT_S = 120.0


class TrackingError(RuntimeError):
    """The tracking store cannot be used; str() is the one line shown to the user."""


def _one_line(text) -> str:
    return " ".join(str(text).split())


def _truncate(text: str, limit: int) -> str:
    return text if len(text) <= limit else text[:limit - 3] + "..."


def flatten(cfg: Mapping, prefix: str = "") -> dict[str, str]:
    """Nested mapping -> {"a.b.c": str(value)}; lists and empty mappings become one value."""
    out: dict[str, str] = {}
    for key, value in cfg.items():
        name = f"{prefix}{key}"
        if isinstance(value, Mapping) and len(value) > 0:
            out.update(flatten(value, name + "."))
        else:
            out[name] = str(value)
    return out


# ---------------------------------------------------------------- store locations

def _sqlite_path(uri: str) -> Path | None:
    """File of a SQLAlchemy SQLite URL: sqlite:///rel.db -> rel.db, sqlite:////abs.db -> /abs.db."""
    rest = uri[len("sqlite://"):].split("?", 1)[0]
    if not rest.startswith("/") or rest in ("/", "/:memory:"):
        return None  # in-memory database
    return Path(rest[1:])


def _local_path(uri: str) -> Path | None:
    """Local file or folder a store URI writes to; None for remote or unknown stores."""
    parsed = urlparse(uri)
    if parsed.scheme == "sqlite":
        return _sqlite_path(uri)
    if parsed.scheme == "file":
        return Path(parsed.path)
    if parsed.scheme == "":
        return Path(uri)
    return None


def _check_writable(uri: str, path: Path) -> None:
    """The store's file (if present) and its nearest existing folder must be writable."""
    if path.exists() and not os.access(path, os.W_OK):
        raise TrackingError(f"tracking store {uri}: {path} is not writable; fix its permissions or set tracking.uri")
    folder = path.absolute().parent
    while not folder.exists():
        folder = folder.parent
    if not folder.is_dir() or not os.access(folder, os.W_OK | os.X_OK):
        raise TrackingError(f"tracking store {uri}: folder {folder} is not writable; set tracking.uri to a writable place")


def _check_http(uri: str, timeout: float) -> None:
    import urllib.error
    import urllib.request

    try:
        urllib.request.urlopen(uri.rstrip("/") + "/health", timeout=timeout).close()
    except urllib.error.HTTPError:
        return  # the server answered, even if not with 200
    except (urllib.error.URLError, OSError, ValueError) as exc:
        reason = getattr(exc, "reason", exc)
        raise TrackingError(f"tracking server {uri} does not answer ({_one_line(reason)}); start it, "
                            "fix tracking.uri, or set tracking.enabled=false") from None


def check_reachable(uri: str, timeout: float = REACH_TIMEOUT_S) -> None:
    """Fail fast, in one line naming the URI, when the store cannot be written; call before training."""
    if urlparse(uri).scheme in ("http", "https"):
        _check_http(uri, timeout)
        return
    path = _local_path(uri)
    if path is not None:
        _check_writable(uri, path)


@contextlib.contextmanager
def _store_lock(uri: str):
    """Hold .<store>.lock (POSIX flock) while connecting to a local SQLite store: two processes creating a new
    store's tables at once collide in MLflow's schema migration (e.g. "duplicate column name")."""
    path = _sqlite_path(uri) if urlparse(uri).scheme == "sqlite" else None
    fd = None
    if path is not None:
        path = path.with_name(f".{path.name}.lock")
        with contextlib.suppress(OSError):  # no folder yet: MLflow itself reports that, in one line
            fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o666)
    try:
        deadline = time.monotonic() + STORE_LOCK_WAIT_S
        while fd is not None:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() > deadline:
                    raise TrackingError(f"tracking store {uri}: {path} stayed held for "
                                        f"{STORE_LOCK_WAIT_S:.0f} s by another process") from None
                time.sleep(0.05)
        yield
    finally:
        if fd is not None:
            os.close(fd)


def _is_locked(exc: Exception) -> bool:
    return "database is locked" in str(exc) or "database table is locked" in str(exc)


def ui_hint(uri: str) -> str:
    """The command (or address) that shows this store in the MLflow UI, usable from any folder."""
    if urlparse(uri).scheme in ("http", "https"):
        return f"open {uri}"
    path = _local_path(uri)
    if path is not None and urlparse(uri).scheme == "sqlite":
        uri = f"sqlite:///{path.resolve()}"
    elif path is not None:
        uri = str(path.resolve())
    return f"mlflow ui --backend-store-uri {shlex.quote(uri)}"


# ---------------------------------------------------------------- trackers

class NullTracker:
    """Tracking switched off: every method accepts its arguments and does nothing."""

    enabled = False
    uri = None
    pipeline_run_id = None
    stage_run_id = None

    def _noop(self, *args, **kwargs) -> None:
        return None

    start_pipeline = start_stage = end_stage = close = _noop
    log_params = log_metrics = log_series = log_artifact = set_tags = _noop

    __exit__ = _noop

    def stage_runs(self) -> dict[str, str]:
        return {}

    def __enter__(self):
        return self


class Tracker:
    """MLflow runs for one pipeline: log_* calls go to the open stage run, else to the pipeline run."""

    enabled = True

    def __init__(self, client, uri: str, experiment_id: str):
        self.client, self.uri, self.experiment_id = client, uri, experiment_id
        self.pipeline_run_id: str | None = None
        self.stage_run_id: str | None = None

    @classmethod
    def open(cls, uri: str, experiment: str, enabled: bool = True,
             artifact_location: str | None = None) -> "Tracker | NullTracker":
        """Check the store, then get or create the experiment (artifact_location: only when creating)."""
        if not enabled:
            return NullTracker()
        check_reachable(uri)
        from mlflow import MlflowClient

        tracker = cls(None, uri, "")
        with _store_lock(uri):
            tracker.client = tracker._call("connect", MlflowClient, tracking_uri=uri)
            tracker.experiment_id = tracker._call("open experiment", tracker._experiment, experiment, artifact_location)
        return tracker

    def _call(self, what: str, fn, *args, **kwargs):
        for attempt in range(LOCKED_RETRIES + 1):
            try:
                return fn(*args, **kwargs)
            except TrackingError:
                raise
            except Exception as exc:  # MlflowException, connection and database errors
                if attempt < LOCKED_RETRIES and _is_locked(exc):
                    time.sleep(0.05 * 2 ** attempt)
                    continue
                message = _truncate(_one_line(exc), 300)
                raise TrackingError(f"tracking store {self.uri}: {what} failed ({message})") from exc

    def _experiment(self, name: str, artifact_location: str | None) -> str:
        exp = self.client.get_experiment_by_name(name)
        if exp is None:
            try:
                return self.client.create_experiment(name, artifact_location=artifact_location)
            except Exception:
                exp = self.client.get_experiment_by_name(name)  # another process created it first
                if exp is None:
                    raise
        if exp.lifecycle_stage != "active":
            raise TrackingError(f"tracking store {self.uri}: experiment '{name}' is deleted; "
                                "restore it in the MLflow UI or set tracking.experiment")
        return exp.experiment_id

    def _reopen(self, run_id: str, parent: str | None) -> None:
        run = self._call(f"find run {run_id}", self.client.get_run, run_id)
        if run.info.experiment_id != self.experiment_id:
            raise TrackingError(f"tracking store {self.uri}: run {run_id} is in experiment "
                                f"{run.info.experiment_id}, not {self.experiment_id}")
        if parent is not None and run.data.tags.get(PARENT_TAG) != parent:
            raise TrackingError(f"tracking store {self.uri}: run {run_id} is not a stage of run {parent}")
        self._call(f"reopen run {run_id}", self.client.update_run, run_id, status="RUNNING")

    def _create(self, name: str, tags: dict, start_time: int | None = None) -> str:
        tags = {str(k): _truncate(str(v), TAG_VALUE_LIMIT) for k, v in tags.items()}  # set with the run, atomically
        run = self._call("create run", self.client.create_run, self.experiment_id, run_name=name, tags=tags,
                         start_time=start_time)
        return run.info.run_id

    def start_pipeline(self, name: str, params: Mapping | None = None, tags: Mapping | None = None,
                       resume_run_id: str | None = None) -> str:
        """Create the parent run, or reopen resume_run_id and keep logging to it."""
        if resume_run_id:
            self._reopen(resume_run_id, parent=None)
        run_id = resume_run_id or self._create(name, {ROLE_TAG: "pipeline", **(tags or {})})
        self.pipeline_run_id, self.stage_run_id = run_id, None
        self.set_tags(tags or {})
        self.log_params(params or {})
        return run_id

    def start_stage(self, name: str, params: Mapping | None = None, resume_run_id: str | None = None,
                    tags: Mapping | None = None, seconds_ago: float = 0.0) -> str:
        """Create a child run of the pipeline run, or reopen resume_run_id (which must be one). A stage logged
        after it ran passes its duration as seconds_ago, so the UI's Duration column shows the real one."""
        if self.pipeline_run_id is None:
            raise TrackingError("start_stage called before start_pipeline")
        if self.stage_run_id is not None:
            raise TrackingError(f"stage run {self.stage_run_id} is still open; call end_stage first")
        if resume_run_id:
            self._reopen(resume_run_id, parent=self.pipeline_run_id)
        self.stage_run_id = resume_run_id or self._create(
            name, {PARENT_TAG: self.pipeline_run_id, ROLE_TAG: "stage", **(tags or {})},
            start_time=int((time.time() - seconds_ago) * 1000))
        self.set_tags(tags or {})
        self.log_params(params or {})
        return self.stage_run_id

    def end_stage(self, status: str = "FINISHED") -> None:
        if status not in STATUSES:
            raise ValueError(f"run status {status!r}: must be one of {', '.join(STATUSES)}")
        if self.stage_run_id is not None:
            self._call("end stage run", self.client.set_terminated, self.stage_run_id, status)
            self.stage_run_id = None

    def close(self, status: str = "FINISHED") -> None:
        """End the open stage (if any) and the pipeline run with status."""
        self.end_stage(status)
        if self.pipeline_run_id is not None:
            self._call("end pipeline run", self.client.set_terminated, self.pipeline_run_id, status)
            self.pipeline_run_id = None

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        self.close("FAILED" if exc_type is not None else "FINISHED")

    def _active(self) -> str:
        run_id = self.stage_run_id or self.pipeline_run_id
        if run_id is None:
            raise TrackingError("nothing to log to: call start_pipeline first")
        return run_id

    def _log_batch(self, run_id: str, metrics=(), params=(), tags=()) -> None:
        for items, size, key in ((metrics, METRICS_PER_BATCH, "metrics"), (params, PARAMS_TAGS_PER_BATCH, "params"),
                                 (tags, PARAMS_TAGS_PER_BATCH, "tags")):
            for i in range(0, len(items), size):
                self._call(f"log {key}", self.client.log_batch, run_id, **{key: list(items[i:i + size])})

    def log_params(self, params: Mapping) -> None:
        """Flattened, stringified, truncated; on a resumed run, keys already logged are kept as they are."""
        from mlflow.entities import Param

        flat = {k: _truncate(v, PARAM_VALUE_LIMIT) for k, v in flatten(params).items()}
        if not flat:
            return
        run_id = self._active()
        logged = self._call("read params", self.client.get_run, run_id).data.params
        new = [Param(k, v) for k, v in flat.items() if k not in logged]
        changed = [f"{k}: {logged[k]} -> {v}" for k, v in flat.items() if k in logged and logged[k] != v]
        self._log_batch(run_id, params=new)
        if changed:  # MLflow params are write-once: record what differs instead of failing
            self.set_tags({CHANGED_TAG: "; ".join(changed)})

    def log_metrics(self, metrics: Mapping[str, Any], step: int | None = None) -> None:
        """Numbers only; None values are skipped (a metric that does not apply)."""
        from mlflow.entities import Metric

        now = int(time.time() * 1000)
        items = [Metric(k, float(v), now, step or 0) for k, v in metrics.items() if v is not None]
        if items:
            self._log_batch(self._active(), metrics=items)

    def log_series(self, name: str, values: Iterable, step_offset: int = 0) -> None:
        """A curve (e.g. the loss per iteration) as metric `name` at steps step_offset, step_offset+1, ..."""
        from mlflow.entities import Metric

        now = int(time.time() * 1000)
        items = [Metric(name, float(v), now, step_offset + i) for i, v in enumerate(values)]
        if items:
            self._log_batch(self._active(), metrics=items)

    def log_artifact(self, path, subdir: str | None = None) -> None:
        """Copy a file or a folder's contents into the active run's artifacts (under subdir)."""
        path = Path(path)
        if not path.exists():
            raise TrackingError(f"artifact {path} does not exist")
        fn = self.client.log_artifacts if path.is_dir() else self.client.log_artifact
        self._call(f"upload {path}", fn, self._active(), str(path), subdir)

    def set_tags(self, tags: Mapping) -> None:
        from mlflow.entities import RunTag

        items = [RunTag(str(k), _truncate(str(v), TAG_VALUE_LIMIT)) for k, v in tags.items()]
        if items:
            self._log_batch(self._active(), tags=items)

    def find_run(self, tags: Mapping[str, str]) -> str | None:
        """Id of the earliest run of the experiment carrying all these tags (set when it was created), or None:
        how a run created just before a crash, whose id never reached the caller's records, is found again."""
        where = " and ".join(f"tags.`{k}` = '{v}'" for k, v in tags.items())
        runs = self._call("search runs", self.client.search_runs, [self.experiment_id], filter_string=where,
                          order_by=["attributes.start_time ASC"], max_results=1)
        return runs[0].info.run_id if runs else None

    def logged_metrics(self) -> dict[str, float]:
        """Latest value of every metric of the active run: what a resumed run need not log again."""
        return dict(self._call("read metrics", self.client.get_run, self._active()).data.metrics)

    def series_length(self, name: str) -> int:
        """How many values of metric `name` the active run holds (where a resumed curve continues)."""
        return len(self._call("read metric history", self.client.get_metric_history, self._active(), name))

    def stage_runs(self) -> dict[str, str]:
        """Stage run name -> run id for the open pipeline run (the latest run per name)."""
        if self.pipeline_run_id is None:
            return {}
        runs = self._call("search stage runs", self.client.search_runs, [self.experiment_id],
                          filter_string=f"tags.`{PARENT_TAG}` = '{self.pipeline_run_id}'",
                          order_by=["attributes.start_time ASC"])
        return {r.info.run_name: r.info.run_id for r in runs}


def open_tracker(cfg) -> Tracker | NullTracker:
    """Tracker from a tracking config (fields enabled, uri, experiment)."""
    return Tracker.open(cfg.uri, cfg.experiment, enabled=bool(cfg.enabled), artifact_location=cfg.get("artifacts"))
