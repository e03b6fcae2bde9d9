"""A time-conditioned residual MLP for vector data (2D shapes or any d), called as net(x_t, t, cond).

Also home of the two conditioning pieces both networks share: Fourier features of t and the
time (+ class) embedding with a reserved "no class" label.
"""
from __future__ import annotations

import torch
from torch import nn

from ..denoiser import shared_time, split_cond

# Highest angular frequency of the time features. With t in [0, 1] the lowest frequency (1 rad per
# unit t) resolves the whole range and 1000 rad resolves steps of ~1e-3, i.e. a 1000-step grid
# (common practice: sinusoidal embeddings of integer steps 0..999).
MAX_FREQ = 1000.0


def fourier_features(t: torch.Tensor, n_features: int, max_freq: float = MAX_FREQ) -> torch.Tensor:
    """[sin(w_k t), cos(w_k t)] with w_k geometric from 1 to max_freq; (B,) -> (B, n_features).
    Sinusoidal embedding as in Vaswani et al. 2017, Sec. 3.5, applied to continuous t."""
    if n_features < 2 or n_features % 2:
        raise ValueError(f"time_features must be an even number >= 2, got {n_features}")
    half = n_features // 2
    ratio = max_freq ** (1.0 / max(half - 1, 1))
    freqs = ratio ** torch.arange(half, dtype=torch.float32, device=t.device)
    angles = t.float().reshape(-1, 1) * freqs  # (B, half)
    return torch.cat([torch.sin(angles), torch.cos(angles)], dim=1)


# Guidance weights w live in a range of a few units (0..8 in common practice), not in [0, 1] like t: the Fourier
# features of W_SCALE * w span 1 to W_MAX_FREQ rad, i.e. 0.25 to 2 rad per unit w, smooth over the range (the
# guided target is linear in w). Measured on the archipelago stage one (2500 iterations): RMS x0 error at w = 0 / 4
# of 0.080 / 0.091 against 0.099 / 0.105 with 1..8 rad per unit w and 0.14 / 0.18 with 1..100 (800 iterations).
W_MAX_FREQ = 8.0
W_SCALE = 0.25


class CondEmbedding(nn.Module):
    """t (B,) and optional labels (B,) -> one (B, width) vector. Label `num_classes` means "no class"
    and is what cond=None maps to, so a conditional net can also run unconditionally (classifier-free
    guidance, Ho & Salimans 2022). With num_classes = 0 the net is unconditional and cond is ignored.

    With guidance=True the net also takes a guidance weight w per row (cond = denoiser.GuidanceCond(labels, w)),
    embedded like the time (Fourier features and a 2-layer MLP, Meng et al. 2023) and added to the embedding.
    The MLP's last layer starts at zero, so a student copied from its teacher starts with no effect of w."""

    def __init__(self, width: int, time_features: int, num_classes: int = 0, guidance: bool = False):
        super().__init__()
        self.time_features, self.num_classes = time_features, num_classes
        self.time_mlp = nn.Sequential(nn.Linear(time_features, width), nn.SiLU(), nn.Linear(width, width))
        self.label_emb = nn.Embedding(num_classes + 1, width) if num_classes > 0 else None
        self.guidance_mlp = None
        if guidance:
            self.guidance_mlp = nn.Sequential(nn.Linear(time_features, width), nn.SiLU(), nn.Linear(width, width))
            nn.init.zeros_(self.guidance_mlp[-1].weight)
            nn.init.zeros_(self.guidance_mlp[-1].bias)

    def forward(self, t: torch.Tensor, cond=None) -> torch.Tensor:
        """(B, width), or (1, width) when every row shares one time (see shared_time) and there are no
        per-row labels: callers add it by broadcasting, so per-row work is not repeated B times."""
        cond, w = split_cond(cond)
        if self.guidance_mlp is not None and w is None:
            raise ValueError("this network is conditioned on the guidance weight: pass cond=GuidanceCond(labels, w)")
        shared = shared_time(t)
        emb = self.time_mlp(fourier_features(t[:1] if shared else t, self.time_features))
        if self.guidance_mlp is not None:
            w = torch.as_tensor(w, dtype=emb.dtype, device=emb.device).reshape(-1)
            emb = emb + self.guidance_mlp(fourier_features(w * W_SCALE, self.time_features, W_MAX_FREQ))
        if self.label_emb is None:
            return emb
        if cond is None:
            cond = torch.full((emb.shape[0],), self.num_classes, dtype=torch.long, device=t.device)
        return emb + self.label_emb(cond.long())


class ResidualBlock(nn.Module):
    """h + W2 SiLU(W1 norm(h) + P emb): a pre-norm residual MLP block with the condition added inside."""

    def __init__(self, width: int, layer_norm: bool):
        super().__init__()
        self.norm = nn.LayerNorm(width) if layer_norm else nn.Identity()
        self.inner = nn.Linear(width, width)
        self.cond_proj = nn.Linear(width, width)
        self.outer = nn.Linear(width, width)
        self.act = nn.SiLU()

    def forward(self, h: torch.Tensor, emb: torch.Tensor) -> torch.Tensor:
        return h + self.outer(self.act(self.inner(self.act(self.norm(h))) + self.cond_proj(emb)))


class TimeMLP(nn.Module):
    """net(x (B, dim), t (B,), cond (B,) or None) -> (B, dim). The input layer sees [x, emb(t, cond)];
    every residual block adds a projection of the same embedding."""

    images = False  # takes (d,) vectors
    size_keys = ("width", "depth")  # the net.* config keys that size it

    def __init__(self, dim: int, width: int = 256, depth: int = 4, time_features: int = 32,
                 num_classes: int = 0, layer_norm: bool = False, guidance: bool = False):
        super().__init__()
        if dim < 1 or width < 1 or depth < 1:
            raise ValueError(f"TimeMLP needs dim, width, depth >= 1; got dim={dim}, width={width}, depth={depth}")
        self.arch = dict(dim=dim, width=width, depth=depth, time_features=time_features,
                         num_classes=num_classes, layer_norm=layer_norm)
        if guidance:
            self.arch["guidance"] = True
        self.embed = CondEmbedding(width, time_features, num_classes, guidance)
        self.inp = nn.Linear(dim + width, width)
        self.blocks = nn.ModuleList(ResidualBlock(width, layer_norm) for _ in range(depth))
        self.out_norm = nn.LayerNorm(width) if layer_norm else nn.Identity()
        self.out = nn.Linear(width, dim)  # default init on purpose: students start from teacher weights

    def forward(self, x: torch.Tensor, t: torch.Tensor, cond=None) -> torch.Tensor:
        emb = self.embed(t, cond)  # (B, width), or (1, width) for a shared time
        h = self.inp(torch.cat([x, emb.expand(x.shape[0], -1)], dim=1))
        for block in self.blocks:
            h = block(h, emb)
        return self.out(torch.nn.functional.silu(self.out_norm(h)))
