"""Getting the teacher ready: train it, fit a network to the exact mixture denoiser, or import the user's.

The result is a `Teacher`: the Denoiser that sets targets for stage 1 and serves as the quality
reference, and the NetDenoiser every student starts from. Trained weights live in <run_dir>/teacher/
and are reused on resume.
"""
from __future__ import annotations

from dataclasses import dataclass

import torch
from torch import nn
from omegaconf import OmegaConf

import contextlib
import logging

from . import checkpoint, distributed, runfolder, threads
from .teacher_cache import TeacherCache, cache_root, key_document, key_of
from .denoiser import NetDenoiser
from .methods.teacher import denoising_loss_with_dropout, network_for, oracle_fit_loss
from .nets import build_net
from .nets.oracle import OracleDenoiser
from .schedule import Schedule
from .training import LoopSpec, train_loop

log = logging.getLogger(__name__)

@dataclass
class Teacher:
    denoiser: object  # Denoiser used for stage-1 targets and the full-step reference samples
    init_student: NetDenoiser  # the network the first student copies
    arch: dict  # how to rebuild init_student's network (see checkpoint model.json)
    device: torch.device
    losses: list
    seconds: float
    threads: str | None = None  # intra-op thread count(s) the teacher trained with (compute.threads)
    cache_note: str | None = None  # "reused <key>" / "stored <key>" when the teacher cache was used

    @property
    def num_classes(self) -> int:
        return self.arch.get("num_classes", 0)

    def student_meta(self, method, method_cfg, student, spec) -> dict:
        """model.json of a stage's student: how to rebuild its network, plus what its method adds."""
        return {"net": self.arch, "parameterization": self.init_student.parameterization,
                "schedule": self.init_student.schedule.kind, "method": method.name, "stage": spec.index,
                "steps": spec.steps, **method.save_meta(method_cfg, student)}


class TeacherError(ValueError):
    """A user-supplied teacher that cannot be used; str() is one line naming the key or file."""


def _check_forward(net: nn.Module, data_shape, num_classes: int, factory: str) -> None:
    x = torch.zeros((2, *data_shape))
    cond = torch.zeros(2, dtype=torch.long) if num_classes else None
    try:
        with torch.no_grad():
            out = net(x, torch.full((2,), 0.5), cond)
    except Exception as e:
        raise TeacherError(f"teacher.factory={factory!r}: forward pass net(x, t, cond) on a dummy batch of shape "
                           f"{tuple(x.shape)} failed: {e}") from None
    if not torch.is_tensor(out) or out.shape != x.shape:
        shape = tuple(out.shape) if torch.is_tensor(out) else type(out).__name__
        raise TeacherError(f"teacher.factory={factory!r}: output shape {shape} != input shape {tuple(x.shape)}")


def resolve_device(name: str) -> torch.device:
    if name == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    return torch.device(name)


