"""The user's own data: .npy/.npz arrays and folders of PNG/JPEG images, checked before any training.

Every problem is one `ValueError` line naming the file and what is valid. Arrays are read with
`allow_pickle=False`, so a file can never run code on load.
"""
from __future__ import annotations

import zipfile
from pathlib import Path

import numpy as np
import torch

ARRAY_EXTENSIONS = (".npy", ".npz")
IMAGE_EXTENSIONS = (".png", ".jpg", ".jpeg")
LABELS_KEY = "labels"  # optional array in an .npz with one integer class per sample
VALID_SHAPES = "(N, d) vectors or (N, C, H, W) images with C in {1, 3}"


def _fail(path, problem: str) -> None:
    raise ValueError(f"data file '{path}': {problem}")


def _read_npz(path: Path, key: str | None) -> tuple[np.ndarray, np.ndarray | None]:
    with np.load(path, allow_pickle=False) as archive:
        names = list(archive.files)
        data_names = [k for k in names if k != LABELS_KEY]
        if key is None:
            if not data_names:
                _fail(path, f"holds no data array (arrays present: {', '.join(names) or 'none'})")
            key = data_names[0]
        elif key not in names:
            _fail(path, f"has no array '{key}'; arrays present: {', '.join(names) or 'none'}")
        labels = archive[LABELS_KEY] if LABELS_KEY in names and key != LABELS_KEY else None
        return archive[key], labels


def _read(path: Path, key: str | None) -> tuple[np.ndarray, np.ndarray | None]:
    """Raw arrays; numpy's refusal of pickled objects becomes our one-line error."""
    try:
        if path.suffix.lower() == ".npy":
            return np.load(path, allow_pickle=False), None
        return _read_npz(path, key)
    except ValueError as err:
        if "allow_pickle" not in str(err):
            _fail(path, f"cannot be read ({' '.join(str(err).split())[:160]}); "
                        "valid: complete files written by numpy.save or numpy.savez")
        _fail(path, "is not a numeric numpy array (reading it needs pickle, which is refused); "
                    "save one with numpy.save or numpy.savez")
    except (OSError, EOFError, zipfile.BadZipFile) as err:
        _fail(path, f"cannot be read ({type(err).__name__}); valid: files written by numpy.save or numpy.savez")


def _check_values(path, x: np.ndarray) -> None:
    if not (np.issubdtype(x.dtype, np.integer) or np.issubdtype(x.dtype, np.floating)):
        _fail(path, f"dtype '{x.dtype}' is not numeric; valid: integer or float arrays")
    if x.size == 0:
        _fail(path, f"array is empty (shape {x.shape}); valid: {VALID_SHAPES} with N >= 1")
    if x.ndim not in (2, 4) or (x.ndim == 4 and x.shape[1] not in (1, 3)):
        _fail(path, f"array has shape {x.shape}; valid: {VALID_SHAPES}")
    if not np.all(np.isfinite(x)):
        _fail(path, f"holds {int(np.sum(~np.isfinite(x)))} NaN or inf values; valid: finite numbers only")


def _image_range(path, x: np.ndarray, rescale: bool) -> np.ndarray:
    """Images must lie in [-1, 1]; rescale=True maps [0, 1] -> [-1, 1] and [0, 255] -> [-1, 1]."""
    lo, hi = float(x.min()), float(x.max())
    if rescale and lo >= 0.0 and hi <= 1.0:
        return x * 2.0 - 1.0
    if rescale and lo >= 0.0 and hi <= 255.0:
        return x / 127.5 - 1.0
    if lo < -1.0 or hi > 1.0:
        hint = "" if rescale else " or pass rescale=True to map [0, 1] or [0, 255] automatically"
        _fail(path, f"image values span [{lo:g}, {hi:g}], outside [-1, 1]; rescale them to [-1, 1]{hint}")
    return x


