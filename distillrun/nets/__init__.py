"""Network registry: NETS[kind](**net.arch) rebuilds any network built here (checkpoints store kind + arch).
Each class says what data it takes (`images`) and which net.* config keys size it (`size_keys`)."""
from __future__ import annotations

import copy

import torch
from torch import nn

from .mlp import TimeMLP
from .unet import SmallUNet

NETS = {"mlp": TimeMLP, "unet": SmallUNet}


def build_net(kind: str, data_shape: tuple, num_classes: int = 0, **kwargs) -> nn.Module:
    """Build the network `kind` for samples of shape `data_shape`: (d,) for mlp, (C, S, S) for unet."""
    if kind not in NETS:
        raise ValueError(f"net kind '{kind}' is unknown; valid: {', '.join(NETS)}")
    shape = tuple(int(s) for s in data_shape)
    if kind == "mlp":
        if len(shape) != 1:
            raise ValueError(f"net 'mlp' takes vector data of shape (d,), got data shape {shape}; "
                             f"use 'unet' for images")
        return TimeMLP(dim=shape[0], num_classes=num_classes, **kwargs)
    if len(shape) != 3 or shape[1] != shape[2]:
        raise ValueError(f"net 'unet' takes square images of shape (C, S, S), got data shape {shape}")
    return SmallUNet(channels=shape[0], image_size=shape[1], num_classes=num_classes, **kwargs)


def kind_for(images: bool) -> str:
    """The first registered network kind that takes this kind of data."""
    return next(k for k, cls in NETS.items() if cls.images == images)


def fast_layout(module, in_place: bool = False):
    """For a convolutional network (any 4-D weight): its weights in channels-last memory format, on a copy unless
    in_place; any other module is returned as it is. Faster on CPU for the U-Net (benchmarks/channels_last.py;
    numbers in benchmarks/README.md). Same weights; the convolution kernels round differently (outputs within
    ~1e-5 of the contiguous layout's)."""
    if not isinstance(module, torch.nn.Module) or not any(p.dim() == 4 for p in module.parameters()):
        return module
    return (module if in_place else copy.deepcopy(module)).to(memory_format=torch.channels_last)
