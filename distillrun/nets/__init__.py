"""Network registry: NETS[kind](**net.arch) rebuilds any network built here (checkpoints store kind + arch)."""
from __future__ import annotations

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
