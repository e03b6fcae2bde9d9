"""Distillation methods: each is one module here that defines a `Method` subclass and registers it.

A method tells the pipeline, the verbs and validation everything they need, through `Method`:
  config        its config dataclass, on `MethodConfig` (the training keys every method has); registering the
                method also registers that dataclass as the Hydra option `method=<name>` (a YAML of the same
                name in configs/method/ may set other defaults on top of it)
  validate      its own checks of cfg.method, raising config.ConfigError
  plan          the stages: student steps, the steps of the stage's own teacher, iterations
  make_student  a stage's student from the previous stage's student (the teacher's network at stage 1)
  chains_teacher  whether a finished student becomes the next stage's teacher
  loss / train  the stage's loss for the shared training loop (train runs that loop; override to do otherwise)
  sampler       how a student samples at a step count
  save_meta / rebuild  the extra model.json keys of a saved student, and the student rebuilt from them
  evaluate / judge / summary_plots  optional: a method that scores its students its own way (guided: per
                guidance weight), its own stop rule on those metrics, and extra plots of the finished run

`register(method)` adds a method to METHODS; `method_named(name)` looks one up (a clear error for unknown names).
Every module of this package is imported when it loads, so a new method is one new file here (plus an optional
YAML in configs/method/). The teacher's own training (methods/teacher.py) is not a method: it makes the
network the stages start from.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Callable, ClassVar

import torch
from omegaconf import MISSING

from ..training import LoopResult, LoopSpec, train_loop


@dataclass
class MethodConfig:
    """The training keys every method has (cli, validation and the training loop read them by these names)."""
    name: str = MISSING
    iterations: int = 600  # per stage
    batch_size: int = 512
    lr: float = 3e-4  # decays linearly to 0 within each stage
    grad_clip: float = 1.0
    ema_decay: float = 0.0  # 0 = no EMA copy of the student


@dataclass(frozen=True)
class StageSpec:
    index: int  # 1-based
    steps: int  # the student's sampler steps (NFE) after this stage
    teacher_steps: int  # steps of the stage's own teacher
    iterations: int


@dataclass
class StageJob:
    """What one stage's training gets: the stage, its teacher and fresh student, the data and the run's means."""
    spec: StageSpec
    teacher: object  # a Denoiser: the original teacher, or the previous student when the method chains
    student: torch.nn.Module  # from make_student
    data: object  # distillrun.data.Dataset
    generator: torch.Generator  # every random draw of the stage
    state_path: Path | None  # mid-run state for resume
    device: torch.device
    quiet: bool = False


class Method:
    """Base of every method; the defaults fit a method trained by the shared loop on a `loss`."""
    name: ClassVar[str]
    config: ClassVar[type]  # a MethodConfig subclass whose `name` default is `name`
    chains_teacher: ClassVar[bool] = False

    def validate(self, cfg) -> None:
        """Checks of cfg.method beyond the common keys (checked by config.validate); raise ConfigError."""

    def plan(self, cfg) -> list[StageSpec]:
        raise NotImplementedError

    def make_student(self, cfg, previous: torch.nn.Module, data) -> torch.nn.Module:
        raise NotImplementedError

    def loss(self, cfg, job: StageJob) -> Callable:
        """loss_fn(model, target, batch, generator) for training.train_loop."""
        raise NotImplementedError

    def train(self, cfg, job: StageJob) -> LoopResult:
        """Train job.student on self.loss with the shared loop: Adam, linear LR decay, clipping, EMA, resume."""
        return train_loop(job.student, self.loss(cfg, job), job.data.batches(cfg.method.batch_size, job.device),
                          stage_loop_spec(cfg, job.spec), generator=job.generator, state_path=job.state_path,
                          desc=f"stage {job.spec.index} ({job.spec.steps} steps)", quiet=job.quiet)

    def sampler(self, method_cfg, student: torch.nn.Module, steps: int, seed: int) -> Callable:
        """sample(noise, cond) -> samples of `student` at `steps` steps; `seed` seeds any noise drawn on the way
        (the run's eval.seed, so every stage and `distillrun draw` draw the same)."""
        raise NotImplementedError

    def save_meta(self, method_cfg, student: torch.nn.Module) -> dict:
        """Extra model.json keys that `rebuild` needs besides the network."""
        return {}

    def rebuild(self, denoiser, meta: dict) -> torch.nn.Module:
        """The student as it sampled, around `denoiser` (the saved network as a NetDenoiser), before its weights
        are loaded."""
        return denoiser

    def evaluate(self, cfg, bench, spec: StageSpec, student, teacher_denoiser, num_classes: int) -> dict | None:
        """A stage's metrics when the method scores its students itself; None: the pipeline's evaluation
        (quality against the data, divergence from the teacher, the teacher's DDIM baseline)."""
        return None

    def judge(self, cfg, metrics: dict):
        """The stop rule's stopping.Verdict for a stage's metrics when the method judges itself; None: the
        pipeline's rule on quality/<stop.metric> against the teacher at full steps."""
        return None

    def summary_plots(self, summary: dict, run_dir: Path) -> list[Path]:
        """Extra plots of a finished run in the run folder (logged to the parent run when named there)."""
        return []


def stage_loop_spec(cfg, spec: StageSpec) -> LoopSpec:
    m = cfg.method
    return LoopSpec(iterations=spec.iterations, lr=m.lr, decay="linear", grad_clip=m.grad_clip, ema_decay=m.ema_decay,
                    save_every=cfg.checkpoint_every, precision=cfg.compute.precision)


def device_of(module: torch.nn.Module) -> torch.device:
    return next(module.parameters()).device


METHODS: dict[str, Method] = {}


def register(method: Method) -> Method:
    """Add `method` to METHODS and its config dataclass to Hydra's ConfigStore (group `method`): as
    `<name>_schema` for a YAML in configs/method/ to extend, and as `<name>` itself when there is no such YAML."""
    from importlib.resources import files

    from hydra.core.config_store import ConfigStore

    name = method.name
    if not (isinstance(method.config, type) and issubclass(method.config, MethodConfig)):
        raise TypeError(f"method {name!r}: its config must be a dataclass extending MethodConfig")
    if getattr(method.config, "name", None) != name:
        raise ValueError(f"method {name!r}: its config {method.config.__name__} must default name to {name!r}")
    METHODS[name] = method
    cs = ConfigStore.instance()
    cs.store(group="method", name=f"{name}_schema", node=method.config)
    if not files("distillrun.configs").joinpath("method", f"{name}.yaml").is_file():
        cs.store(group="method", name=name, node=method.config)
    return method


def method_named(name: str) -> Method:
    if name not in METHODS:
        raise ValueError(f"method.name={name!r} is unknown; valid: {', '.join(METHODS)}")
    return METHODS[name]


def _load_builtin_methods() -> None:
    """Import every module of this package (except the teacher's losses): each registers its method, so a new
    method is one new file here."""
    import importlib
    import pkgutil

    for module in pkgutil.iter_modules(__path__):
        if module.name != "teacher":
            importlib.import_module(f"{__name__}.{module.name}")


_load_builtin_methods()
