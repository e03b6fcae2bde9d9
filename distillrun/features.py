"""A small feature network for a Fréchet distance on small images (N, C, H, W) in [-1, 1].

The network is trained on the dataset itself: a small CNN classifier when labels exist, a small
convolutional autoencoder when they do not. Its penultimate layer (64 numbers by default) gives the
features; `metrics.frechet_from_features` turns two feature sets into a Fréchet distance.

These Fréchet numbers are NOT comparable with published FID values: FID uses an Inception-v3 network
trained on ImageNet (Heusel et al. 2017); ours is a tiny network trained on the data at hand. Compare
them only with each other, within one dataset and one cached network, and against their floor (real
images versus held-out real images).

Trained weights are cached by a content hash of (image bytes, label bytes, architecture, seed,
iterations) as `<key>.safetensors` + `<key>.json` in a cache folder (default
~/.cache/distillrun/features), written atomically (temporary name, then os.replace) and read back
with safetensors only. Training is deterministic given the seed (its own torch.Generator; global
RNG state is left as it was). Thread counts are the caller's business.
"""
from __future__ import annotations

import hashlib
import json
import os
import time
from pathlib import Path

import torch
from safetensors.torch import load_file
from torch import nn
from torch.nn import functional as F

from . import checkpoint

FORMAT_VERSION = 1
DEFAULT_CACHE_DIR = Path("~/.cache/distillrun/features")
DEFAULT_ITERATIONS = 600
BATCH_SIZE = 128
LEARNING_RATE = 2e-3


class FeatureNet(nn.Module):
    """conv(C→w) → conv(w→2w, /2) → conv(2w→2w, /2) → global mean → linear → SiLU = features.

    `forward` returns the features (n, feature_dim). During training a `head` on top of the features
    is either a linear classifier (n_classes > 0) or a linear decoder back to the image (autoencoder).
    Global mean pooling makes the trunk work for any H, W (8 and 16 are the intended sizes).
    """

    def __init__(self, in_channels: int, height: int, width: int, n_classes: int = 0,
                 channels: int = 32, feature_dim: int = 64):
        super().__init__()
        self.arch = {"in_channels": in_channels, "height": height, "width": width, "n_classes": n_classes,
                     "channels": channels, "feature_dim": feature_dim}
        w = channels
        self.trunk = nn.Sequential(
            nn.Conv2d(in_channels, w, 3, padding=1), nn.SiLU(),
            nn.Conv2d(w, 2 * w, 3, stride=2, padding=1), nn.SiLU(),
            nn.Conv2d(2 * w, 2 * w, 3, stride=2, padding=1), nn.SiLU(),
        )
        self.proj = nn.Linear(2 * w, feature_dim)
        out = n_classes if n_classes > 0 else in_channels * height * width
        self.head = nn.Linear(feature_dim, out)
        self.meta: dict = {}

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.trunk(x).mean(dim=(2, 3))
        return F.silu(self.proj(h))

    def training_loss(self, x: torch.Tensor, y: torch.Tensor | None) -> torch.Tensor:
        out = self.head(self(x))
        if self.arch["n_classes"] > 0:
            return F.cross_entropy(out, y)
        return F.mse_loss(torch.tanh(out), x.reshape(x.shape[0], -1))


def _check_images(images: torch.Tensor) -> torch.Tensor:
    images = torch.as_tensor(images)
    if images.dim() != 4:
        raise ValueError(f"images must have shape (N, C, H, W), got {tuple(images.shape)}")
    return images.detach().to("cpu", torch.float32).contiguous()


def cache_key(images: torch.Tensor, labels: torch.Tensor | None, arch: dict, seed: int, iterations: int) -> str:
    """sha256 over the float32 image bytes, int64 label bytes, architecture, seed, iterations, format."""
    h = hashlib.sha256()
    h.update(_check_images(images).numpy().tobytes())
    h.update(b"labels:" + (b"none" if labels is None else torch.as_tensor(labels).to("cpu", torch.int64)
                           .contiguous().numpy().tobytes()))
    h.update(json.dumps({"arch": arch, "seed": int(seed), "iterations": int(iterations),
                         "batch_size": BATCH_SIZE, "lr": LEARNING_RATE, "version": FORMAT_VERSION},
                        sort_keys=True).encode())
    return h.hexdigest()[:32]


