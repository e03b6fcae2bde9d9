"""Typed configs registered with Hydra's ConfigStore, and `validate(cfg)`: every cross-field check in one
place, run before any work, raising `ConfigError` with the full key, the value and what is allowed."""
from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from typing import Any, Optional

from hydra.core.config_store import ConfigStore
from omegaconf import MISSING, DictConfig

from .metric_props import METRIC_PROPS, available, stop_metrics

class ConfigError(ValueError):
    """A config value that cannot be run; str() is the one line shown to the user."""

    def __init__(self, key: str, value, allowed: str):
        super().__init__(f"{key}={value!r}: {allowed}")
        self.key = key


@dataclass
class DataConfig:
    name: str = "archipelago"  # archipelago | spiral | rings | digits | tiles | array | image_folder
    n_train: int = 65536  # generated sets only: how many training points to draw
    image_size: int = 8  # digits: 8 (native) or 16; tiles and image folders: any of 8, 16, 32
    path: Optional[str] = None  # array (.npy/.npz) or image_folder
    key: Optional[str] = None  # array name inside an .npz; default: the first one
    rescale: bool = False  # map [0, 1] or [0, 255] user values to [-1, 1]
    seed: int = 0


@dataclass
class NetConfig:
    kind: str = "mlp"  # mlp (vectors) | unet (images)
    width: int = 128  # mlp; 128 x 3 blocks fits the 2D sets (benchmarks/README.md)
    depth: int = 3  # mlp residual blocks
    base: int = 32  # unet channels at full resolution
    mults: list[int] = field(default_factory=lambda: [1, 2])  # unet channel multipliers per level
    class_cond: bool = False  # condition on labels when the data has them


@dataclass
class TeacherConfig:
    source: str = "train"  # train | oracle (exact mixture denoiser) | import (user network + weights)
    schedule: str = "cosine"  # cosine | linear
    parameterization: str = "v"  # v | eps | x0
    steps: int = 256  # full step count: what sampling the teacher costs before distillation
    sampler: str = "ddim"  # ddim | ancestral | euler | heun, used for the teacher's reference samples
    iterations: int = 2000
    batch_size: int = 512
    lr: float = 2e-3
    warmup: int = 200  # linear LR warm-up, then cosine decay to 0
    ema_decay: float = 0.999
    grad_clip: float = 1.0
    # Class-conditional teachers (net.class_cond=true): the share of training labels replaced by the null label,
    # so the one network also learns the unconditional denoiser that classifier-free guidance needs
    # (Ho & Salimans 2022; 0.1-0.2 is common practice). In [0, 1); 0 = no unconditional model.
    label_dropout: float = 0.0
    factory: Optional[str] = None  # import: "package.module:function" returning an nn.Module
    factory_kwargs: dict[str, Any] = field(default_factory=dict)
    weights: Optional[str] = None  # import: safetensors file of that module's state dict


@dataclass
class EvalConfig:
    samples: int = 4096  # size of the fixed noise bank and of the data reference set
    projections: int = 128  # sliced Wasserstein directions, fixed per run
    bootstrap: int = 30  # resamples for standard errors
    baseline: bool = True  # also score the teacher's DDIM at each stage's step count
    seed: int = 1234  # noise bank, reference draw and projections
    detect: Optional[float] = None  # size the evaluation: eval.samples grows until the stop rule's metrics detect a
    #                                 worsening this small at stop.z (a pilot on exact data measures their se)


@dataclass
class StopConfig:
    metric: str = "panel"  # panel (the metrics in stop.panel together) or one metric of metric_props.METRIC_PROPS
    mode: str = "relative"  # one metric: relative: q <= q_teacher (1 + tolerance) | absolute: q <= q_teacher + tolerance
    # None: the rule's default -- panel: 0.02, a share of points (the student may lose 2% of the points more than
    # the teacher: samples off the data, data left uncovered); one metric, relative: 0.25 (25% worse than the teacher)
    tolerance: Optional[float] = None
    z: float = 2.0  # a stage is over tolerance only when q - z * se is still beyond the limit
    panel: list[str] = field(default_factory=lambda: list(PANEL_DEFAULT))  # share metrics judged together


