"""A tiny U-Net for 8x8 / 16x16 images, called as net(x_t (B, C, S, S), t (B,), cond) -> (B, C, S, S).

Layout (Ronneberger et al. 2015, with the time-conditioned residual blocks of Ho et al. 2020):
conv in -> per level: residual block, keep skip, downsample -> middle block -> per level (reversed):
upsample, concatenate skip, residual block -> GroupNorm, SiLU, conv out.
"""
from __future__ import annotations

import math

import torch
from torch import nn
from torch.nn import functional as F

from .mlp import CondEmbedding

# GroupNorm with at most 8 groups: small channel counts (32) keep 4 channels per group (common practice).
MAX_GROUPS = 8


def group_norm(channels: int) -> nn.GroupNorm:
    return nn.GroupNorm(math.gcd(MAX_GROUPS, channels), channels)


class ConvBlock(nn.Module):
    """Residual block: h = conv(SiLU(GN(x))); h = conv(SiLU(GN(h) (1 + scale) + shift)); out = skip(x) + h,
    with (scale, shift) a projection of the time/class embedding (FiLM-style modulation, Perez et al. 2018)."""

    def __init__(self, c_in: int, c_out: int, emb_width: int):
        super().__init__()
        self.norm1, self.conv1 = group_norm(c_in), nn.Conv2d(c_in, c_out, 3, padding=1)
        self.norm2, self.conv2 = group_norm(c_out), nn.Conv2d(c_out, c_out, 3, padding=1)
        self.film = nn.Linear(emb_width, 2 * c_out)
        self.skip = nn.Conv2d(c_in, c_out, 1) if c_in != c_out else nn.Identity()

    def forward(self, x: torch.Tensor, emb: torch.Tensor) -> torch.Tensor:
        h = self.conv1(F.silu(self.norm1(x)))
        scale, shift = self.film(emb)[:, :, None, None].chunk(2, dim=1)  # (B or 1, c_out, 1, 1) each
        h = self.conv2(F.silu(self.norm2(h) * (1 + scale) + shift))
        return self.skip(x) + h


class SmallUNet(nn.Module):
    """Level i works at S / 2**i pixels with base * mults[i] channels; the middle block runs at
    S / 2**len(mults). cond: (B,) labels in [0, num_classes], label num_classes = "no class"; with
    guidance=True a denoiser.GuidanceCond(labels, w) (see CondEmbedding)."""

    images = True  # takes (C, S, S) images
    size_keys = ("base", "mults")  # the net.* config keys that size it

    def __init__(self, channels: int = 1, image_size: int = 16, base: int = 32, mults=(1, 2),
                 num_classes: int = 0, time_features: int = 32, guidance: bool = False):
        super().__init__()
        mults = tuple(int(m) for m in mults)
        check_unet_args(channels, image_size, base, mults)
        self.arch = dict(channels=channels, image_size=image_size, base=base, mults=list(mults),
                         num_classes=num_classes, time_features=time_features)
        if guidance:
            self.arch["guidance"] = True
        emb_width = 4 * base  # embedding wider than the first level (Ho et al. 2020 use 4x)
        self.embed = CondEmbedding(emb_width, time_features, num_classes, guidance)
        widths = [base * m for m in mults]
        self.conv_in = nn.Conv2d(channels, base, 3, padding=1)
        ins = [base] + widths[:-1]
        self.down_blocks = nn.ModuleList(ConvBlock(i, w, emb_width) for i, w in zip(ins, widths))
        self.downsamples = nn.ModuleList(nn.Conv2d(w, w, 3, stride=2, padding=1) for w in widths)
        self.middle = ConvBlock(widths[-1], widths[-1], emb_width)
        ups_in = widths[1:] + [widths[-1]]  # channels arriving at level i from below
        self.upsamples = nn.ModuleList(nn.Conv2d(c, c, 3, padding=1) for c in ups_in)
        self.up_blocks = nn.ModuleList(ConvBlock(c + w, w, emb_width) for c, w in zip(ups_in, widths))
        self.norm_out = group_norm(widths[0])
        self.conv_out = nn.Conv2d(widths[0], channels, 3, padding=1)

    def forward(self, x: torch.Tensor, t: torch.Tensor, cond=None) -> torch.Tensor:
        emb = self.embed(t, cond)  # (B, 4 base), or (1, 4 base) for a shared time (broadcast in FiLM)
        h, skips = self.conv_in(x), []
        for block, down in zip(self.down_blocks, self.downsamples):
            h = block(h, emb)
            skips.append(h)  # (B, base * m_i, S / 2**i, S / 2**i)
            h = down(h)
        h = self.middle(h, emb)
        for i in reversed(range(len(self.up_blocks))):
            h = self.upsamples[i](F.interpolate(h, scale_factor=2.0, mode="nearest"))
            h = self.up_blocks[i](torch.cat([h, skips[i]], dim=1), emb)
        return self.conv_out(F.silu(self.norm_out(h)))


def check_unet_args(channels: int, image_size: int, base: int, mults: tuple) -> None:
    """One-line ValueErrors for shapes the U-Net cannot take."""
    if channels < 1 or base < 1 or not mults or min(mults) < 1:
        raise ValueError(f"SmallUNet needs channels, base >= 1 and non-empty positive mults; "
                         f"got channels={channels}, base={base}, mults={list(mults)}")
    if image_size % (2 ** len(mults)):
        raise ValueError(f"SmallUNet image_size={image_size} must be divisible by 2**len(mults) = "
                         f"{2 ** len(mults)} (mults={list(mults)})")
