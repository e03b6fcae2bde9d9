"""Every YAML under configs/ and recipes/ composes and validates; bad values fail early with an error naming the full
key; the CLI turns them into one line on stderr and exit code 2, writing nothing. Source: the project's own contract
(the project's error rules: one line naming the key, exit code 2) and Hydra's documented compose API (hydra.compose,
initialize_config_module, version_base 1.3)."""
from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest
from hydra import compose, initialize_config_module
from hydra.errors import HydraException
from omegaconf.errors import OmegaConfBaseException

import distillrun
from distillrun.config import ConfigError, register_configs, validate

CONFIGS = Path(distillrun.__file__).parent.parent / "configs"
RECIPES = CONFIGS.parent / "recipes"  # the `recipe` group


def _options() -> list[tuple[str, str]]:
    """(group, option) for every YAML file in a config group folder and every recipe."""
    return sorted([(p.parent.name, p.stem) for p in CONFIGS.glob("*/*.yaml")] +
                  [("recipe", p.stem) for p in RECIPES.glob("*.yaml")])


@pytest.fixture(scope="module", autouse=True)
def _hydra():
    """One Hydra initialisation for the whole module (composing is then ~10x cheaper); cleared afterwards."""
    register_configs()
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        yield


def _compose(overrides: list[str]):
    return compose("run", overrides=overrides)


@pytest.fixture
def user_files(tmp_path):
    """Files and folders the file-based options need: an .npy array, an image folder, teacher weights."""
    (tmp_path / "points.npy").write_bytes(b"")  # validate checks existence only; loading is the pipeline's job
    (tmp_path / "images").mkdir()
    (tmp_path / "teacher.safetensors").write_bytes(b"")
    return tmp_path


def _with_required_files(overrides: list[str], files: Path):
    """Compose; where the result needs user files it leaves null (data=array/image_folder, teacher=import, and
    recipes built on them), point them at the fixture's files and compose again."""
    cfg = _compose(overrides)
    extra = []
    if cfg.data.name == "array" and not cfg.data.path:
        extra.append(f"data.path={files / 'points.npy'}")
    if cfg.data.name == "image_folder" and not cfg.data.path:
        extra.append(f"data.path={files / 'images'}")
    if cfg.method.name == "guided" and cfg.stop.metric == "panel":  # the panel scores against data, guided against
        extra.append("stop.metric=sw2")                               # the guided teacher: the method refuses it
    if cfg.teacher.source == "import":
        if not cfg.teacher.factory:
            extra.append("teacher.factory=my_models:build_teacher")
        if not cfg.teacher.weights:
            extra.append(f"teacher.weights={files / 'teacher.safetensors'}")
    if cfg.method.name == "guided" and not cfg.net.class_cond:  # guided distils a class-conditional teacher
        extra += ["net.class_cond=true", "teacher.label_dropout=0.15"]
    return _compose(overrides + extra) if extra else cfg


def test_there_are_options_to_check():
    groups = {g for g, _ in _options()}
    assert {"data", "net", "teacher", "method", "eval", "stop", "tracking", "compute", "recipe"} <= groups
    assert len(_options()) >= 20


@pytest.mark.parametrize("group,option", _options())
def test_every_option_composes_and_validates(group, option, user_files):
    cfg = _with_required_files([f"{group}={option}"], user_files)
    if (group, option) == ("compute", "gpu"):
        import torch

        if not torch.cuda.is_available():  # the only allowed refusal: no CUDA device on this machine
            with pytest.raises(ConfigError) as e:
                validate(cfg)
            assert e.value.key == "compute.device"
            return
    validate(cfg)
    if group != "recipe":
        node = cfg[group]
        yaml_keys = [line.split(":")[0] for line in (CONFIGS / group / f"{option}.yaml").read_text().splitlines()
                     if line and not line.startswith((" ", "#", "-", "defaults"))]
        for key in yaml_keys:  # the YAML's values really landed in the composed config
            assert key in node, (group, option, key)


def test_default_composes_to_the_default_recipe():
    cfg = _compose([])
    validate(cfg)
    assert cfg.data.name == "archipelago" and cfg.method.name == "progressive" and cfg.teacher.source == "train"


def test_default_stop_rule_is_the_panel_of_share_metrics():
    # README "Choosing the stop rule": the default rule is the panel precision + coverage with tolerance null (0.02).
    cfg = _compose([])
    assert cfg.stop.metric == "panel" and list(cfg.stop.panel) == ["precision", "coverage"]
    assert cfg.stop.tolerance is None and cfg.eval.detect is None
    validate(_compose(["stop.panel=[precision,coverage,c2st,recall]", "stop.tolerance=0.05"]))
    validate(_compose(["stop.metric=sw2"]))  # one metric, relative, default tolerance 0.25