# The default panel (README "Choosing the stop rule"; benchmarks/calibration.py): precision falls when samples leave
# the data manifold, coverage when modes drop.
PANEL_DEFAULT = ("precision", "coverage")
PANEL_TOLERANCE = 0.02
RELATIVE_TOLERANCE = 0.25


@dataclass
class TrackingConfig:
    enabled: bool = True
    uri: str = "sqlite:///mlflow.db"  # any MLflow tracking URI; default: a SQLite store in the working folder
    experiment: str = "distillrun"
    artifacts: Optional[str] = None  # where a new experiment keeps artifacts; None: MLflow's default (./mlruns)


@dataclass
class ComputeConfig:
    device: str = "cpu"  # cpu | cuda | auto
    precision: str = "fp32"  # fp32 | bf16 (autocast, CUDA only)
    # torch intra-op threads: auto = the count that trains fastest, timed on the training loop itself at each
    # loop start and when its speed changes (distillrun/threads.py); an integer N = exactly N threads
    threads: Any = "auto"
    compile: bool = False  # torch.compile the networks
    teacher_cache: bool = True  # reuse a trained teacher with the same data, network, settings, seed and code
    cache_dir: Optional[str] = None  # teacher cache folder; None: $DISTILLRUN_CACHE_DIR or ~/.cache/distillrun


@dataclass
class AdapterConfig:
    """Adapter students (low-rank adaptation, Hu et al. 2021): each student is the frozen teacher plus trainable
    low-rank changes of chosen Linear/Conv2d weights; a stage saves only those (see distillrun.adapters)."""
    enabled: bool = False  # adapter=lowrank turns it on; false: full students (every weight trains and is saved)
    rank: int = 8  # rank of every weight change
    scale: Optional[float] = None  # alpha of Hu et al.: the change is (scale / rank) B A; null: scale = rank
    layers: list[str] = field(default_factory=lambda: ["*"])  # glob patterns over the network's layer names
    skip: list[str] = field(default_factory=list)  # glob patterns of layers left without adapters
    train_also: list[str] = field(default_factory=list)  # glob patterns of parameters trained and saved whole
    lr: Optional[float] = None  # the students' learning rate; null: method.lr
    seed: int = 0  # the first factor's random start
    start_from: Optional[str] = None  # an adapter file (.safetensors) the first stage starts from
    allow_other_base: bool = False  # apply start_from even when it names another base teacher


@dataclass
class RunConfig:
    data: DataConfig = MISSING
    net: NetConfig = MISSING
    teacher: TeacherConfig = MISSING
    method: Any = MISSING  # a methods.MethodConfig subclass, chosen by the method group (METHODS)
    eval: EvalConfig = MISSING
    stop: StopConfig = MISSING
    tracking: TrackingConfig = MISSING
    compute: ComputeConfig = MISSING
    adapter: AdapterConfig = MISSING
    seed: int = 0
    run_dir: Optional[str] = None  # None: a new folder under runs/; an existing one is resumed
    dry_run: bool = False  # print the plan and exit
    quiet: bool = False  # no progress bars
    fresh: bool = False  # allow reusing a run folder made by a different config (discards its stages)
    checkpoint_every: int = 500  # iterations between resume points of teacher and stages: a kill loses at most these


def register_configs() -> None:
    from omegaconf import OmegaConf

    # hydra.run.dir follows run_dir when it is set, so Hydra's own files land in the run folder.
    OmegaConf.register_new_resolver("first_set", lambda a, b: b if a in (None, "", "None", "null") else a, replace=True)
    from . import methods  # noqa: F401  (registering a method stores its config in the `method` group)

    cs = ConfigStore.instance()
    cs.store(name="run_schema", node=RunConfig)
    for group, node in [("data", DataConfig), ("net", NetConfig), ("teacher", TeacherConfig), ("eval", EvalConfig),
                        ("stop", StopConfig), ("tracking", TrackingConfig), ("compute", ComputeConfig),
                        ("adapter", AdapterConfig)]:
        cs.store(group=group, name=f"{node.__name__.removesuffix('Config').lower()}_schema", node=node)
    for path in recipe_files():  # top-level recipes/ (installed as distillrun.recipes) is the `recipe` group
        cs.store(group="recipe", name=path.stem, node=OmegaConf.load(path), package="_global_")


