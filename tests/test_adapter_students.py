"""Adapter students in the pipeline (adapter=lowrank): every method, imported teachers, draw, merge, compare, MLflow.

Outside references: the saved files are read back with safetensors' own loader and Python's json; re-scoring the
samples `draw` repeats must give the numbers the pipeline wrote (so the rebuilt teacher + adapter samples exactly
as the trained student did); the merged network's DDIM samples (samplers.sample; Song et al. 2021) must equal the
adapter student's bit for bit (merging W0 + BA into the weights, Hu et al. 2021, Sec. 4.1); MLflow's own
MlflowClient reads the logged sizes.
"""
import json
import os
from pathlib import Path

import numpy as np
import pytest
import torch
from hydra import compose, initialize_config_module
from omegaconf import OmegaConf
from safetensors.torch import load_file, save_file
from test_bad_input import refused

from distillrun import adapters, checkpoint, cli, evaluate, pipeline, verbs
from distillrun.config import register_configs
from distillrun.nets import build_net

os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")
TINY = ["teacher.iterations=60", "method.iterations=10", "eval.samples=256", "eval.bootstrap=5", "teacher.steps=8",
        "eval.projections=16", "compute.threads=1", "tracking=off", "quiet=true", "data.n_train=4096", "net.width=32",
        "net.depth=2", "stop.tolerance=100", "adapter=lowrank", "adapter.rank=2"]


def make_run(folder, *extra):
    register_configs()
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        cfg = compose("run", overrides=[*TINY, *extra, f"run_dir={folder}"])
    assert cli.run_job(cfg) == 0
    return folder


def user_teacher(folder: Path) -> list[str]:
    """A user's teacher: our MLP's weights saved alone, built by distillrun.nets:build_net."""
    torch.manual_seed(5)
    net = build_net("mlp", (2,), 0, width=32, depth=2)
    save_file(net.state_dict(), str(folder / "teacher.safetensors"))
    return ["teacher=import", "teacher.factory=distillrun.nets:build_net",
            f"teacher.weights={folder / 'teacher.safetensors'}", "+teacher.factory_kwargs.kind=mlp",
            "+teacher.factory_kwargs.data_shape=[2]", "+teacher.factory_kwargs.width=32",
            "+teacher.factory_kwargs.depth=2"]


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    torch.set_num_threads(1)
    base = tmp_path_factory.mktemp("adapter-runs")
    return {"progressive": make_run(base / "prog"),
            "consistency": make_run(base / "cons", "method=consistency", "method.steps=[2,1]"),
            "imported": make_run(base / "imp", *user_teacher(base))}


def teacher_net(run: Path):
    model, _ = verbs.rebuild_student(run / "teacher")
    return model.net


@pytest.mark.parametrize("name", ["progressive", "consistency"])
def test_a_stage_saves_the_adapter_alone_naming_its_teacher(runs, name):
    run = runs[name]
    full = sum(p.numel() for p in teacher_net(run).parameters())
    for folder in sorted(run.glob("stage-*")):
        tensors = load_file(str(folder / "weights.safetensors"))
        meta = json.loads((folder / "model.json").read_text())
        assert tensors and all(k.endswith((".factor_in", ".factor_out")) for k in tensors)
        assert meta["adapter"]["base_sha256"] == adapters.base_digest(teacher_net(run))
        sizes = json.loads((folder / "metrics.json").read_text())["metrics"]
        saved = sum(t.numel() for t in tensors.values())
        assert sizes["size/trainable_params"] == saved < full / 4  # what trains is what is saved
        assert sizes["size/saved_bytes"] == (folder / "weights.safetensors").stat().st_size


@pytest.mark.parametrize("name", ["progressive", "consistency", "imported"])
def test_draw_rebuilds_teacher_plus_adapter_and_repeats_the_scored_samples(runs, name, tmp_path):
    run = runs[name]
    cfg = OmegaConf.load(run / "config.yaml")
    last = max(int(p.name[6:]) for p in run.glob("stage-*"))
    assert verbs.main("draw", [str(run), "--stage", str(last), "--out", str(tmp_path / "x.npy")]) == 0
    bench = evaluate.make_bench(pipeline.load_data(cfg), cfg.eval.samples, cfg.eval.projections, cfg.eval.bootstrap,
                                cfg.eval.seed, cond_needed=False)
    again = evaluate.quality(bench, torch.from_numpy(np.load(tmp_path / "x.npy")))
    scored = json.loads((run / f"stage-{last:02d}" / "metrics.json").read_text())["metrics"]
    for metric in ("sw2", "mmd2"):
        assert again[metric] == pytest.approx(scored[f"quality/{metric}"], rel=1e-9, abs=1e-12)