def prepare_teacher(cfg, data, run_dir) -> Teacher:
    device = resolve_device(cfg.compute.device)
    schedule = Schedule(cfg.teacher.schedule)
    folder = run_dir / "teacher"
    if cfg.teacher.source == "import":
        net = import_teacher(cfg.teacher.factory, cfg.teacher.factory_kwargs, cfg.teacher.weights,
                             data.shape, data.num_classes if cfg.net.class_cond else 0)
        arch = {"kind": "import", "factory": cfg.teacher.factory,
                "factory_kwargs": OmegaConf.to_container(cfg.teacher.factory_kwargs, resolve=True),
                "data_shape": list(data.shape), "num_classes": data.num_classes if cfg.net.class_cond else 0}
        den = NetDenoiser(net, cfg.teacher.parameterization, schedule).to(device).requires_grad_(False)
        return Teacher(den, den, arch, device, [], 0.0)
    net, arch = network_for(cfg, data)
    den = NetDenoiser(net, cfg.teacher.parameterization, schedule).to(device)
    if cfg.compute.compile:
        net.compile()  # in place: torch.compile of forward, same state_dict keys; students inherit it by copy
    oracle = OracleDenoiser(data.mixture, schedule, labelled=arch["num_classes"] > 0) \
        if cfg.teacher.source == "oracle" else None
    if (folder / "model.json").exists():
        meta = runfolder.load_model_into(den, folder)
        losses, seconds = meta.get("losses", []), meta.get("seconds", 0.0)
        if distributed.is_main():  # a kill came between model.json and this
            (folder / "partial.safetensors").unlink(missing_ok=True)
        return _ready(cfg, oracle, den, arch, device, losses, seconds, data, meta.get("threads"), meta.get("cache_key"))
    folder.mkdir(parents=True, exist_ok=True)
    cache, key, document = _teacher_cache(cfg, data, arch, device)
    note = None
    # Under torchrun rank 0 decides (no lock: the ranks wait for each other at the broadcast).
    lock = cache.locked(key) if cache is not None and distributed.world_size() <= 1 else contextlib.nullcontext()
    with lock:
        meta = cache.load(key, document, den) if cache is not None and distributed.is_main() else None
        if cache is not None and distributed.share_flag(meta is not None if distributed.is_main() else None):
            meta = meta or cache.load(key, document, den)
            if meta is None:
                raise checkpoint.CheckpointError(f"{cache.entry(key)}: rank 0 found this cached teacher, this rank "
                                                 "cannot read it; run with compute.teacher_cache=false")
            note = f"reused {key}"
            log.info(f"teacher: reused the trained teacher cached in {cache.entry(key)} (same data, network, "
                     f"teacher settings, seed and code; it took {meta.get('seconds', 0.0):.0f} s to train); "
                     "compute.teacher_cache=false trains it anew")
            meta = {**meta, "seconds": 0.0, "trained_seconds": meta.get("seconds", 0.0), "cache_key": note}
            if distributed.is_main():  # the run folder gets its own copy: it stays complete without the cache
                checkpoint.save_model(folder, den.state_dict(), meta)
            return _ready(cfg, oracle, den, arch, device, meta.get("losses", []), 0.0, data, meta.get("threads"), note)
        den, losses, seconds, used_threads = _train(cfg, data, oracle, den, arch, folder, device)
        if cache is not None and distributed.is_main():
            meta = checkpoint.read_json(folder / checkpoint.MODEL_FILE)
            if cache.store(key, document, den.state_dict(), meta) is not None:
                note = f"stored {key}"
                log.info(f"teacher: trained and cached in {cache.entry(key)} for runs with the same data, network, "
                         "teacher settings and seed")
    return _ready(cfg, oracle, den, arch, device, losses, seconds, data, used_threads, note)


def _teacher_cache(cfg, data, arch: dict, device):
    """(cache, key, key document) for a teacher this run would train, or (None, None, None) when the cache is
    off (compute.teacher_cache=false)."""
    if not cfg.compute.get("teacher_cache", True):
        return None, None, None
    document = key_document(cfg, data, arch, device)
    return TeacherCache(cache_root(cfg.compute.get("cache_dir"))), key_of(document), document


def _ready(cfg, oracle, den, arch, device, losses, seconds, data, used_threads, note) -> Teacher:
    den.requires_grad_(False)
    return Teacher(oracle if oracle is not None else den, den, arch, device, losses, seconds, used_threads, note)


