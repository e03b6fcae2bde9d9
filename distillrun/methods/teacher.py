"""The teacher: trained here with the denoising loss, the exact mixture denoiser, or the user's network.

Denoising loss (Ho et al. 2020; v-target from Salimans & Ho 2022): t ~ U(0, 1), eps ~ N(0, I),
x_t = alpha_t x0 + sigma_t eps, loss = ||net(x_t, t) - target||^2 with target = v, eps or x0.
"""
from __future__ import annotations

import importlib
import torch
from torch import nn

from ..denoiser import NetDenoiser, target_for
from ..distributed import current_shard
from ..nets import build_net
from ..schedule import Schedule, broadcast

# Times are drawn from [T_MIN, 1]: at t = 0 the input equals the data and the target is degenerate.
T_MIN = 1e-4


def draw_noisy(x0: torch.Tensor, schedule: Schedule, generator: torch.Generator):
    """(t, eps, alpha, sigma, x_t) for a batch of clean data, all randomness from `generator`."""
    t = torch.rand(x0.shape[0], generator=generator).to(x0.device) * (1 - T_MIN) + T_MIN
    eps = torch.randn(x0.shape, generator=generator).to(x0.device)
    alpha, sigma = (broadcast(c, x0) for c in schedule.alpha_sigma(t))
    return t, eps, alpha, sigma, alpha * x0 + sigma * eps


def denoising_loss(model: NetDenoiser, target_model, batch, generator):
    """Mean squared error of the network output against the parameterization's target.
    Randomness is drawn for the whole (global) batch, the loss on this rank's rows (distributed.Shard)."""
    x0, cond = batch
    t, eps, alpha, sigma, x_t = draw_noisy(x0, model.schedule, generator)
    x0, cond, t, eps, alpha, sigma, x_t = current_shard().local(x0, cond, t, eps, alpha, sigma, x_t)
    target = target_for(model.parameterization, x0, eps, alpha, sigma)
    return torch.mean((model(x_t, t, cond) - target) ** 2)


def oracle_fit_loss(oracle):
    """Regress the network onto the exact denoiser (same output space as denoising_loss, exact target:
    no data noise in the target, so a network copy of the oracle is learned with far fewer iterations)."""
    def loss(model: NetDenoiser, target_model, batch, generator):
        x0, cond = batch
        t, _, alpha, sigma, x_t = draw_noisy(x0, model.schedule, generator)
        x0, cond, t, alpha, sigma, x_t = current_shard().local(x0, cond, t, alpha, sigma, x_t)
        x0_star, eps_star = oracle.predict(x_t, t)
        target = target_for(model.parameterization, x0_star, eps_star, alpha, sigma)
        return torch.mean((model(x_t, t, cond) - target) ** 2)
    return loss


class TeacherError(ValueError):
    """A user-supplied teacher that cannot be used; str() is one line naming the key or file."""


def import_teacher_net(factory: str, factory_kwargs: dict, weights: str, data_shape, num_classes: int) -> nn.Module:
    """Build the user's module from 'package.module:function', load safetensors weights (strict), and
    check one forward pass on a dummy batch returns the data's shape."""
    from safetensors import SafetensorsError
    from safetensors.torch import load_file

    module_name, _, fn_name = factory.partition(":")
    try:
        fn = getattr(importlib.import_module(module_name), fn_name)
    except (ImportError, AttributeError) as e:
        raise TeacherError(f"teacher.factory={factory!r}: cannot import ({e}); is its folder on PYTHONPATH?") from None
    try:
        net = fn(**dict(factory_kwargs))
    except Exception as e:  # the user's code: report, don't trace
        raise TeacherError(f"teacher.factory={factory!r}: calling it failed: {e}") from None
    if not isinstance(net, nn.Module):
        raise TeacherError(f"teacher.factory={factory!r}: returned {type(net).__name__}, expected a torch.nn.Module")
    try:
        state = load_file(weights)
    except (SafetensorsError, OSError, ValueError) as e:
        raise TeacherError(f"teacher.weights={weights!r}: not a readable safetensors file ({e})") from None
    try:
        net.load_state_dict(state, strict=True)
    except RuntimeError as e:
        first = str(e).splitlines()[1].strip() if len(str(e).splitlines()) > 1 else str(e)
        raise TeacherError(f"teacher.weights={weights!r}: does not match the module from {factory}: {first}") from None
    _check_forward(net, data_shape, num_classes, factory)
    return net


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


def network_for(cfg, data) -> tuple[nn.Module, dict]:
    """The configured network for this data, and the arguments that rebuild it."""
    num_classes = data.num_classes if cfg.net.class_cond else 0
    kwargs = dict(width=cfg.net.width, depth=cfg.net.depth) if cfg.net.kind == "mlp" else \
        dict(base=cfg.net.base, mults=tuple(cfg.net.mults))
    net = build_net(cfg.net.kind, data.shape, num_classes, **kwargs)
    arch = {"kind": cfg.net.kind, "data_shape": list(data.shape), "num_classes": num_classes, "kwargs": kwargs}
    return net, arch
