"""Datasets by name: generated 2D sets, small images, and the user's own files.

Every dataset is a `Dataset`: training tensor `x` (N, ...) in the model's units, optional labels, and
for the archipelago mixture the exact `mixture` (density, oracle denoiser, mode coverage)."""
from __future__ import annotations

from dataclasses import dataclass

import torch

from .mixture import GaussianMixture, archipelago


@dataclass
class Dataset:
    name: str
    x: torch.Tensor  # (N, d) points or (N, C, H, W) images in [-1, 1]
    labels: torch.Tensor | None = None  # (N,) int64 class labels, if any (archipelago: the island index)
    mixture: GaussianMixture | None = None  # exact density (archipelago only)

    @property
    def is_image(self) -> bool:
        return self.x.dim() == 4

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(self.x.shape[1:])

    @property
    def num_classes(self) -> int:
        return int(self.labels.max()) + 1 if self.labels is not None else 0

    @property
    def sigma_data(self) -> float:
        """Standard deviation of all coordinates pooled (the sigma_data of Karras et al. 2022)."""
        return float(self.x.float().std())

    def batch(self, batch_size: int, generator: torch.Generator):
        """A random training batch (x0, labels or None), drawn with replacement."""
        idx = torch.randint(0, self.x.shape[0], (batch_size,), generator=generator)
        return self.x[idx], (self.labels[idx] if self.labels is not None else None)

    def batches(self, batch_size: int, device):
        """draw(generator) -> a training batch on `device`: the data source of the shared training loop."""
        def draw(generator):
            x0, cond = self.batch(batch_size, generator)
            return x0.to(device), (cond.to(device) if cond is not None else None)
        return draw

    def reference(self, n: int, seed: int) -> torch.Tensor:
        """n data points to score samples against: fresh exact draws where the density is known,
        otherwise a seeded subset (or all) of the data."""
        g = torch.Generator().manual_seed(seed)
        if self.mixture is not None:
            return self.mixture.sample(n, g)[0]
        if n >= self.x.shape[0]:
            return self.x
        return self.x[torch.randperm(self.x.shape[0], generator=g)[:n]]


def load_dataset(cfg) -> Dataset:
    """Build the dataset named by cfg (a DataConfig); raises ValueError with a one-line reason."""
    from . import files, images, shapes2d

    g = torch.Generator().manual_seed(cfg.seed)
    if cfg.name == "archipelago":
        mix = archipelago()
        return Dataset(cfg.name, *mix.sample(cfg.n_train, g), mixture=mix)  # labels: the islands
    if cfg.name == "spiral":
        return Dataset(cfg.name, shapes2d.spiral(cfg.n_train, cfg.seed))
    if cfg.name == "rings":
        return Dataset(cfg.name, shapes2d.rings(cfg.n_train, cfg.seed))
    if cfg.name == "digits":
        return Dataset(cfg.name, *images.digits(cfg.image_size, cfg.seed))
    if cfg.name == "tiles":
        return Dataset(cfg.name, *images.tiles(cfg.n_train, cfg.image_size, cfg.seed))
    if cfg.name == "array":
        return Dataset(cfg.name, *files.load_array(cfg.path, cfg.key, rescale=cfg.rescale))
    if cfg.name == "image_folder":
        return Dataset(cfg.name, *files.load_image_folder(cfg.path, cfg.image_size))
    raise ValueError(f"data.name={cfg.name!r} is unknown")
