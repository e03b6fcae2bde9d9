"""Typed configs registered with Hydra's ConfigStore, and `validate(cfg)`: every cross-field check in one
place, run before any work, raising `ConfigError` with the full key, the value and what is allowed."""
from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from typing import Any, Optional

from hydra.core.config_store import ConfigStore
from omegaconf import MISSING, DictConfig

DATASETS_2D = ("archipelago", "spiral", "rings")
DATASETS_IMAGES = ("digits", "tiles")
DATASETS_FILES = ("array", "image_folder")


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
    width: int = 128  # mlp; 128 x 3 blocks fits the 2D sets within ~2x the exact denoiser's SW2 (measured)
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
    iterations: int = 2000  # 2D default: ~20 s on one CPU thread
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
class ProgressiveConfig:
    name: str = "progressive"
    target_steps: int = 1  # stop halving here; teacher.steps / target_steps must be a power of two
    iterations: int = 600  # per stage; 2D: 8 stages reach 1 step in ~80 s on one CPU thread (measured)
    batch_size: int = 512
    lr: float = 3e-4  # decays linearly to 0 within each stage (Salimans & Ho 2022)
    loss: str = "snr_trunc"  # snr_trunc: x-space loss weighted max(SNR, 1) | v: weight SNR + 1
    ema_decay: float = 0.0  # 0 = no EMA of the student
    grad_clip: float = 1.0


@dataclass
class ConsistencyConfig:
    name: str = "consistency"
    steps: list[int] = field(default_factory=lambda: [4, 2, 1])  # one stage per entry, descending
    iterations: int = 2000  # per stage
    batch_size: int = 512
    lr: float = 1e-3  # tuned: training is budget-limited; 2e-4 gave a 1.6x larger 1-step NLL gap on 2D
    sigma_min: float = 0.002  # paper value (Song et al. 2023)
    sigma_max: float = 80.0  # paper value
    rho: float = 7.0  # paper value (Karras et al. 2022)
    grid_points: int = 18  # N; paper value for CIFAR-10 distillation
    ode_solver: str = "heun"  # heun | euler
    distance: str = "pseudo_huber"  # pseudo_huber | l2
    huber_c: Optional[float] = None  # None: 0.00054 * sqrt(d) (Song & Dhariwal 2023)
    ema_decay: float = 0.95  # target network EMA rate; 0 allowed (Song & Dhariwal 2023)
    weighting: str = "inverse_gap"  # inverse_gap: 1 / (sigma_{n+1} - sigma_n) (Song & Dhariwal 2023) | uniform
    sigma_data: Optional[float] = None  # None: the data's standard deviation
    grad_clip: float = 1.0


@dataclass
class EvalConfig:
    samples: int = 4096  # size of the fixed noise bank and of the data reference set
    projections: int = 128  # sliced Wasserstein directions, fixed per run
    bootstrap: int = 30  # resamples for standard errors
    baseline: bool = True  # also score the teacher's DDIM at each stage's step count
    seed: int = 1234  # noise bank, reference draw and projections


@dataclass
class StopConfig:
    metric: str = "sw2"  # sw2 | mmd2 | fd (images) | nll_gap (known density)
    mode: str = "relative"  # relative: q <= q_teacher (1 + tolerance) | absolute: q <= q_teacher + tolerance
    tolerance: float = 0.25  # relative: 25% worse than the teacher at full steps
    z: float = 2.0  # a stage is over tolerance only when q - z * se is still above the limit


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
    threads: int = 2  # torch intra-op threads; 1 per worker when several processes share the cores
    compile: bool = False  # torch.compile the networks


@dataclass
class RunConfig:
    data: DataConfig = MISSING
    net: NetConfig = MISSING
    teacher: TeacherConfig = MISSING
    method: Any = MISSING  # ProgressiveConfig, ConsistencyConfig or GuidedConfig, chosen by the method group
    eval: EvalConfig = MISSING
    stop: StopConfig = MISSING
    tracking: TrackingConfig = MISSING
    compute: ComputeConfig = MISSING
    seed: int = 0
    run_dir: Optional[str] = None  # None: a new folder under runs/; an existing one is resumed
    dry_run: bool = False  # print the plan and exit
    quiet: bool = False  # no progress bars
    fresh: bool = False  # allow reusing a run folder made by a different config (discards its stages)
    checkpoint_every: int = 500  # iterations between resume points of teacher and stages: a kill loses at most these