def _train(net: FeatureNet, images: torch.Tensor, labels: torch.Tensor | None, seed: int, iterations: int) -> dict:
    g = torch.Generator().manual_seed(int(seed) + 1)
    opt = torch.optim.Adam(net.parameters(), lr=LEARNING_RATE)
    sched = torch.optim.lr_scheduler.LambdaLR(opt, lambda i: 1.0 - i / max(iterations, 1))
    n = images.shape[0]
    net.train()
    losses = []
    for _ in range(iterations):
        idx = torch.randint(n, (min(BATCH_SIZE, n),), generator=g)
        loss = net.training_loss(images[idx], None if labels is None else labels[idx])
        opt.zero_grad(set_to_none=True)
        loss.backward()
        opt.step()
        sched.step()
        losses.append(float(loss.detach()))
    net.eval()
    tail = losses[-max(1, iterations // 10):]
    info = {"final_loss": sum(tail) / len(tail)}
    if labels is not None:
        with torch.no_grad():
            pred = torch.cat([net.head(net(b)).argmax(1) for b in torch.split(images, 512)])
        info["train_accuracy"] = float((pred == labels).float().mean())
    return info


def feature_net_for(images: torch.Tensor, labels: torch.Tensor | None = None,
                    cache_dir: str | os.PathLike | None = None, seed: int = 0,
                    iterations: int = DEFAULT_ITERATIONS, channels: int = 32, feature_dim: int = 64) -> FeatureNet:
    """A feature network for `images` (N, C, H, W) in [-1, 1], trained on them (classifier when `labels`
    (N,) integer classes are given, autoencoder otherwise) or loaded from the cache.

    Returns the network in eval mode on CPU; `net(batch)` gives features (B, feature_dim). `net.meta`
    holds the cached metadata (key, kind, arch, seed, iterations, final loss, train accuracy, seconds)
    plus "from_cache": whether the weights were loaded rather than trained in this call.
    """
    x = _check_images(images)
    y = None
    if labels is not None:
        y = torch.as_tensor(labels).reshape(-1).to("cpu", torch.int64)
        if y.shape[0] != x.shape[0]:
            raise ValueError(f"{y.shape[0]} labels for {x.shape[0]} images")
        if int(y.min()) < 0:
            raise ValueError("labels must be non-negative class indices")
    _, c, hgt, wdt = x.shape
    arch = {"in_channels": c, "height": hgt, "width": wdt, "n_classes": 0 if y is None else int(y.max()) + 1,
            "channels": channels, "feature_dim": feature_dim}
    key = cache_key(x, y, arch, seed, iterations)
    folder = Path(cache_dir if cache_dir is not None else DEFAULT_CACHE_DIR).expanduser()
    weights_path, meta_path = folder / f"{key}.safetensors", folder / f"{key}.json"

    if weights_path.exists() and meta_path.exists():
        meta = json.loads(meta_path.read_text())
        net = FeatureNet(**meta["arch"])
        net.load_state_dict(load_file(str(weights_path)))
        net.eval()
        net.meta = {**meta, "from_cache": True}
        return net

    with torch.random.fork_rng(devices=[]):  # seeded init without disturbing the caller's global RNG
        torch.manual_seed(int(seed))
        net = FeatureNet(**arch)
    start = time.perf_counter()
    info = _train(net, x, y, seed, iterations)
    meta = {"key": key, "version": FORMAT_VERSION, "kind": "autoencoder" if y is None else "classifier",
            "arch": arch, "seed": int(seed), "iterations": int(iterations), "n_images": int(x.shape[0]),
            "seconds": round(time.perf_counter() - start, 3), **info}
    folder.mkdir(parents=True, exist_ok=True)
    state = {k: v.detach().contiguous() for k, v in net.state_dict().items()}
    # weights first, metadata last: a reader needs both, so a crash in between leaves no half entry
    checkpoint.atomic_save_tensors(weights_path, state, {"key": key})
    checkpoint.atomic_write_bytes(meta_path, json.dumps(meta, indent=1, sort_keys=True).encode("utf-8"))
    net.meta = {**meta, "from_cache": False}
    return net


@torch.no_grad()
def features(net: nn.Module, images: torch.Tensor, batch_size: int = 512) -> torch.Tensor:
    """Features (N, F) of images (N, C, H, W), computed in batches on the net's device, returned on CPU."""
    images = torch.as_tensor(images)
    if images.dim() != 4:
        raise ValueError(f"images must have shape (N, C, H, W), got {tuple(images.shape)}")
    p = next(net.parameters())
    was_training = net.training
    net.eval()
    out = [net(b.to(p.device, p.dtype)).cpu() for b in torch.split(images.detach(), batch_size)]
    net.train(was_training)
    return torch.cat(out) if out else torch.empty(0, getattr(net, "arch", {}).get("feature_dim", 0))