def _check_labels(path, labels: np.ndarray, n: int) -> torch.Tensor:
    if labels.ndim != 1 or len(labels) != n or not np.issubdtype(labels.dtype, np.integer):
        _fail(path, f"'{LABELS_KEY}' has shape {labels.shape} and dtype '{labels.dtype}'; "
                    f"valid: ({n},) integers, one class per sample")
    if labels.min() < 0:
        _fail(path, f"'{LABELS_KEY}' holds negative values; valid: classes 0..K-1")
    return torch.from_numpy(labels.astype(np.int64))


def load_array(path, key: str | None = None, rescale: bool = False) -> tuple[torch.Tensor, torch.Tensor | None]:
    """(x float32, labels long or None) from .npy or .npz. In an .npz the data is the array named
    `key` (default: the first array not named 'labels') and an optional 'labels' array gives classes."""
    path = Path(path)
    if not path.is_file():
        _fail(path, "does not exist (or is not a file)")
    if path.suffix.lower() not in ARRAY_EXTENSIONS:
        _fail(path, f"has extension '{path.suffix}'; valid: {', '.join(ARRAY_EXTENSIONS)}")
    x, labels = _read(path, key)
    _check_values(path, x)
    x = x.astype(np.float32)
    if x.ndim == 4:
        x = _image_range(path, x, rescale)
    labels = _check_labels(path, labels, len(x)) if labels is not None else None
    return torch.from_numpy(np.ascontiguousarray(x, dtype=np.float32)), labels


def _image_files(folder: Path) -> list[Path]:
    return sorted(p for p in folder.iterdir() if p.is_file() and p.suffix.lower() in IMAGE_EXTENSIONS)


def _read_image(path: Path, size: int) -> np.ndarray:
    """Grayscale (S, S) float32 in [-1, 1]: PIL's 'L' conversion (ITU-R 601-2 luma) then bilinear resize."""
    from PIL import Image, UnidentifiedImageError  # pillow ships as a matplotlib dependency

    try:
        with Image.open(path) as img:
            gray = img.convert("L").resize((size, size), Image.Resampling.BILINEAR)
    except (UnidentifiedImageError, OSError) as err:
        raise ValueError(f"image file '{path}' cannot be read ({type(err).__name__}); "
                         f"valid: PNG or JPEG images") from None
    return np.asarray(gray, dtype=np.float32) / 127.5 - 1.0


def load_image_folder(path, size: int) -> tuple[torch.Tensor, torch.Tensor | None]:
    """(images (N, 1, S, S) in [-1, 1], labels or None). Either a flat folder of images (no labels) or
    one subfolder per class holding images (labels = subfolder index in sorted name order)."""
    folder = Path(path)
    if not folder.is_dir():
        raise ValueError(f"image folder '{folder}' does not exist (or is not a folder)")
    if int(size) < 1:
        raise ValueError(f"image folder '{folder}': size must be >= 1, got {size}")
    loose = _image_files(folder)
    classes = sorted(d for d in folder.iterdir() if d.is_dir() and _image_files(d))
    if loose and classes:
        raise ValueError(f"image folder '{folder}' mixes loose images with class subfolders "
                         f"({', '.join(d.name for d in classes)}); valid: one or the other")
    groups = [(None, loose)] if loose else [(k, _image_files(d)) for k, d in enumerate(classes)]
    files = [(k, f) for k, fs in groups for f in fs]
    if not files:
        raise ValueError(f"image folder '{folder}' holds no images; valid: {', '.join(IMAGE_EXTENSIONS)} "
                         f"files, directly or in one subfolder per class")
    x = np.stack([_read_image(f, int(size)) for _, f in files])[:, None]
    labels = None if loose else torch.tensor([k for k, _ in files], dtype=torch.long)
    return torch.from_numpy(x), labels


def class_names(path) -> list[str]:
    """Subfolder names of an image folder in label order (empty for a flat folder)."""
    folder = Path(path)
    return [d.name for d in sorted(folder.iterdir()) if d.is_dir() and _image_files(d)]
