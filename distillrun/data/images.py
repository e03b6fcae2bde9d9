"""Small image sets that need no download: scikit-learn's bundled digits and procedurally drawn tiles.

Both return `(images (N, 1, S, S) float32 in [-1, 1], labels (N,) long)`.
"""
from __future__ import annotations

import math

import numpy as np
import torch
from torch.nn import functional as F

TILE_CLASSES = ("bar", "ring", "cross", "square")
# Edges ramp from 1 to 0 coverage over this many pixels of signed distance: a box-filter-like
# antialiasing that keeps shapes smooth at 8x8 and 16x16 (common practice for SDF rendering).
EDGE_PX = 1.5
TILE_NOISE = 0.03  # std of the additive pixel noise, in [-1, 1] units


def digits(size: int = 8, seed: int | None = 0) -> tuple[torch.Tensor, torch.Tensor]:
    """The 1797 8x8 digits of `sklearn.datasets.load_digits` (values 0..16 -> v / 8 - 1), bilinearly
    resized to size x size; shuffled by `seed` (None keeps scikit-learn's order)."""
    from sklearn.datasets import load_digits  # bundled with scikit-learn, no download

    if int(size) < 8:
        raise ValueError(f"digits size must be >= 8 (the native 8x8), got {size}")
    bunch = load_digits()
    x = torch.from_numpy(bunch.images.astype(np.float32) / 8.0 - 1.0)[:, None]  # (1797, 1, 8, 8)
    labels = torch.from_numpy(bunch.target.astype(np.int64))
    if size != 8:
        x = F.interpolate(x, size=(size, size), mode="bilinear", align_corners=False)
    if seed is not None:
        order = torch.from_numpy(np.random.default_rng(seed).permutation(len(labels)))
        x, labels = x[order], labels[order]
    return x.contiguous(), labels


def _capsule(u: np.ndarray, v: np.ndarray, half_len, half_width) -> np.ndarray:
    """Signed distance to a segment of half-length L along u, thickened by half_width (pixels)."""
    du = np.maximum(np.abs(u) - half_len, 0.0)
    return np.sqrt(du**2 + v**2) - half_width


def _square(u: np.ndarray, v: np.ndarray, half_side) -> np.ndarray:
    """Signed distance to a filled axis-aligned square of half-side h in (u, v) (exact box SDF)."""
    qu, qv = np.abs(u) - half_side, np.abs(v) - half_side
    outside = np.sqrt(np.maximum(qu, 0.0) ** 2 + np.maximum(qv, 0.0) ** 2)
    return outside + np.minimum(np.maximum(qu, qv), 0.0)


def _tile_params(n: int, size: int, rng: np.random.Generator) -> dict:
    """All random draws, in a fixed order, as (n, 1, 1) arrays in pixel units."""
    draw = lambda lo, hi: rng.uniform(lo, hi, size=(n, 1, 1))  # noqa: E731
    return dict(
        cx=draw(0.35, 0.65) * size, cy=draw(0.35, 0.65) * size, angle=draw(0.0, math.pi),
        extent=draw(0.15, 0.3) * size, width=draw(0.08, 0.14) * size, brightness=draw(0.6, 1.0),
    )


def _tile_distances(p: dict, size: int) -> np.ndarray:
    """Signed distances (4, n, S, S) of every sample to each of the four tile shapes."""
    centres = np.arange(size) + 0.5  # pixel centres
    px, py = centres[None, None, :] - p["cx"], centres[None, :, None] - p["cy"]
    c, s = np.cos(p["angle"]), np.sin(p["angle"])
    u, v = c * px + s * py, -s * px + c * py  # frame rotated by the sample's angle
    half_w, ext = p["width"] / 2, p["extent"]
    bar = _capsule(u, v, 1.2 * ext, half_w)
    ring = np.abs(np.sqrt(u**2 + v**2) - ext) - half_w
    cross = np.minimum(_capsule(u, v, ext, half_w), _capsule(v, u, ext, half_w))
    square = _square(u, v, 0.7 * ext)
    return np.stack([bar, ring, cross, square])


def tiles(n: int, size: int = 16, seed: int = 0) -> tuple[torch.Tensor, torch.Tensor]:
    """n grayscale tiles, each one of TILE_CLASSES (balanced) at a random position, size, angle and
    brightness on a dark background, antialiased, with mild noise, clipped to [-1, 1]."""
    if int(n) < 1 or int(size) < 4:
        raise ValueError(f"tiles needs n >= 1 and size >= 4, got n={n}, size={size}")
    rng = np.random.default_rng(seed)
    labels = rng.permutation(np.arange(n) % len(TILE_CLASSES))
    p = _tile_params(n, size, rng)
    sd = _tile_distances(p, size)[labels, np.arange(n)]  # (n, S, S): each sample's own shape
    coverage = np.clip(0.5 - sd / EDGE_PX, 0.0, 1.0)
    img = -1.0 + 2.0 * p["brightness"] * coverage + TILE_NOISE * rng.standard_normal((n, size, size))
    x = np.clip(img, -1.0, 1.0).astype(np.float32)[:, None]
    return torch.from_numpy(x), torch.from_numpy(labels.astype(np.int64))
