"""What the pipeline records in MLflow, through the Tracker (tracking.py stays the only mlflow importer).

One parent run per pipeline named "<method> · <data> · <run folder>" (params: the flattened config; metrics:
teacher/*, floor/*, chosen/*), one child run per stage named "<method> · stage N · S steps" ("1 step"), with
the same metric names for every method, so the MLflow compare view lines stages of both methods up. Run ids
are kept in <run_dir>/tracking.json: a resumed pipeline reopens its runs instead of making new ones.

Resume after a kill at any point, without duplicates: tracking.json gets a random token before the parent
run is created, and the parent carries it as a tag from its creation, so a parent whose id never reached
tracking.json is found again by token; a stage run likewise by its parent and name. A reopened run gets only
what it lacks: metrics whose latest value differs, and the tail of a curve beyond the points already logged.
A stage that failed and later runs again gets a new child run ("· attempt 2"); the failed attempt stays.
"""
from __future__ import annotations

import math
import secrets
from pathlib import Path

from omegaconf import OmegaConf

from . import checkpoint
from .tracking import open_tracker

IDS_FILE = "tracking.json"
TOKEN_TAG = "distillrun.token"
VERDICT_CODE = {"within": 1.0, "over": 0.0, "failed": -1.0}  # verdict as a number, for charts


