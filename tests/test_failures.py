"""Numerical failure: a NaN/inf loss or an exploding gradient ends the stage as failed; earlier stages stay
intact and selectable; the run folder, summary and MLflow say so; the CLI exits 3 with what to change.

Outside references: IEEE 754 arithmetic (anything times NaN is NaN, so a poisoned loss is non-finite);
MLflow's own MlflowClient reads run statuses and tags back (FAILED is one of MLflow's RunStatus values).
"""
import io
import itertools
import json
import math
from contextlib import redirect_stderr

import pytest
import torch
from conftest import compose_run
from test_resume import SMALL, cli, fresh_store, mlflow_runs

from distillrun import checkpoint, cli as cli_module
from distillrun.methods import progressive
from distillrun.training import LoopSpec, train_loop


def compose_cfg(*overrides):
    return compose_run(*SMALL, *overrides)


def run_job(cfg) -> tuple[int, list[str]]:
    """cli.run_job in-process: (exit code, stderr lines)."""
    err = io.StringIO()
    with redirect_stderr(err), pytest.raises(SystemExit) as exit_:
        cli_module.run_job(cfg)
        raise SystemExit(0)
    return exit_.value.code, err.getvalue().strip().splitlines()


def poison(loss_fn, at: int, factor: float):
    """loss_fn whose value is multiplied by factor at call number `at` (0-based), and unchanged otherwise."""
    calls = itertools.count()

    def poisoned(*args):
        value = loss_fn(*args)
        return value * factor if next(calls) == at else value
    return poisoned


@pytest.mark.parametrize("factor, why", [(math.nan, "loss became nan at iteration 4"),
                                         (math.inf, "loss became inf at iteration 4"),
                                         (1e12, "gradient norm")])
def test_loop_stops_at_the_bad_iteration_before_stepping(factor, why):
    torch.manual_seed(0)
    model = torch.nn.Linear(2, 1)
    before = [p.detach().clone() for p in model.parameters()]
    loss_fn = poison(lambda m, target, batch, g: ((m(batch) - 1) ** 2).mean(), at=4, factor=factor)
    result = train_loop(model, loss_fn, lambda g: torch.randn(8, 2, generator=g), LoopSpec(iterations=20, lr=1e-2),
                        generator=torch.Generator().manual_seed(0), quiet=True)
    assert result.failed is not None and why in result.failed
    assert len(result.losses) == 4  # iterations 0-3 ran, the bad one was not stepped
    assert all(torch.isfinite(p).all() for p in model.parameters())
    assert any(not torch.equal(a, b) for a, b in zip(before, model.parameters()))  # the good iterations did step


def test_nan_in_stage_two_fails_it_keeps_stage_one_and_exits_3(tmp_path, tmp_path_factory, monkeypatch):
    uri = fresh_store(tmp_path_factory, tmp_path)
    run = tmp_path / "run"
    cfg = compose_cfg(f"run_dir={run}", f"tracking.uri={uri}", f"tracking.artifacts={tmp_path / 'art'}")
    original = progressive.progressive_loss
    monkeypatch.setattr(progressive, "progressive_loss", lambda teacher, steps, kind="snr_trunc":
                        poison(original(teacher, steps, kind), at=5, factor=math.nan) if steps == 2 else
                        original(teacher, steps, kind))
    code, err = run_job(cfg)
    assert code == cli_module.EXIT_STAGE_FAILED and len(err) == 1 and err[0].startswith("distillrun: error: ")
    assert "stage 2" in err[0] and "method.lr" in err[0] and "stage-01" in err[0]  # what failed, what to change, kept
    stage2 = json.loads((run / "stage-02/metrics.json").read_text())
    assert "nan at iteration 5" in stage2["failed"]
    summary = json.loads((run / "summary.json").read_text())
    assert [s["verdict"] for s in summary["stages"]] == ["within", "failed"] and summary["failed"]
    assert summary["chosen"]["folder"] == "stage-01" and "stage 2 failed" in summary["stopped_because"]
    assert not (run / "stage-03").exists()
    checkpoint.load_model_files(run / "stage-01")  # intact: digest matches, still selectable
    _, parents, children = mlflow_runs(uri)
    status = {c.data.params["stage"]: (c.info.status, c.data.tags["distillrun.verdict"]) for c in children}
    assert status == {"1": ("FINISHED", "within"), "2": ("FAILED", "failed")}
    assert parents[0].info.status == "FAILED"

    # The same command again, with the loss healthy: the failed stage is retried from its start as a new
    # attempt (the failed one stays on record) and stage 1 is reused as it was.
    monkeypatch.setattr(progressive, "progressive_loss", original)
    stage1 = (run / "stage-01/weights.safetensors").read_bytes()
    code, err = run_job(cfg)
    assert code == 0 and err == []
    assert (run / "stage-01/weights.safetensors").read_bytes() == stage1
    _, parents, children = mlflow_runs(uri)
    names = {c.info.run_name: c.info.status for c in children}
    assert names["progressive · stage 2 · 2 steps"] == "FAILED"
    assert names["progressive · stage 2 · 2 steps · attempt 2"] == "FINISHED" and len(children) == 4
    assert len(parents) == 1 and parents[0].info.status == "FINISHED"


def test_diverging_teacher_exits_3_with_what_to_change(tmp_path):
    code, err = run_job(compose_cfg(f"run_dir={tmp_path / 'run'}", "tracking.enabled=false", "teacher.lr=1e6"))
    assert code == cli_module.EXIT_STAGE_FAILED and len(err) == 1
    assert err[0].startswith("distillrun: error: teacher training failed") and "teacher.lr" in err[0]


def test_cli_exits_3_when_the_first_stage_diverges(tmp_path):
    run = tmp_path / "run"
    p = cli([*SMALL, f"run_dir={run}", "tracking.enabled=false", "method.lr=1e6"], tmp_path)
    assert p.returncode == 3, p.stderr[-2000:]
    err = p.stderr.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("distillrun: error: stage 1") and "method.lr (now 1e+06)" in err[0]
    assert json.loads((run / "stage-01/metrics.json").read_text())["failed"]  # the loop's NaN/explosion check fired
    assert json.loads((run / "summary.json").read_text())["chosen"] is None
    assert (run / "teacher/model.json").exists()  # the teacher is kept
