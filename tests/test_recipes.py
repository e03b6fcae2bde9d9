"""Every recipe: its header, its composition and validation, and a tiny end-to-end run through the Hydra
app's task function (cli.run_job), asserting on the run folder it leaves.

Outside references: the run folder is read back with json and safetensors' own loader; the archipelago_both
sweep runs as a real `distillrun --multirun` subprocess, and its MLflow records are read with MLflow's own
MlflowClient. Sizes are tiny, so the runs check structure, not quality.
"""
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from conftest import compose_run
from safetensors.torch import load_file, save_file

from distillrun import cli, verbs
from distillrun.config import ConfigError, validate

os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")
RECIPES = verbs.recipe_names()
TINY = ["teacher.iterations=30", "method.iterations=10", "eval.samples=128", "eval.bootstrap=5", "teacher.steps=8",
        "compute.threads=1", "tracking=off", "quiet=true"]
IMAGE_TINY = ["net.base=8", "teacher.batch_size=32", "method.batch_size=32", "eval.projections=16"]
# What each recipe's name promises: (data.name, net.kind, method.name or None for a sweep, teacher.source).
EXPECTED = {
    "archipelago_progressive": ("archipelago", "mlp", "progressive", "train"),
    "archipelago_adapters": ("archipelago", "mlp", "progressive", "train"),
    "archipelago_consistency": ("archipelago", "mlp", "consistency", "train"),
    "archipelago_both": ("archipelago", "mlp", None, "oracle"),
    "archipelago_guided": ("archipelago", "mlp", "guided", "oracle"),
    "digits_progressive": ("digits", "unet", "progressive", "train"),
    "digits_consistency": ("digits", "unet", "consistency", "train"),
    "tiles_progressive": ("tiles", "unet", "progressive", "train"),
    "own_data": ("array", "mlp", "progressive", "train"),
    "own_teacher": ("array", "mlp", "progressive", "import"),
}
USER_MODULE = '''
import torch
from torch import nn


class Tiny(nn.Module):
    def __init__(self, width=16):
        super().__init__()
        self.net = nn.Sequential(nn.Linear(3, width), nn.SiLU(), nn.Linear(width, 2))

    def forward(self, x, t, cond=None):
        return self.net(torch.cat([x, t[:, None]], dim=1))


def build_teacher(width=16):
    return Tiny(width)
'''


def compose_recipe(name, *extra):
    return compose_run(f"recipe={name}", *extra)


@pytest.fixture
def user_files(tmp_path, monkeypatch):
    """A 2D point file and a user teacher module (factory + safetensors weights) importable from tmp_path."""
    rng = np.random.default_rng(0)
    points = np.concatenate([rng.normal((-1, 0), 0.2, (600, 2)), rng.normal((1, 0.5), 0.2, (600, 2))])
    np.save(tmp_path / "points.npy", points.astype(np.float32))
    (tmp_path / "recipe_test_teacher.py").write_text(USER_MODULE)
    monkeypatch.syspath_prepend(str(tmp_path))
    sys.modules.pop("recipe_test_teacher", None)
    import recipe_test_teacher

    torch.manual_seed(0)
    save_file(recipe_test_teacher.build_teacher(16).state_dict(), str(tmp_path / "teacher.safetensors"))
    return {"own_data": [f"data.path={tmp_path / 'points.npy'}"],
            "own_teacher": [f"data.path={tmp_path / 'points.npy'}", "teacher.factory=recipe_test_teacher:build_teacher",
                            "+teacher.factory_kwargs.width=16", f"teacher.weights={tmp_path / 'teacher.safetensors'}"]}


# ------------------------------------------------------------------------------------------- headers
@pytest.mark.parametrize("name", RECIPES)
def test_header_states_purpose_command_and_cpu_time(name):
    path = verbs.recipe_path(name)
    assert path.read_text().splitlines()[0] == "# @package _global_"
    header = verbs.recipe_header(path)
    assert set(header) == set(verbs.HEADER_KEYS), f"{name}: header has {sorted(header)}"
    assert f"recipe={name}" in header["Command"][0]
    assert "estimate" in header["CPU time"] or "measured" in header["CPU time"]


def test_every_recipe_is_expected():
    assert sorted(EXPECTED) == RECIPES


# --------------------------------------------------------------------------------------- composition
@pytest.mark.parametrize("name", RECIPES)
def test_recipe_composes_and_validates(name, user_files):
    data, net, method, source = EXPECTED[name]
    cfg = compose_recipe(name, *user_files.get(name, []))
    validate(cfg)
    assert (cfg.data.name, cfg.net.kind, cfg.teacher.source) == (data, net, source)
    if method is not None:
        assert cfg.method.name == method


@pytest.mark.parametrize("name,given,key", [("own_data", 0, "data.path"), ("own_teacher", 0, "data.path"),
                                            ("own_teacher", 1, "teacher.factory"), ("own_teacher", 2, "teacher.weights")])