def _train(cfg, data, oracle, den, arch, folder, device):
    """Train the teacher (resuming a mid-run state in folder), write it to folder; (den, losses, seconds, threads)."""
    t = cfg.teacher
    spec = LoopSpec(iterations=t.iterations, lr=t.lr, warmup=t.warmup, decay="cosine", grad_clip=t.grad_clip,
                    ema_decay=t.ema_decay, save_every=cfg.checkpoint_every, precision=cfg.compute.precision)
    null, p = arch["num_classes"], t.label_dropout  # the null label is index num_classes
    loss_fn = oracle_fit_loss(oracle, p, null) if oracle is not None else denoising_loss_with_dropout(p, null)
    draw = data.batches(t.batch_size, device)
    g = torch.Generator().manual_seed(cfg.seed)
    result = train_loop(den, loss_fn, draw, spec, generator=g, state_path=folder / "partial.safetensors",
                        desc="teacher", quiet=cfg.quiet)
    if result.failed:
        raise TeacherTrainingFailed(f"teacher training failed: {result.failed}; lower teacher.lr (now {t.lr:g}) "
                                    f"or teacher.grad_clip (now {t.grad_clip:g}), then rerun with fresh=true "
                                    "or another run_dir")
    den = result.model
    used_threads = threads.last_summary()
    meta = {"net": arch, "parameterization": t.parameterization, "schedule": t.schedule, "method": "teacher",
            "stage": 0, "steps": t.steps, "source": t.source, "losses": result.losses, "seconds": result.seconds,
            "its_per_s": result.its_per_s, "threads": used_threads}
    if distributed.is_main():  # under torchrun every rank trained the same weights; rank 0 writes them
        checkpoint.save_model(folder, den.state_dict(), meta)
        (folder / "partial.safetensors").unlink(missing_ok=True)
    return den, result.losses, result.seconds, used_threads


class TeacherTrainingFailed(RuntimeError):
    """The teacher's loss became NaN/inf or its gradient exploded; str() is one line with what to change."""


def import_teacher(factory: str, factory_kwargs, weights: str, data_shape, num_classes: int) -> torch.nn.Module:
    """The user's network: build it from 'package.module:function', load its safetensors weights (strict,
    finite) and check one forward pass on a dummy batch. Any fault is one TeacherError line naming the key.
    The weights are read by safetensors only, so nothing the user supplies is unpickled."""
    import importlib

    module_name, _, fn_name = factory.partition(":")
    key = f"teacher.factory={factory!r}"
    try:
        fn = getattr(importlib.import_module(module_name), fn_name)
    except Exception as e:  # ImportError, SyntaxError, or whatever the module raises while importing
        raise TeacherError(f"{key}: cannot import ({type(e).__name__}: {_first_line(e)}); "
                           "is its folder on PYTHONPATH?") from None
    try:
        net = fn(**dict(factory_kwargs or {}))
    except Exception as e:  # the user's code: report, don't trace
        raise TeacherError(f"{key}: calling it failed ({type(e).__name__}: {_first_line(e)})") from None
    if not isinstance(net, torch.nn.Module):
        raise TeacherError(f"{key}: returned {type(net).__name__}, expected a torch.nn.Module")
    try:
        state = checkpoint.read_tensors(weights)
    except checkpoint.CheckpointError as e:
        raise TeacherError(f"teacher.weights: {e}") from None
    bad = [k for k, v in state.items() if v.is_floating_point() and not torch.isfinite(v).all()]
    if bad:
        raise TeacherError(f"teacher.weights={weights!r}: tensor '{bad[0]}' holds NaN or inf values")
    try:
        net.load_state_dict(state, strict=True)
    except RuntimeError as e:
        lines = [ln.strip() for ln in str(e).splitlines() if ln.strip()]
        raise TeacherError(f"teacher.weights={weights!r}: does not match the module from {factory} "
                           f"({lines[1] if len(lines) > 1 else lines[0]})") from None
    _check_forward(net, data_shape, num_classes, factory)
    return net


def _first_line(e: Exception) -> str:
    return (str(e).strip().splitlines() or [""])[0][:200]


def rebuild_network(arch: dict):
    """The network described by a model.json 'net' entry (see Teacher.arch)."""
    if arch["kind"] == "import":
        import importlib

        module, _, fn = arch["factory"].partition(":")
        return getattr(importlib.import_module(module), fn)(**arch.get("factory_kwargs", {}))
    return build_net(arch["kind"], tuple(arch["data_shape"]), arch["num_classes"], **arch["kwargs"])
