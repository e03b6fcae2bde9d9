"""Non-Gaussian 2D shapes of our own, scaled in closed form so each axis has mean 0 and std ~1.

Each generator is `name(n, seed=0) -> x (n, 2) float32`, deterministic given the seed.
"""
from __future__ import annotations

import math

import numpy as np
import torch

# Two-arm spiral: radius r = R0 + R1 s and angle theta = 2 pi TURNS s + pi arm, s ~ U(0, 1).
# 1.5 turns leave gaps of R1 / (2 TURNS) = 0.33 between neighbouring arms, ~7x the noise std.
SPIRAL_R0, SPIRAL_R1, SPIRAL_TURNS, SPIRAL_NOISE = 0.3, 1.0, 1.5, 0.05
# Two rings: inner radius, outer radius, inner share of the mass, radial noise std.
RING_R_IN, RING_R_OUT, RING_P_IN, RING_NOISE = 0.5, 1.5, 0.3, 0.08


def _as_torch(x: np.ndarray) -> torch.Tensor:
    return torch.from_numpy(x.astype(np.float32))


def _check_n(n: int) -> None:
    if int(n) < 1:
        raise ValueError(f"number of samples n must be >= 1, got {n}")


def spiral_scale() -> float:
    """1 / sqrt(E[x_1^2]) with E[x_1^2] = E[r^2] / 2 + sigma^2, E[r^2] = R0^2 + R0 R1 + R1^2 / 3.
    The term E[r^2 cos 2 theta] / 2 = +-R1^2 / (4 pi TURNS)^2 (x: +, y: -) is left out, so the
    per-axis stds are 1 +- 0.004 rather than exactly 1 (closed form by integrating by parts twice)."""
    mean_r2 = SPIRAL_R0**2 + SPIRAL_R0 * SPIRAL_R1 + SPIRAL_R1**2 / 3
    return 1.0 / math.sqrt(mean_r2 / 2 + SPIRAL_NOISE**2)


def spiral(n: int, seed: int = 0) -> torch.Tensor:
    """Two interleaved arms, point-symmetric about the origin (so the mean is exactly 0)."""
    _check_n(n)
    rng = np.random.default_rng(seed)
    arm = rng.integers(0, 2, size=n)
    s = rng.random(n)
    r = SPIRAL_R0 + SPIRAL_R1 * s
    theta = 2 * math.pi * SPIRAL_TURNS * s + math.pi * arm
    x = np.stack([r * np.cos(theta), r * np.sin(theta)], axis=1)
    x += SPIRAL_NOISE * rng.standard_normal((n, 2))
    return _as_torch(x * spiral_scale())


def rings_scale() -> float:
    """1 / sqrt(E[x_1^2]) with a uniform angle: E[x_1^2] = E[R^2] / 2, E[R^2] = sum_k p_k (r_k^2 + sigma^2)."""
    mean_r2 = RING_P_IN * RING_R_IN**2 + (1 - RING_P_IN) * RING_R_OUT**2 + RING_NOISE**2
    return 1.0 / math.sqrt(mean_r2 / 2)


def rings(n: int, seed: int = 0) -> torch.Tensor:
    """Two concentric noisy rings; the inner one holds RING_P_IN of the mass."""
    _check_n(n)
    rng = np.random.default_rng(seed)
    outer = (rng.random(n) >= RING_P_IN).astype(np.int64)
    radius = np.where(outer == 1, RING_R_OUT, RING_R_IN) + RING_NOISE * rng.standard_normal(n)
    phi = 2 * math.pi * rng.random(n)
    x = np.stack([radius * np.cos(phi), radius * np.sin(phi)], axis=1)
    return _as_torch(x * rings_scale())


SHAPES = {"spiral": spiral, "rings": rings}