def test_own_recipes_name_the_missing_key(name, given, key, user_files):
    overrides = user_files[name]
    overrides = [o for o in overrides if not o.startswith("teacher.weights")] if given == 2 else overrides[:given]
    with pytest.raises(ConfigError) as err:
        validate(compose_recipe(name, *overrides))
    assert err.value.key == key


@pytest.mark.parametrize("method", ["progressive", "consistency"])
def test_both_methods_share_teacher_experiment_and_sweep_folder(method):
    cfg = compose_run("recipe=archipelago_both", f"method={method}", return_hydra_config=True)
    validate(cfg)
    assert cfg.method.name == method and cfg.teacher.source == "oracle"
    assert cfg.tracking.experiment == "archipelago-both"
    assert (cfg.hydra.sweep.dir, cfg.hydra.sweep.subdir) == ("runs/archipelago_both", method)


# ------------------------------------------------------------------------------------------ end to end
def check_run_folder(run_dir: Path, method: str) -> dict:
    summary = json.loads((run_dir / "summary.json").read_text())
    assert summary["method"] == method and summary["stages"]
    for record in summary["stages"]:
        assert record["verdict"] in ("within", "over", "failed")
        stage = run_dir / f"stage-{record['index']:02d}"
        if record["verdict"] != "failed":
            assert load_file(str(stage / "weights.safetensors")), stage
            assert json.loads((stage / "model.json").read_text())["method"] == method
    return summary


def run_recipe(name, run_dir, *extra):
    method = EXPECTED[name][2]
    extra = [*TINY, *(["method.steps=[2,1]"] if method == "consistency" else []), *extra, f"run_dir={run_dir}"]
    cfg = compose_recipe(name, *extra)
    assert cli.run_job(cfg) == 0
    return check_run_folder(run_dir, method)


@pytest.mark.parametrize("name", ["archipelago_progressive", "archipelago_consistency", "own_data",
                                  "archipelago_adapters"])
def test_2d_recipe_runs_end_to_end(name, tmp_path, user_files):
    summary = run_recipe(name, tmp_path / "run", *user_files.get(name, []))
    steps = [r["steps"] for r in summary["stages"]]  # the stop rule may end the run early: a prefix of the plan
    assert steps == ([2, 1] if EXPECTED[name][2] == "consistency" else [4, 2, 1])[:len(steps)]


@pytest.mark.parametrize("method", ["progressive", "consistency"])
def test_archipelago_both_job_runs_end_to_end(method, tmp_path):
    cfg = compose_recipe("archipelago_both", *TINY, *(["method.steps=[2,1]"] if method == "consistency" else []),
                         f"method={method}", f"run_dir={tmp_path / method}")
    assert cli.run_job(cfg) == 0
    check_run_folder(tmp_path / method, method)


def test_own_teacher_runs_and_draws(tmp_path, user_files, capsys):
    run_recipe("own_teacher", tmp_path / "run", *user_files["own_teacher"])
    meta = json.loads((tmp_path / "run" / "stage-01" / "model.json").read_text())
    assert meta["net"]["factory"] == "recipe_test_teacher:build_teacher"
    # The student of an imported teacher is rebuilt from the user's factory again when drawing.
    assert verbs.main("draw", [str(tmp_path / "run"), "--stage", "1", "--count", "16"]) == 0
    assert np.load(tmp_path / "run" / "drawn" / "stage-01_seed-1234_n-16.npy").shape == (16, 2)


def test_digits_progressive_runs_end_to_end(tmp_path):
    run_recipe("digits_progressive", tmp_path / "run", *IMAGE_TINY, "method.target_steps=4")


@pytest.mark.slow
@pytest.mark.parametrize("name", ["digits_consistency", "tiles_progressive"])
def test_image_recipe_runs_end_to_end(name, tmp_path):
    run_recipe(name, tmp_path / "run", *IMAGE_TINY)


@pytest.mark.slow
def test_archipelago_both_sweep_runs_both_methods_into_one_experiment(tmp_path):
    store = tmp_path / "mlflow.db"
    cmd = [sys.executable, "-c", "from distillrun.cli import main; main()", "--multirun", "recipe=archipelago_both",
           "method=progressive,consistency", *[o for o in TINY if not o.startswith("tracking")],
           f"tracking.uri=sqlite:///{store}", f"tracking.artifacts={tmp_path / 'artifacts'}",
           "teacher.iterations=20", "method.iterations=5", "data.n_train=2048"]
    env = {**os.environ, "OMP_NUM_THREADS": "1"}
    done = subprocess.run(cmd, cwd=tmp_path, env=env, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr[-2000:]
    folders = {m: tmp_path / "runs" / "archipelago_both" / m for m in ("progressive", "consistency")}
    for method, folder in folders.items():
        check_run_folder(folder, method)
    from mlflow import MlflowClient

    client = MlflowClient(tracking_uri=f"sqlite:///{store}")
    experiment = client.get_experiment_by_name("archipelago-both")
    runs = client.search_runs([experiment.experiment_id], "tags.`distillrun.recipe` = 'archipelago_both'")
    assert sorted(r.data.tags["distillrun.method"] for r in runs) == ["consistency", "progressive"]
