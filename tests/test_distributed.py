"""Scale-out: data-parallel training under torchrun, sweeps through Hydra launchers, cluster templates.

Outside references: torch.distributed (gloo backend) and torchrun from PyTorch; Hydra's multirun and its
joblib/submitit launcher plugins; the MLflow store read back with MlflowClient. The invariant checked is
the one data parallelism promises (e.g. PyTorch DDP notes, "DDP ... equivalent to single-process
training with the global batch"): W ranks with 1/W of the batch each take the same step as one process.
"""
import os
import subprocess
import sys

import pytest
import torch
from conftest import TINY as TINY_SIZES, compose_run
from omegaconf import open_dict
from safetensors.torch import load_file

from distillrun import distributed
from distillrun.config import ConfigError, validate
from distillrun.data.mixture import archipelago
from distillrun.denoiser import NetDenoiser
from distillrun.methods import teacher as teacher_method
from distillrun.methods.progressive import progressive_loss
from distillrun.nets import build_net
from distillrun.nets.oracle import OracleDenoiser
from distillrun.schedule import Schedule

TINY = ["teacher.iterations=60", "teacher.steps=4", "method.iterations=20", *TINY_SIZES, "stop.tolerance=1000"]
ENV = {**os.environ, "OMP_NUM_THREADS": "1", "MLFLOW_DISABLE_TELEMETRY": "true"}
# torchrun's own entry point, run by this interpreter: the test needs no `torchrun` script on PATH (a venv's
# python called without activating the venv has none), only torch itself.
TORCHRUN = (sys.executable, "-m", "torch.distributed.run", "--standalone", "--nproc_per_node=2", "-m", "distillrun.cli")


def cli(*args, cwd, launcher=(sys.executable, "-m", "distillrun.cli")):
    return subprocess.run([*launcher, *args], cwd=cwd, env=ENV, capture_output=True, text=True, timeout=600)


def test_two_gloo_ranks_train_the_same_student_as_one_process(tmp_path):
    two = cli(*TINY, "tracking=off", f"run_dir={tmp_path / 'two'}", cwd=tmp_path,
              launcher=TORCHRUN)
    assert two.returncode == 0, two.stderr[-2000:]
    one = cli(*TINY, "tracking=off", f"run_dir={tmp_path / 'one'}", cwd=tmp_path)
    assert one.returncode == 0, one.stderr[-2000:]
    for part in ("teacher", "stage-01", "stage-02"):
        a = load_file(tmp_path / "two" / part / "weights.safetensors")
        b = load_file(tmp_path / "one" / part / "weights.safetensors")
        assert a.keys() == b.keys()
        for k in a:  # float tolerance: the two ranks sum their halves of the batch in another order
            torch.testing.assert_close(a[k], b[k], rtol=1e-5, atol=1e-6)
    assert "chosen student: stage 2" in two.stdout and two.stdout.count("stage steps") == 1  # rank 0 reports
    # Resume under torchrun: a rerun on the finished folder loads every stage on both ranks and changes nothing.
    before = (tmp_path / "two" / "summary.json").read_text()
    again = cli(*TINY, "tracking=off", f"run_dir={tmp_path / 'two'}", cwd=tmp_path,
                launcher=TORCHRUN)
    assert again.returncode == 0, again.stderr[-2000:]
    assert (tmp_path / "two" / "summary.json").read_text() == before


def _half_losses(loss_fn, model, batch):
    """The loss of each rank's half of the batch, every rank drawing the same global noise."""
    out = []
    for rank in (0, 1):
        distributed_shard = distributed.Shard(rank, 2)
        original = distributed.current_shard
        try:
            for mod in (teacher_method, sys.modules["distillrun.methods.progressive"]):
                mod.current_shard = lambda: distributed_shard
            out.append(loss_fn(model, model, batch, torch.Generator().manual_seed(3)))
        finally:
            for mod in (teacher_method, sys.modules["distillrun.methods.progressive"]):
                mod.current_shard = original
    return out


@pytest.mark.parametrize("which", ["denoising", "progressive"])
def test_losses_split_the_global_batch_between_ranks(which):
    # Mean of the two ranks' losses (what DDP's gradient average optimises) equals the one-process loss.
    torch.manual_seed(0)
    sch = Schedule("cosine")
    model = NetDenoiser(build_net("mlp", (2,), 0, width=16, depth=1), "v", sch)
    x0 = archipelago().sample(64, torch.Generator().manual_seed(1))[0]
    loss_fn = teacher_method.denoising_loss if which == "denoising" else \
        progressive_loss(OracleDenoiser(archipelago(), sch), 4)
    full = loss_fn(model, model, (x0, None), torch.Generator().manual_seed(3))
    halves = _half_losses(loss_fn, model, (x0, None))
    assert not torch.isclose(halves[0], halves[1])  # each rank really sees different rows
    torch.testing.assert_close((halves[0] + halves[1]) / 2, full, rtol=1e-6, atol=1e-7)


def test_shard_rows_cover_the_batch_once():
    rows = [distributed.Shard(r, 4).rows(12) for r in range(4)]
    assert [list(range(12))[s] for s in rows] == [[0, 1, 2], [3, 4, 5], [6, 7, 8], [9, 10, 11]]
    with pytest.raises(ValueError, match="not divisible"):
        distributed.Shard(0, 5).rows(12)


def test_sweep_over_two_tolerances_gives_two_pipelines_in_mlflow(tmp_path):
    from mlflow import MlflowClient

    uri = f"sqlite:///{tmp_path / 'sweep.db'}"
    res = cli("-m", *TINY, "teacher.steps=2", f"tracking.uri={uri}", f"tracking.artifacts={tmp_path / 'art'}",
              "stop.tolerance=0.5,1000", cwd=tmp_path)
    assert res.returncode == 0, res.stderr[-2000:]
    client = MlflowClient(tracking_uri=uri)
    runs = client.search_runs([client.get_experiment_by_name("distillrun").experiment_id])
    parents = [r for r in runs if "mlflow.parentRunId" not in r.data.tags]
    assert sorted(p.data.params["stop.tolerance"] for p in parents) == ["0.5", "1000.0"]
    for p in parents:
        children = [r for r in runs if r.data.tags.get("mlflow.parentRunId") == p.info.run_id]
        assert len(children) >= 1 and all("quality/sw2" in c.data.metrics for c in children)


@pytest.mark.parametrize("launcher,target", [("slurm", "SlurmLauncher"), ("parallel", "JoblibLauncher")])
def test_launcher_templates_compose_and_validate(launcher, target):
    pytest.importorskip(f"hydra_plugins.hydra_{'submitit' if launcher == 'slurm' else 'joblib'}_launcher")
    cfg = compose_run(f"hydra/launcher={launcher}", "recipe=digits_progressive", return_hydra_config=True)
    assert cfg.hydra.launcher._target_.endswith(target)
    if launcher == "slurm":
        assert cfg.hydra.launcher.tasks_per_node == cfg.hydra.launcher.gpus_per_node  # one rank per GPU
    with open_dict(cfg):
        del cfg["hydra"]
    validate(cfg)


def test_torchrun_needs_a_shared_run_dir_and_divisible_batches(monkeypatch):
    from distillrun.cli import join_ranks

    monkeypatch.setenv("WORLD_SIZE", "3")
    with pytest.raises(ConfigError, match="run_dir"):
        join_ranks(compose_run())
    with pytest.raises(ConfigError, match="teacher.batch_size"):
        join_ranks(compose_run("run_dir=/tmp/x"))