class Recorder:
    def __init__(self, cfg, tracker):
        self.cfg, self.tracker = cfg, tracker
        self.run_dir: Path | None = None
        self.ids: dict = {"pipeline": None, "stages": {}}
        self.status = "FINISHED"  # the parent's status at close; FAILED when a stage failed

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        self.tracker.close("FAILED" if exc_type is not None else self.status)

    def _save_ids(self) -> None:
        checkpoint.atomic_write_json(self.run_dir / IDS_FILE, self.ids)

    def _load_ids(self, run_dir: Path) -> dict:
        """tracking.json if it belongs to this store and experiment; else fresh ids with a new token."""
        where = {"uri": self.cfg.tracking.uri, "experiment": self.cfg.tracking.experiment}
        if (run_dir / IDS_FILE).exists():
            ids = checkpoint.read_json(run_dir / IDS_FILE, {"stages": dict},
                                       f"delete {run_dir / IDS_FILE} to record the run anew")
            if all(ids.get(k, v) == v for k, v in where.items()):  # files without uri: written before it was kept
                return {**where, "token": secrets.token_hex(8), "pipeline": None, **ids}
        return {**where, "token": secrets.token_hex(8), "pipeline": None, "stages": {}}

    def _log_new(self, values: dict, logged: dict) -> None:
        """Log the values whose latest logged value differs (NaN equals NaN here)."""
        same = lambda a, b: a == b or (isinstance(a, float) and math.isnan(a) and math.isnan(b))  # noqa: E731
        self.tracker.log_metrics({k: v for k, v in values.items()
                                  if v is not None and not (k in logged and same(logged[k], float(v)))})

    def _log_curve(self, name: str, values: list) -> None:
        done = self.tracker.series_length(name)
        self.tracker.log_series(name, values[done:], step_offset=done)

    def start(self, run_dir: Path, recipe: str | None) -> None:
        self.run_dir = run_dir
        if not self.tracker.enabled:
            return
        self.ids = self._load_ids(run_dir)
        self._save_ids()  # the token is on disk before any run carries it
        cfg = self.cfg
        # method first, like the stage runs under it; the recipe (whose method an override may have changed)
        # is the distillrun.recipe tag
        name = f"{cfg.method.name} · {cfg.data.name} · {run_dir.name}"
        params = OmegaConf.to_container(cfg, resolve=True)
        tags = {TOKEN_TAG: self.ids["token"], "distillrun.run_dir": str(run_dir.resolve()),
                "distillrun.method": cfg.method.name, "distillrun.data": cfg.data.name,
                "distillrun.recipe": recipe or ""}
        resume = self.ids["pipeline"] or self.tracker.find_run({TOKEN_TAG: self.ids["token"]})
        self.ids["pipeline"] = self.tracker.start_pipeline(name, params, tags, resume_run_id=resume)
        checkpoint.kill_point("tracking:pipeline")
        self._save_ids()

    def teacher(self, teacher) -> None:
        tags = {"distillrun.teacher_threads": getattr(teacher, "threads", None),
                "distillrun.teacher_cache": getattr(teacher, "cache_note", None)}
        if self.tracker.enabled and any(tags.values()):
            self.tracker.set_tags({k: str(v)[:500] for k, v in tags.items() if v})
        if self.tracker.enabled and teacher.losses:
            self._log_curve("teacher/loss", teacher.losses)
            self._log_new({"teacher/train_seconds": teacher.seconds}, self.tracker.logged_metrics())

    def reference(self, ref: dict) -> None:
        if not self.tracker.enabled:
            return
        values = {f"teacher/{k}": v for k, v in ref["teacher"].items()}
        values.update({f"floor/{k}": v for k, v in ref["floor"].items()})
        self._log_new(values, self.tracker.logged_metrics())

    def stage(self, record: dict, stage_dir: Path) -> None:
        """One child run per stage attempt; a stage already logged with this verdict is not logged again."""
        if not self.tracker.enabled:
            return
        key = str(record["index"])
        entry = self.ids["stages"].get(key, {})
        if entry.get("done") and entry.get("verdict") == record["verdict"]:
            return
        attempt = entry.get("attempt", 1) + (1 if entry.get("verdict") == "failed" else 0)
        if attempt != entry.get("attempt", 1):
            entry = {}  # the stage ran again after failing: a new child run for the new attempt
        steps = f"{record['steps']} step" + ("" if record["steps"] == 1 else "s")
        name = f"{record['method']} · stage {record['index']} · {steps}"
        name += f" · attempt {attempt}" if attempt > 1 else ""
        params = {"method": record["method"], "stage": record["index"], "steps": record["steps"],
                  "teacher_steps": record["teacher_steps"], "iterations": record["iterations"]}
        if record.get("threads"):  # the intra-op thread count(s) the stage trained with (compute.threads)
            params["threads"] = str(record["threads"])[:500]
        resume = entry.get("run") or self.tracker.stage_runs().get(name)
        run_id = self.tracker.start_stage(name, params, resume_run_id=resume,
                                          tags={"distillrun.verdict": record["verdict"], "distillrun.rule": record["rule"],
                                                "distillrun.decided_by": record.get("decided_by") or ""},
                                          seconds_ago=record["seconds"]["train"] + record["seconds"]["eval"])
        checkpoint.kill_point(f"tracking:stage-{record['index']:02d}")
        self.ids["stages"][key] = {"run": run_id, "done": False, "attempt": attempt}
        self._save_ids()  # a kill from here on reopens this run instead of creating a second one
        losses = checkpoint.read_json(stage_dir / "loss.json")["loss"] if (stage_dir / "loss.json").exists() else []
        self._log_curve("loss", losses)
        secs = record["seconds"]
        seen = {f"stop/{m}_seen": p["seen"] for m, p in (record.get("panel") or {}).items()}
        seen["stop/seen"] = record.get("seen", float("nan"))
        seen = {k: v for k, v in seen.items() if v is not None and abs(v) < float("inf")}  # seen is nan without an se
        self._log_new({**record["metrics"], **seen, "steps": record["steps"], "verdict": VERDICT_CODE[record["verdict"]],
                       "seconds/train": secs["train"], "seconds/eval": secs["eval"], "its_per_s": record["its_per_s"]},
                      self.tracker.logged_metrics() if resume else {})
        for name in ("samples.png", "metrics.json"):
            if (stage_dir / name).exists():
                self.tracker.log_artifact(stage_dir / name)
        self.tracker.end_stage("FAILED" if record["verdict"] == "failed" else "FINISHED")
        self.ids["stages"][key].update(done=True, verdict=record["verdict"])
        self._save_ids()

    def finish(self, summary: dict, run_dir: Path) -> None:
        self.status = "FAILED" if summary["failed"] else "FINISHED"
        if not self.tracker.enabled:
            return
        chosen = summary["chosen"]
        self.tracker.set_tags({"distillrun.stopped_because": summary["stopped_because"],
                               "distillrun.chosen": chosen["folder"] if chosen else "none"})
        if chosen:
            row = next(r for r in summary["stages"] if r["index"] == chosen["index"])
            self._log_new({"chosen/steps": chosen["steps"], "chosen/stage": chosen["index"],
                           **{f"chosen/{k}": v for k, v in row["metrics"].items()}}, self.tracker.logged_metrics())
        for name in ("summary.json", "quality_vs_steps.png", "guided_fidelity_diversity.png", "config.yaml"):
            if (run_dir / name).exists():
                self.tracker.log_artifact(run_dir / name)


def recorder_for(cfg) -> Recorder:
    return Recorder(cfg, open_tracker(cfg.tracking))