def register_configs() -> None:
    from omegaconf import OmegaConf

    from .methods.guided import GuidedConfig

    # hydra.run.dir follows run_dir when it is set, so Hydra's own files land in the run folder.
    OmegaConf.register_new_resolver("first_set", lambda a, b: b if a in (None, "", "None", "null") else a, replace=True)
    cs = ConfigStore.instance()
    cs.store(name="run_schema", node=RunConfig)
    for group, node in [("data", DataConfig), ("net", NetConfig), ("teacher", TeacherConfig), ("eval", EvalConfig),
                        ("stop", StopConfig), ("tracking", TrackingConfig), ("compute", ComputeConfig),
                        ("method", ProgressiveConfig), ("method", ConsistencyConfig), ("method", GuidedConfig)]:
        cs.store(group=group, name=f"{node.__name__.removesuffix('Config').lower()}_schema", node=node)
    for path in recipe_files():  # top-level recipes/ (installed as distillrun.recipes) is the `recipe` group
        cs.store(group="recipe", name=path.stem, node=OmegaConf.load(path), package="_global_")


def recipe_files() -> list:
    """The recipe YAMLs, sorted by name: each sets keys anywhere in the config (`# @package _global_`)."""
    from importlib.resources import files

    return sorted((p for p in files("distillrun.recipes").iterdir() if p.name.endswith(".yaml")),
                  key=lambda p: p.name)


def _one_of(key: str, value, options) -> None:
    if value not in options:
        raise ConfigError(key, value, f"must be one of {', '.join(map(str, options))}")


def _positive(cfg: DictConfig, keys: list[str]) -> None:
    for key in keys:
        value = cfg
        for part in key.split("."):
            value = value[part]
        if not (value > 0 and math.isfinite(value)):
            raise ConfigError(key, value, "must be a finite number > 0")


def _power_of_two(n: int) -> bool:
    return n >= 1 and (n & (n - 1)) == 0


def validate(cfg: DictConfig) -> None:
    """All cross-field checks, before any work. Raises ConfigError naming the full key."""
    from .denoiser import PARAMETERIZATIONS
    from .samplers import SAMPLERS
    from .schedule import SCHEDULES

    _one_of("data.name", cfg.data.name, DATASETS_2D + DATASETS_IMAGES + DATASETS_FILES)
    if cfg.data.name in DATASETS_FILES:
        if not cfg.data.path:
            raise ConfigError("data.path", cfg.data.path, f"data.name={cfg.data.name} needs a file or folder path")
        if not os.path.exists(cfg.data.path):
            raise ConfigError("data.path", cfg.data.path, "no such file or folder")
    _one_of("data.image_size", cfg.data.image_size, (8, 16, 32))
    _one_of("net.kind", cfg.net.kind, ("mlp", "unet"))
    _one_of("teacher.source", cfg.teacher.source, ("train", "oracle", "import"))
    _one_of("teacher.schedule", cfg.teacher.schedule, SCHEDULES)
    _one_of("teacher.parameterization", cfg.teacher.parameterization, PARAMETERIZATIONS)
    _one_of("teacher.sampler", cfg.teacher.sampler, SAMPLERS)
    if cfg.teacher.source == "oracle" and cfg.data.name != "archipelago":
        raise ConfigError("teacher.source", "oracle", "the exact denoiser exists only for data.name=archipelago")
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
                    "eval.samples", "eval.projections", "eval.bootstrap", "compute.threads",
                    "method.iterations", "method.batch_size", "method.lr", "checkpoint_every"])
    if not 0 <= cfg.teacher.ema_decay < 1:
        raise ConfigError("teacher.ema_decay", cfg.teacher.ema_decay, "must be in [0, 1)")
    if not (0 <= cfg.teacher.label_dropout < 1):
        raise ConfigError("teacher.label_dropout", cfg.teacher.label_dropout, "must be in [0, 1) (0.1-0.2 is usual)")
    if cfg.teacher.warmup < 0:
        raise ConfigError("teacher.warmup", cfg.teacher.warmup, "must be >= 0")
    _validate_method(cfg)
    _one_of("stop.metric", cfg.stop.metric, ("sw2", "mmd2", "fd", "nll_gap"))
    images = cfg.data.name in DATASETS_IMAGES or cfg.data.name == "image_folder"
    if cfg.stop.metric == "fd" and not images:
        raise ConfigError("stop.metric", "fd", "the Fréchet distance needs image data; use sw2 or mmd2")
    if cfg.stop.metric == "nll_gap" and cfg.data.name != "archipelago":
        raise ConfigError("stop.metric", "nll_gap", "needs a known density (data.name=archipelago)")
    _one_of("stop.mode", cfg.stop.mode, ("relative", "absolute"))
    if cfg.stop.mode == "relative" and cfg.stop.metric in ("mmd2", "nll_gap"):
        raise ConfigError("stop.mode", "relative", f"stop.metric={cfg.stop.metric} hovers around 0 and can go "
                          "negative; use stop=absolute (stop.mode=absolute)")
    if not (cfg.stop.tolerance > 0 and math.isfinite(cfg.stop.tolerance)):
        raise ConfigError("stop.tolerance", cfg.stop.tolerance, "must be a finite number > 0")
    if not (math.isfinite(cfg.stop.z) and cfg.stop.z >= 0):
        raise ConfigError("stop.z", cfg.stop.z, "must be a finite number >= 0")
    _one_of("compute.device", cfg.compute.device, ("cpu", "cuda", "auto"))
    _one_of("compute.precision", cfg.compute.precision, ("fp32", "bf16"))
    if cfg.compute.device == "cuda":
        import torch

        if not torch.cuda.is_available():
            raise ConfigError("compute.device", "cuda", "no CUDA device is visible; use cpu or auto")