def recipe_files() -> list:
    """The recipe YAMLs, sorted by name: each sets keys anywhere in the config (`# @package _global_`)."""
    from importlib.resources import files

    return sorted((p for p in files("distillrun.recipes").iterdir() if p.name.endswith(".yaml")),
                  key=lambda p: p.name)


def one_of(key: str, value, options) -> None:
    if value not in options:
        raise ConfigError(key, value, f"must be one of {', '.join(map(str, options))}")


def _positive(cfg: DictConfig, keys: list[str]) -> None:
    for key in keys:
        value = cfg
        for part in key.split("."):
            value = value[part]
        if not (value > 0 and math.isfinite(value)):
            raise ConfigError(key, value, "must be a finite number > 0")


def validate(cfg: DictConfig) -> None:
    """All cross-field checks, before any work. Raises ConfigError naming the full key. Allowed values come
    from the registries (datasets, networks, methods, samplers, schedules, parameterizations) and from the
    metric property table."""
    from .data import DATASETS
    from .denoiser import PARAMETERIZATIONS
    from .methods import METHODS
    from .nets import NETS
    from .samplers import SAMPLERS
    from .schedule import SCHEDULES

    one_of("data.name", cfg.data.name, DATASETS)
    source = DATASETS[cfg.data.name]
    if source.reads_path:
        if not cfg.data.path:
            raise ConfigError("data.path", cfg.data.path, f"data.name={cfg.data.name} needs a file or folder path")
        if not os.path.exists(cfg.data.path):
            raise ConfigError("data.path", cfg.data.path, "no such file or folder")
    one_of("data.image_size", cfg.data.image_size, (8, 16, 32))
    one_of("net.kind", cfg.net.kind, NETS)
    one_of("teacher.source", cfg.teacher.source, ("train", "oracle", "import"))
    one_of("teacher.schedule", cfg.teacher.schedule, SCHEDULES)
    one_of("teacher.parameterization", cfg.teacher.parameterization, PARAMETERIZATIONS)
    one_of("teacher.sampler", cfg.teacher.sampler, SAMPLERS)
    if cfg.teacher.source == "oracle" and not source.known_density:
        known = [name for name, d in DATASETS.items() if d.known_density]
        raise ConfigError("teacher.source", "oracle", "the exact denoiser needs data with a known density "
                          f"(data.name={' or '.join(known)})")
    if cfg.teacher.source == "import":
        for key in ("factory", "weights"):
            if not cfg.teacher[key]:
                raise ConfigError(f"teacher.{key}", cfg.teacher[key], "teacher.source=import needs it set")
        if ":" not in cfg.teacher.factory:
            raise ConfigError("teacher.factory", cfg.teacher.factory, "must look like 'package.module:function'")
        if not os.path.isfile(cfg.teacher.weights):
            raise ConfigError("teacher.weights", cfg.teacher.weights, "no such file (a .safetensors state dict)")
    _positive(cfg, ["net.width", "net.depth", "net.base"])
    if not cfg.net.mults or any(m < 1 for m in cfg.net.mults):
        raise ConfigError("net.mults", list(cfg.net.mults), "must be a non-empty list of multipliers >= 1, e.g. [1, 2]")
    _positive(cfg, ["data.n_train", "teacher.steps", "teacher.iterations", "teacher.batch_size", "teacher.lr",
                    "eval.samples", "eval.projections", "eval.bootstrap", "checkpoint_every"])
    if not 0 <= cfg.teacher.ema_decay < 1:
        raise ConfigError("teacher.ema_decay", cfg.teacher.ema_decay, "must be in [0, 1)")
    if not (0 <= cfg.teacher.label_dropout < 1):
        raise ConfigError("teacher.label_dropout", cfg.teacher.label_dropout, "must be in [0, 1) (0.1-0.2 is usual)")
    if cfg.teacher.warmup < 0:
        raise ConfigError("teacher.warmup", cfg.teacher.warmup, "must be >= 0")
    one_of("method.name", cfg.method.name, METHODS)
    _positive(cfg, ["method.iterations", "method.batch_size", "method.lr"])  # MethodConfig: every method has them
    if not 0 <= cfg.method.ema_decay < 1:
        raise ConfigError("method.ema_decay", cfg.method.ema_decay, "must be in [0, 1)")
    METHODS[cfg.method.name].validate(cfg)
    _validate_stop(cfg, source.images, source.known_density)
    if cfg.stop.tolerance is not None and not (cfg.stop.tolerance > 0 and math.isfinite(cfg.stop.tolerance)):
        raise ConfigError("stop.tolerance", cfg.stop.tolerance, "must be a finite number > 0 (or null: the default)")
    if not (math.isfinite(cfg.stop.z) and cfg.stop.z >= 0):
        raise ConfigError("stop.z", cfg.stop.z, "must be a finite number >= 0")
    if cfg.eval.detect is not None and not (math.isfinite(cfg.eval.detect) and cfg.eval.detect > 0):
        raise ConfigError("eval.detect", cfg.eval.detect, "must be a finite number > 0 or null")
    _validate_adapter(cfg.adapter)
    one_of("compute.device", cfg.compute.device, ("cpu", "cuda", "auto"))
    one_of("compute.precision", cfg.compute.precision, ("fp32", "bf16"))
    _threads(cfg.compute.threads)
    if cfg.compute.cache_dir and os.path.exists(cfg.compute.cache_dir) and not os.path.isdir(cfg.compute.cache_dir):
        raise ConfigError("compute.cache_dir", cfg.compute.cache_dir, "is a file; give a folder (made if missing)")
    if cfg.compute.device == "cuda":
        import torch

        if not torch.cuda.is_available():
            raise ConfigError("compute.device", "cuda", "no CUDA device is visible; use cpu or auto")