def test_command_line_group_choice_beats_the_recipe():
    # Hydra: command-line overrides have the highest priority, above a recipe's `override /data: ...`.
    assert _compose(["data=spiral"]).data.name == "spiral"


# ------------------------------------------------------------------------------------------ bad values
BAD = [
    (["teacher.steps=-4"], "teacher.steps"),
    (["method=consistency", "method.steps=[2,-1]"], "method.steps"),
    (["method.target_steps=3"], "method.target_steps"),
    (["method.target_steps=512"], "method.target_steps"),  # larger than teacher.steps
    (["teacher.steps=96", "method.target_steps=4"], "method.target_steps"),  # 96 / 4 = 24, not a power of two
    (["method=consistency", "method.sigma_min=80.0"], "method.sigma_min"),  # sigma_min == sigma_max
    (["method=consistency", "method.sigma_min=90.0"], "method.sigma_min"),
    (["data.name=moons"], "data.name"),
    (["data=array", "data.path=/nonexistent/points.npy"], "data.path"),
    (["data=array"], "data.path"),  # path left null
    (["stop.metric=fd"], "stop.metric"),  # Fréchet distance needs images; archipelago is 2D
    (["stop.metric=mmd2"], "stop.mode"),  # stop=relative (default) with a metric that hovers around 0
    (["stop=relative", "stop.metric=nll_gap"], "stop.mode"),
    (["stop.tolerance=-1"], "stop.tolerance"),
    (["stop.panel=[precision,sw2]"], "stop.panel"),  # the panel's one tolerance is a share: sw2 is not one
    (["stop.panel=[fd]"], "stop.panel"),  # not a share, and images only
    (["stop.panel=[]"], "stop.panel"),
    (["stop=absolute", "stop.metric=precision", "stop.tolerance=null"], "stop.tolerance"),  # absolute needs a unit
    (["stop.metric=mmd2_div4"], "stop.mode"),  # signed: relative refused
    (["eval.detect=0"], "eval.detect"),
    (["eval.detect=-0.01"], "eval.detect"),
    (["method=consistency", "method.steps=[1,2,4]"], "method.steps"),  # not descending
    (["data=spiral", "teacher=oracle"], "teacher.source"),
]


@pytest.mark.parametrize("overrides,key", BAD, ids=[" ".join(o) for o, _ in BAD])
def test_bad_values_raise_config_error_naming_the_key(overrides, key):
    cfg = _compose(overrides)
    with pytest.raises(ConfigError) as e:
        validate(cfg)
    assert e.value.key == key
    assert str(e.value).startswith(f"{key}=")
    assert "\n" not in str(e.value)


@pytest.mark.parametrize("overrides,key", [(["data.foo=1"], "data.foo"), (["teacher.steps=abc"], "teacher.steps"),
                                           (["stop.z=high"], "stop.z")])
def test_unknown_keys_and_wrong_types_fail_at_compose(overrides, key):
    # Hydra structured configs (ConfigStore schemas) reject unknown keys and uncastable values at composition.
    with pytest.raises((HydraException, OmegaConfBaseException)) as e:
        _compose(overrides)
    text = str(e.value) + str(e.value.__cause__ or "")
    assert key in text


# ------------------------------------------------------------------------------------------------ CLI
@pytest.mark.parametrize("argv,key", [
    (["method.target_steps=3"], "method.target_steps"),
    (["data.foo=1"], "data.foo"),
    (["teacher.steps=abc"], "teacher.steps"),
    # second sweep value is invalid; dry_run=true so that a broken precheck could not start a real training job
    (["-m", "stop.tolerance=0.1,-1", "dry_run=true"], "stop.tolerance"),
])
def test_cli_bad_input_one_line_exit_2_nothing_written(argv, key, tmp_path):
    # Config problems are found before any training starts, reported in one line, exit code 2;
    # nothing is written (no MLflow store, no run folder).
    env = dict(os.environ, OMP_NUM_THREADS="1", PYTHONWARNINGS="ignore")
    proc = subprocess.run([sys.executable, "-m", "distillrun.cli", *argv], cwd=tmp_path, capture_output=True,
                          text=True, env=env)
    assert proc.returncode == 2, proc.stderr
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1, proc.stderr
    assert key in lines[0]
    assert not (tmp_path / "mlflow.db").exists()
    assert not (tmp_path / "runs").exists()
    assert list(tmp_path.iterdir()) == []