def _validate_method(cfg: DictConfig) -> None:
    m = cfg.method
    _one_of("method.name", m.name, ("progressive", "consistency", "guided"))
    if m.name == "guided":
        from .methods.guided import validate_config
        validate_config(cfg)
        return
    if m.name == "progressive":
        _one_of("method.loss", m.loss, ("snr_trunc", "v"))
        ratio = cfg.teacher.steps / m.target_steps if m.target_steps > 0 else 0
        if m.target_steps < 1 or ratio != int(ratio) or ratio < 2 or not _power_of_two(int(ratio)):
            raise ConfigError("method.target_steps", m.target_steps,
                              f"must be teacher.steps={cfg.teacher.steps} divided by a power of two >= 2")
        if not 0 <= m.ema_decay < 1:
            raise ConfigError("method.ema_decay", m.ema_decay, "must be in [0, 1)")
        return
    steps = list(m.steps)
    if not steps or any(s < 1 for s in steps) or steps != sorted(set(steps), reverse=True):
        raise ConfigError("method.steps", steps, "must be distinct step counts >= 1 in descending order, e.g. [4, 2, 1]")
    if max(steps) >= m.grid_points:
        raise ConfigError("method.steps", steps, f"each must be below method.grid_points={m.grid_points}")
    if not 0 < m.sigma_min < m.sigma_max:
        raise ConfigError("method.sigma_min", m.sigma_min, f"must satisfy 0 < sigma_min < sigma_max={m.sigma_max}")
    if not (math.isfinite(m.rho) and m.rho > 0):
        raise ConfigError("method.rho", m.rho, "must be > 0")
    if m.grid_points < 2:
        raise ConfigError("method.grid_points", m.grid_points, "must be >= 2")
    _one_of("method.ode_solver", m.ode_solver, ("heun", "euler"))
    _one_of("method.distance", m.distance, ("pseudo_huber", "l2"))
    _one_of("method.weighting", m.weighting, ("uniform", "inverse_gap"))
    if not 0 <= m.ema_decay < 1:
        raise ConfigError("method.ema_decay", m.ema_decay, "must be in [0, 1)")
    if m.huber_c is not None and not (math.isfinite(m.huber_c) and m.huber_c > 0):
        raise ConfigError("method.huber_c", m.huber_c, "must be > 0 or null")
    if m.sigma_data is not None and m.sigma_data <= 0:
        raise ConfigError("method.sigma_data", m.sigma_data, "must be > 0 or null")
