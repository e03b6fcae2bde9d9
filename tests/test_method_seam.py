"""A new method is one registered `Method`: this test defines one (a student that copies its teacher without
training) inside the test suite, registers it, and runs it through the real command line (`distillrun
method=copy_teacher ...`, in this process), then `distillrun draw` and `distillrun compare` on its run folder,
without any package file changed. Outside reference: a copied teacher sampled with DDIM at n steps must give
exactly the teacher's own DDIM at n steps on the same noise (Song et al. 2021, Eq. 12, run by samplers.sample on
the teacher network rebuilt from the run folder's teacher/), and the run folder is read back with json and numpy.
"""
from __future__ import annotations

import copy
import json
import sys
from dataclasses import dataclass, field
from importlib.resources import files

import numpy as np
import pytest
import torch

from distillrun import cli, methods, verbs
from distillrun.methods import Method, MethodConfig, StageSpec
from distillrun.samplers import sample, uniform_grid
from distillrun.training import LoopResult

NAME = "copy_teacher"


@dataclass
class CopyTeacherConfig(MethodConfig):
    name: str = NAME
    steps: list[int] = field(default_factory=lambda: [8, 4])  # one stage per entry


class CopyTeacher(Method):
    """Each stage's student is the teacher's network, untouched, sampled with DDIM at fewer steps."""
    name = NAME
    config = CopyTeacherConfig

    def plan(self, cfg):
        return [StageSpec(i + 1, n, cfg.teacher.steps, 0) for i, n in enumerate(cfg.method.steps)]

    def make_student(self, cfg, previous, data):
        return copy.deepcopy(previous)

    def train(self, cfg, job):
        return LoopResult(model=job.student)  # no iterations: the copy is the student

    def sampler(self, method_cfg, student, steps, seed):
        return lambda noise, cond: sample(student, noise, uniform_grid(steps), "ddim", cond=cond)


@pytest.fixture
def copy_teacher():
    from hydra.core.config_store import ConfigStore

    methods.register(CopyTeacher())
    yield
    methods.METHODS.pop(NAME)
    group = ConfigStore.instance().repo["method"]
    for key in (f"{NAME}.yaml", f"{NAME}_schema.yaml"):
        group.pop(key, None)


TINY = ["tracking=off", "quiet=true", "compute.threads=1", "data.n_train=2048", "teacher.steps=16",
        "teacher.iterations=40", "teacher.batch_size=128", "teacher.warmup=5", "eval.samples=256",
        "eval.projections=16", "eval.bootstrap=5", "eval.baseline=false", "stop.tolerance=100"]


def test_a_method_defined_in_a_test_runs_through_the_cli_draw_and_compare(copy_teacher, tmp_path, monkeypatch, capsys):
    assert not files("distillrun.configs").joinpath("method", f"{NAME}.yaml").is_file()  # no package file for it
    run = tmp_path / "run"
    monkeypatch.chdir(tmp_path)
    monkeypatch.setattr(sys, "argv", ["distillrun", f"method={NAME}", f"run_dir={run}", *TINY])
    cli.main()

    summary = json.loads((run / "summary.json").read_text())
    assert summary["method"] == NAME
    assert [(s["index"], s["steps"], s["verdict"]) for s in summary["stages"]] == [(1, 8, "within"), (2, 4, "within")]
    assert summary["chosen"]["index"] == 2
    meta = json.loads((run / "stage-02" / "model.json").read_text())
    assert (meta["method"], meta["steps"]) == (NAME, 4)

    assert verbs.main("draw", [str(run), "--count", "64", "--seed", "7", "--out", str(tmp_path / "x.npy")]) == 0
    x = torch.from_numpy(np.load(tmp_path / "x.npy"))
    teacher, _ = verbs.rebuild_student(run / "teacher")
    noise = torch.randn((64, 2), generator=torch.Generator().manual_seed(7))  # draw's noise bank for --seed 7
    torch.testing.assert_close(x, sample(teacher, noise, uniform_grid(4), "ddim"), rtol=0, atol=1e-6)

    assert verbs.main("compare", [str(run)]) == 0
    out = capsys.readouterr().out
    assert NAME in out and (run / "compare_quality.png").is_file() and (run / "compare_samples.png").is_file()


def test_unknown_method_names_the_registered_ones(copy_teacher):
    with pytest.raises(ValueError, match=f"method.name='nope' is unknown; valid: .*{NAME}"):
        methods.method_named("nope")
