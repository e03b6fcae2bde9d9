"""Datasets by name: generated 2D sets, small images, and the user's own files.

Every dataset is a `Dataset`: training tensor `x` (N, ...) in the model's units, optional labels, and
for the archipelago mixture the exact `mixture` (density, oracle denoiser, mode coverage)."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

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


@dataclass(frozen=True)
class DataSource:
    """A dataset name's entry: how it loads, and what validation may know before loading it."""
    load: Callable  # load(data_cfg) -> Dataset; ValueError or OSError with a one-line reason
    images: bool = False  # (N, C, S, S) images: image-only metrics apply, a U-Net fits
    known_density: bool = False  # holds its exact density (Dataset.mixture): exact teacher, density metrics
    reads_path: bool = False  # the user's files at data.path


def _archipelago(cfg) -> Dataset:
    mix = archipelago()
    return Dataset(cfg.name, *mix.sample(cfg.n_train, torch.Generator().manual_seed(cfg.seed)), mixture=mix)  # labels: the islands


def _archipelago_moved(cfg) -> Dataset:
    from .mixture import archipelago_moved

    mix = archipelago_moved()
    return Dataset(cfg.name, mix.sample(cfg.n_train, torch.Generator().manual_seed(cfg.seed))[0], mixture=mix)


def _spiral(cfg) -> Dataset:
    from .shapes2d import spiral
    return Dataset(cfg.name, spiral(cfg.n_train, cfg.seed))


def _rings(cfg) -> Dataset:
    from .shapes2d import rings
    return Dataset(cfg.name, rings(cfg.n_train, cfg.seed))


def _digits(cfg) -> Dataset:
    from .images import digits
    return Dataset(cfg.name, *digits(cfg.image_size, cfg.seed))


def _tiles(cfg) -> Dataset:
    from .images import tiles
    return Dataset(cfg.name, *tiles(cfg.n_train, cfg.image_size, cfg.seed))


def _array(cfg) -> Dataset:
    from .files import load_array
    return Dataset(cfg.name, *load_array(cfg.path, cfg.key, rescale=cfg.rescale))


def _image_folder(cfg) -> Dataset:
    from .files import load_image_folder
    return Dataset(cfg.name, *load_image_folder(cfg.path, cfg.image_size))


DATASETS: dict[str, DataSource] = {
    "archipelago": DataSource(_archipelago, known_density=True),
    "archipelago_moved": DataSource(_archipelago_moved, known_density=True),
    "spiral": DataSource(_spiral),
    "rings": DataSource(_rings),
    "digits": DataSource(_digits, images=True),
    "tiles": DataSource(_tiles, images=True),
    "array": DataSource(_array, reads_path=True),
    "image_folder": DataSource(_image_folder, images=True, reads_path=True),
}


def register_dataset(name: str, source: DataSource) -> None:
    """Add a dataset under data.name=<name> (validation, loading and the metrics read its DataSource)."""
    DATASETS[name] = source


def load_dataset(cfg) -> Dataset:
    """Build the dataset named by cfg (a DataConfig); raises ValueError with a one-line reason."""
    if cfg.name not in DATASETS:
        raise ValueError(f"data.name={cfg.name!r} is unknown; valid: {', '.join(DATASETS)}")
    return DATASETS[cfg.name].load(cfg)
