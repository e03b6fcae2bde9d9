"""Getting the teacher ready: train it, fit a network to the exact mixture denoiser, or import the user's.

The result is a `Teacher`: the Denoiser that sets targets for stage 1 and serves as the quality
reference, and the NetDenoiser every student starts from. Trained weights live in <run_dir>/teacher/
and are reused on resume.
"""
from __future__ import annotations

from dataclasses import dataclass

import torch
from omegaconf import OmegaConf

from . import checkpoint
from .denoiser import NetDenoiser
from .methods.teacher import denoising_loss, import_teacher_net, network_for, oracle_fit_loss
from .nets import build_net
from .nets.oracle import OracleDenoiser
from .schedule import Schedule
from .training import LoopSpec, train_loop


@dataclass
class Teacher:
    denoiser: object  # Denoiser used for stage-1 targets and the full-step reference samples
    init_student: NetDenoiser  # the network the first student copies
    arch: dict  # how to rebuild init_student's network (see checkpoint model.json)
    device: torch.device
    losses: list
    seconds: float
    sigma_data: float = 1.0  # the data's standard deviation (consistency preconditioning)

    @property
    def num_classes(self) -> int:
        return self.arch.get("num_classes", 0)

    def student_meta(self, cfg, spec) -> dict:
        meta = {"net": self.arch, "parameterization": self.init_student.parameterization,
                "schedule": self.init_student.schedule.kind, "method": cfg.method.name,
                "stage": spec.index, "steps": spec.steps}
        if cfg.method.name == "consistency":
            meta["consistency"] = OmegaConf.to_container(cfg.method, resolve=True)
            meta["consistency"]["sigma_data"] = cfg.method.sigma_data or self.sigma_data
        return meta


def resolve_device(name: str) -> torch.device:
    if name == "auto":
        return torch.device("cuda" if torch.cuda.is_available() else "cpu")
    return torch.device(name)


def prepare_teacher(cfg, data, run_dir) -> Teacher:
    device = resolve_device(cfg.compute.device)
    schedule = Schedule(cfg.teacher.schedule)
    folder = run_dir / "teacher"
    if cfg.teacher.source == "import":
        net = import_teacher_net(cfg.teacher.factory, cfg.teacher.factory_kwargs, cfg.teacher.weights,
                                 data.shape, data.num_classes if cfg.net.class_cond else 0)
        arch = {"kind": "import", "factory": cfg.teacher.factory,
                "factory_kwargs": OmegaConf.to_container(cfg.teacher.factory_kwargs, resolve=True),
                "data_shape": list(data.shape), "num_classes": data.num_classes if cfg.net.class_cond else 0}
        den = NetDenoiser(net, cfg.teacher.parameterization, schedule).to(device).requires_grad_(False)
        return Teacher(den, den, arch, device, [], 0.0, data.sigma_data)
    net, arch = network_for(cfg, data)
    den = NetDenoiser(net, cfg.teacher.parameterization, schedule).to(device)
    oracle = OracleDenoiser(data.mixture, schedule) if cfg.teacher.source == "oracle" else None
    losses, seconds = [], 0.0
    if (folder / "model.json").exists():
        state, meta = checkpoint.load_model_files(folder)
        den.load_state_dict(state)
        losses, seconds = meta.get("losses", []), meta.get("seconds", 0.0)
    else:
        folder.mkdir(parents=True, exist_ok=True)
        t = cfg.teacher
        spec = LoopSpec(iterations=t.iterations, lr=t.lr, warmup=t.warmup, decay="cosine", grad_clip=t.grad_clip,
                        ema_decay=t.ema_decay)
        loss_fn = oracle_fit_loss(oracle) if oracle is not None else denoising_loss
        draw = data.batches(t.batch_size, device)
        g = torch.Generator().manual_seed(cfg.seed)
        result = train_loop(den, loss_fn, draw, spec, generator=g, state_path=folder / "partial.safetensors",
                            desc="teacher", quiet=cfg.quiet)
        if result.failed:
            raise TeacherTrainingFailed(f"teacher training failed: {result.failed}; try a lower teacher.lr "
                                        f"(now {t.lr}) or teacher.grad_clip (now {t.grad_clip})")
        den = result.model
        losses, seconds = result.losses, result.seconds
        meta = {"net": arch, "parameterization": t.parameterization, "schedule": t.schedule, "method": "teacher",
                "stage": 0, "steps": t.steps, "source": t.source, "losses": losses, "seconds": seconds,
                "its_per_s": result.its_per_s}
        checkpoint.save_model(folder, den.state_dict(), meta)
        (folder / "partial.safetensors").unlink(missing_ok=True)
    den.requires_grad_(False)
    return Teacher(oracle if oracle is not None else den, den, arch, device, losses, seconds, data.sigma_data)


class TeacherTrainingFailed(RuntimeError):
    pass


def rebuild_network(arch: dict):
    """The network described by a model.json 'net' entry (see Teacher.arch)."""
    if arch["kind"] == "import":
        import importlib

        module, _, fn = arch["factory"].partition(":")
        return getattr(importlib.import_module(module), fn)(**arch.get("factory_kwargs", {}))
    return build_net(arch["kind"], tuple(arch["data_shape"]), arch["num_classes"], **arch["kwargs"])