def _threads(value) -> None:
    if value == "auto" or (isinstance(value, int) and not isinstance(value, bool) and value >= 1):
        return
    raise ConfigError("compute.threads", value, "must be auto (timed on the training loop) or a whole number >= 1")


def _validate_stop(cfg: DictConfig, images: bool, known_density: bool) -> None:
    """stop.*: a metric the data can give (or a panel of share metrics), a mode it allows."""
    usable = [m for m in stop_metrics() if available(m, images, known_density)]
    one_of("stop.metric", cfg.stop.metric, ["panel"] + usable)
    if cfg.stop.metric == "panel":
        shares = [m for m in usable if METRIC_PROPS[m].share]
        if not cfg.stop.panel:
            raise ConfigError("stop.panel", list(cfg.stop.panel), f"needs at least one metric of {', '.join(shares)}")
        for m in cfg.stop.panel:
            one_of("stop.panel", m, shares)
        return
    one_of("stop.mode", cfg.stop.mode, ("relative", "absolute"))
    if cfg.stop.mode == "relative" and METRIC_PROPS[cfg.stop.metric].signed:
        raise ConfigError("stop.mode", "relative", f"stop.metric={cfg.stop.metric} hovers around 0 and can go "
                          "negative; use stop=absolute (stop.mode=absolute)")
    if cfg.stop.mode == "absolute" and cfg.stop.tolerance is None:
        raise ConfigError("stop.tolerance", None, f"stop.mode=absolute needs a tolerance in units of {cfg.stop.metric}")

def _validate_adapter(a: DictConfig) -> None:
    """The adapter keys that need no network (layer patterns are checked against it in pipeline.preflight)."""
    if not a.enabled:
        return
    if isinstance(a.rank, bool) or a.rank < 1:
        raise ConfigError("adapter.rank", a.rank, "must be a whole number >= 1")
    for key in ("scale", "lr"):
        if a[key] is not None and not (math.isfinite(a[key]) and a[key] > 0):
            raise ConfigError(f"adapter.{key}", a[key], "must be a finite number > 0, or null")
    if not a.layers:
        raise ConfigError("adapter.layers", list(a.layers), "must name at least one layer pattern, e.g. ['*'] for "
                          "every Linear and Conv2d layer")
    for key in ("layers", "skip", "train_also"):
        if any(not p for p in a[key]):
            raise ConfigError(f"adapter.{key}", list(a[key]), "must be a list of non-empty glob patterns")
    if a.start_from is not None and not os.path.isfile(a.start_from):
        raise ConfigError("adapter.start_from", a.start_from, "no such file (an adapter .safetensors a run saved)")


