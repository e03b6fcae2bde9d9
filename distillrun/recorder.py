"""What the pipeline records in MLflow, through the Tracker (tracking.py stays the only mlflow importer).

One parent run per pipeline (params: the flattened config; metrics: teacher/*, floor/*, chosen/*), one
child run per stage named "<method> · stage N · S steps" with the same metric names for every method,
so the MLflow compare view lines stages of both methods up. Run ids are kept in <run_dir>/tracking.json:
a resumed pipeline reopens its runs instead of making new ones.
"""
from __future__ import annotations

from pathlib import Path

from omegaconf import OmegaConf

from . import checkpoint
from .tracking import open_tracker

IDS_FILE = "tracking.json"
VERDICT_CODE = {"within": 1.0, "over": 0.0, "failed": -1.0}  # verdict as a number, for charts


class Recorder:
    def __init__(self, cfg, tracker):
        self.cfg, self.tracker = cfg, tracker
        self.run_dir: Path | None = None
        self.ids: dict = {"pipeline": None, "stages": {}}

    def __enter__(self):
        return self

    def __exit__(self, exc_type, exc, tb):
        self.tracker.close("FAILED" if exc_type is not None else "FINISHED")

    def _save_ids(self) -> None:
        if self.tracker.enabled:
            checkpoint.atomic_write_json(self.run_dir / IDS_FILE, self.ids)

    def start(self, run_dir: Path, recipe: str | None) -> None:
        self.run_dir = run_dir
        if (run_dir / IDS_FILE).exists() and self.tracker.enabled:
            self.ids = checkpoint.read_json(run_dir / IDS_FILE, {"stages": dict})
        cfg = self.cfg
        name = f"{recipe or cfg.method.name} · {run_dir.name}"
        params = OmegaConf.to_container(cfg, resolve=True)
        tags = {"distillrun.run_dir": str(run_dir.resolve()), "distillrun.method": cfg.method.name,
                "distillrun.data": cfg.data.name, "distillrun.recipe": recipe or ""}
        self.ids["pipeline"] = self.tracker.start_pipeline(name, params, tags, resume_run_id=self.ids["pipeline"])
        self._save_ids()

    def teacher(self, teacher) -> None:
        if teacher.losses and "teacher" not in self.ids:
            self.tracker.log_series("teacher/loss", teacher.losses)
            self.tracker.log_metrics({"teacher/train_seconds": teacher.seconds})
            self.ids["teacher"] = True
            self._save_ids()

    def reference(self, ref: dict) -> None:
        values = {f"teacher/{k}": v for k, v in ref["teacher"].items()}
        values.update({f"floor/{k}": v for k, v in ref["floor"].items()})
        self.tracker.log_metrics(values)

    def stage(self, record: dict, stage_dir: Path) -> None:
        """One child run per finished stage; a stage logged before a resume is not logged again."""
        key = str(record["index"])
        entry = self.ids["stages"].get(key, {})
        if entry.get("done"):
            return
        name = f"{record['method']} · stage {record['index']} · {record['steps']} steps"
        params = {"method": record["method"], "stage": record["index"], "steps": record["steps"],
                  "teacher_steps": record["teacher_steps"], "iterations": record["iterations"]}
        run_id = self.tracker.start_stage(name, params, resume_run_id=entry.get("run"),
                                          tags={"distillrun.verdict": record["verdict"], "distillrun.rule": record["rule"]})
        self.ids["stages"][key] = {"run": run_id, "done": False}
        self._save_ids()  # a kill from here on reopens this run instead of creating a second one
        losses = checkpoint.read_json(stage_dir / "loss.json")["loss"] if (stage_dir / "loss.json").exists() else []
        self.tracker.log_series("loss", losses)
        secs = record["seconds"]
        self.tracker.log_metrics({**record["metrics"], "steps": record["steps"], "verdict": VERDICT_CODE[record["verdict"]],
                                  "seconds/train": secs["train"], "seconds/eval": secs["eval"],
                                  "its_per_s": record["its_per_s"]})
        for name in ("samples.png", "metrics.json"):
            if (stage_dir / name).exists():
                self.tracker.log_artifact(stage_dir / name)
        self.tracker.end_stage("FAILED" if record["verdict"] == "failed" else "FINISHED")
        self.ids["stages"][key]["done"] = True
        self._save_ids()

    def finish(self, summary: dict, run_dir: Path) -> None:
        chosen = summary["chosen"]
        self.tracker.set_tags({"distillrun.stopped_because": summary["stopped_because"],
                               "distillrun.chosen": chosen["folder"] if chosen else "none"})
        if chosen:
            row = next(r for r in summary["stages"] if r["index"] == chosen["index"])
            self.tracker.log_metrics({"chosen/steps": chosen["steps"], "chosen/stage": chosen["index"],
                                      **{f"chosen/{k}": v for k, v in row["metrics"].items()}})
        for name in ("summary.json", "quality_vs_steps.png", "config.yaml"):
            if (run_dir / name).exists():
                self.tracker.log_artifact(run_dir / name)


def recorder_for(cfg) -> Recorder:
    return Recorder(cfg, open_tracker(cfg.tracking))