@pytest.mark.parametrize("name", ["progressive", "consistency"])
def test_merge_writes_a_full_network_that_samples_the_same(runs, name, tmp_path, capsys):
    run = runs[name]
    assert verbs.main("merge", [str(run), "--stage", "1", "--out", str(tmp_path / "m")]) == 0
    merged, meta = verbs.rebuild_student(tmp_path / "m")
    student, _ = verbs.rebuild_student(run / "stage-01")
    assert "adapter" not in meta and not adapters.adapted(adapters.core_network(merged))
    names = set(load_file(str(tmp_path / "m" / "weights.safetensors")))
    assert names == set(adapters.merged_copy(student).state_dict())
    cfg = OmegaConf.load(run / "config.yaml")
    a = verbs.draw_samples(merged, meta, cfg, 64, 3, None)
    b = verbs.draw_samples(student, meta, cfg, 64, 3, None)
    assert torch.equal(a, b)


def test_merge_refuses_a_full_student(tmp_path, capsys):
    run = make_run(tmp_path / "full", "adapter=full", "method.iterations=5")
    assert verbs.main("merge", [str(run)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "holds a full student already" in err[0]
    assert not (run / "merged").exists()


def test_progressive_stage_starts_from_the_previous_adapter_and_is_taught_by_it(runs):
    """Stage k's student is stage k-1's adapter on the same frozen teacher; stage k's teacher (k-1's student,
    merged) computes exactly what k-1's student computes."""
    run = runs["progressive"]
    cfg = OmegaConf.load(run / "config.yaml")
    previous, _ = verbs.rebuild_student(run / "stage-01")
    parts = pipeline.RunParts(cfg, pipeline.method_named("progressive"), None, None, run, True)
    student = pipeline.make_student(parts, previous)
    a, b = adapters.adapted(adapters.core_network(student)), adapters.adapted(adapters.core_network(previous))
    assert set(a) == set(b) and all(torch.equal(a[n].factor_out, b[n].factor_out) for n in a)
    assert any(b[n].factor_out.abs().sum() > 0 for n in b)  # stage 1 did train its adapter
    trainable = {n for n, p in student.named_parameters() if p.requires_grad}
    assert trainable and all(n.endswith(("factor_in", "factor_out")) for n in trainable)
    assert adapters.base_digest(adapters.core_network(student)) == adapters.base_digest(teacher_net(run))
    teacher = adapters.frozen_teacher(previous)
    assert not adapters.adapted(adapters.core_network(teacher))
    x, t = torch.randn(32, 2, generator=torch.Generator().manual_seed(0)), torch.rand(32)
    with torch.no_grad():
        assert torch.equal(teacher(x, t), previous(x, t))


def test_resume_reloads_the_saved_adapters(runs, capsys):
    run = runs["progressive"]
    before = json.loads((run / "summary.json").read_text())
    register_configs()
    cfg = OmegaConf.load(run / "config.yaml")
    assert cli.run_job(cfg) == 0
    after = json.loads((run / "summary.json").read_text())
    assert [r["metrics"] for r in after["stages"]] == [r["metrics"] for r in before["stages"]]


def test_compare_shows_trained_parameters_and_saved_size(runs, tmp_path, capsys):
    assert verbs.main("compare", [str(runs["progressive"]), "--out", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "trained" in out and "saved" in out and "progressive · adapter rank 2" in out
    sizes = json.loads((runs["progressive"] / "stage-01" / "metrics.json").read_text())["metrics"]
    row = next(line for line in out.splitlines() if "  1  " in line and "within" in line)
    assert str(sizes["size/trainable_params"]) in row and "kB" in row


def test_mlflow_logs_the_sizes_beside_quality(tmp_path):
    from mlflow import MlflowClient

    register_configs()
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        cfg = compose("run", overrides=[*TINY, "tracking=local", "method.iterations=5", "teacher.steps=4",
                                        f"run_dir={tmp_path / 'run'}", f"tracking.uri=sqlite:///{tmp_path / 's.db'}",
                                        f"tracking.artifacts={tmp_path / 'art'}"])
    assert cli.run_job(cfg) == 0
    client = MlflowClient(tracking_uri=cfg.tracking.uri)
    exp = client.get_experiment_by_name(cfg.tracking.experiment)
    stages = [r for r in client.search_runs([exp.experiment_id]) if "mlflow.parentRunId" in r.data.tags]
    assert stages
    for r in stages:
        assert r.data.metrics["size/trainable_params"] > 0 and r.data.metrics["size/saved_bytes"] > 0
        assert "quality/sw2" in r.data.metrics


# ------------------------------------------------------------------------------------------------- bad input
@pytest.mark.parametrize("override,needle", [
    ("adapter.rank=0", "adapter.rank=0: must be a whole number >= 1"),
    ("adapter.rank=-3", "adapter.rank=-3: must be a whole number >= 1"),
    ("adapter.scale=0", "adapter.scale=0"),
    ("adapter.layers=[blocks.*.inner,nope*]", "pattern 'nope*' matches no Linear or Conv2d layer"),
    ("adapter.layers=[]", "adapter.layers=[]: must name at least one layer pattern"),
    ("adapter.start_from=/no/such.safetensors", "adapter.start_from='/no/such.safetensors': no such file"),
])
def test_bad_adapter_settings_are_one_line_exit_2_nothing_written(tmp_path, override, needle):
    line = refused(tmp_path, "adapter.enabled=true", override)
    assert needle in line, line


def test_an_adapter_for_another_architecture_names_the_first_mismatching_layer(tmp_path):
    net = build_net("mlp", (2,), 0, width=48, depth=2)
    adapters.attach(net, adapters.AdapterSpec(rank=2))
    path = tmp_path / "wide.safetensors"
    adapters.Adapter.extract(net).save(path)
    line = refused(tmp_path, "adapter.enabled=true", f"adapter.start_from={path}")
    assert f"{path}: layer 'embed.time_mlp.0' has weight shape [48, 32] in the adapter but [32, 32]" in line, line


def test_an_adapter_of_another_base_teacher_needs_the_override(tmp_path):
    """Imported teacher: its weights are known before any work, so the hash is checked in preflight."""
    teacher = user_teacher(tmp_path)
    other = build_net("mlp", (2,), 0, width=32, depth=2)  # same architecture, other weights
    adapters.attach(other, adapters.AdapterSpec(rank=2))
    path = tmp_path / "other.safetensors"
    adapters.Adapter.extract(other).save(path)
    line = refused(tmp_path, *teacher, "adapter.enabled=true", f"adapter.start_from={path}")
    assert "made for the base teacher with weights sha256" in line and "adapter.allow_other_base=true" in line, line
    from test_bad_input import compose_cfg

    cfg = compose_cfg(tmp_path, *teacher, "adapter.enabled=true", f"adapter.start_from={path}",
                      "adapter.allow_other_base=true")
    pipeline.preflight(cfg)  # accepted with the override


def test_start_from_gives_stage_one_that_adapter(runs):
    """adapter.start_from: stage 1's student starts with the file's factors on the run's teacher."""
    run = runs["progressive"]
    cfg = OmegaConf.load(run / "config.yaml")
    state, meta = checkpoint.load_model_files(run / "stage-03")
    start = adapters.Adapter.from_payload(state, meta["adapter"])
    teacher, _ = verbs.rebuild_student(run / "teacher")
    parts = pipeline.RunParts(cfg, pipeline.method_named("progressive"), None, None, run, True, adapter_start=start)
    student = pipeline.make_student(parts, teacher)
    got = adapters.adapted(adapters.core_network(student))
    assert set(got) == set(start.layers)
    assert all(torch.equal(got[n].factor_out, f.factor_out) and torch.equal(got[n].factor_in, f.factor_in)
               for n, f in start.layers.items())
    assert not adapters.adapted(teacher.net)  # the teacher itself is left as it was
