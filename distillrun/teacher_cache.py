"""Trained teachers, kept once per machine and reused: a content-addressed cache.

Two runs on the same data with the same network and teacher settings (a method comparison, a tolerance sweep)
would each train the same teacher from scratch: identical weights, about a third of each run's time. The
first run stores its trained teacher here under a key that is the SHA-256 of everything that determines the
weights (`key_document`): the data's content (the training tensor's bytes and labels, plus the data settings),
the network's build arguments, the teacher's training settings, the run's seed, the device type, precision and
compile flag, and the code: the package version, a digest of the package's own source files (an edited
loss or loop makes a new key), and torch's version. Sampling-only settings (teacher.steps, teacher.sampler)
are left out. Later runs with the same key load the weights instead of training, and say so in one line.

Layout: <root>/teachers/<key>/ holds weights.safetensors and model.json (written by checkpoint.save_model,
model.json carrying the weights' sha256) and key.json (the key document, for humans and as a cross-check).
An entry is written in a temp folder and renamed into place, so a reader sees all of it or nothing. An entry
whose files fail the integrity check (digest, format, key, or weights that do not fit the network) is never
used: the teacher is trained anew and the entry replaced. A lock per key makes a second process that wants
the same teacher wait for the first one to finish training it (the parallel sweep launcher), then reuse it.

Where: compute.cache_dir; else $DISTILLRUN_CACHE_DIR; else $XDG_CACHE_HOME/distillrun; else
~/.cache/distillrun. compute.teacher_cache=false trains every time and neither reads nor writes the cache.
Delete the folder to reclaim the space; nothing else refers to it (a run copies its teacher into its own
run folder, so a run folder stays complete without the cache).
"""
from __future__ import annotations

import contextlib
import fcntl
import hashlib
import json
import logging
import os
import secrets
import shutil
from pathlib import Path

import torch
from omegaconf import OmegaConf

from . import checkpoint

log = logging.getLogger(__name__)
KEY_FILE = "key.json"
KEY_FORMAT = 1
SAMPLING_ONLY = ("steps", "sampler")  # teacher settings that do not change the trained weights
IMPORT_ONLY = ("factory", "factory_kwargs", "weights")  # teacher.source=import: nothing is trained


def cache_root(cache_dir: str | None = None) -> Path:
    """The cache folder: the compute.cache_dir key, $DISTILLRUN_CACHE_DIR, $XDG_CACHE_HOME/distillrun, or
    ~/.cache/distillrun, first one set."""
    if cache_dir:
        return Path(cache_dir).expanduser()
    if os.environ.get("DISTILLRUN_CACHE_DIR"):
        return Path(os.environ["DISTILLRUN_CACHE_DIR"]).expanduser()
    base = os.environ.get("XDG_CACHE_HOME") or Path.home() / ".cache"
    return Path(base).expanduser() / "distillrun"


_SOURCE_DIGEST: str | None = None


def source_digest() -> str:
    """SHA-256 over the package's .py files (relative path and bytes, in path order), computed once."""
    global _SOURCE_DIGEST
    if _SOURCE_DIGEST is None:
        root = Path(__file__).resolve().parent
        h = hashlib.sha256()
        for path in sorted(root.rglob("*.py")):
            h.update(str(path.relative_to(root)).encode() + b"\0")
            h.update(path.read_bytes())
        _SOURCE_DIGEST = h.hexdigest()
    return _SOURCE_DIGEST


def data_digest(data) -> str:
    """SHA-256 of the training data's content: dtype, shape and bytes of x, and of the labels if any."""
    h = hashlib.sha256()
    for t in (data.x, data.labels):
        if t is None:
            h.update(b"none")
            continue
        t = t.detach().cpu().contiguous()
        h.update(f"{t.dtype}|{tuple(t.shape)}|".encode())
        h.update(t.reshape(-1).view(torch.uint8).numpy().tobytes())
    return h.hexdigest()


def key_document(cfg, data, arch: dict, device: torch.device) -> dict:
    """Everything that determines the trained teacher's weights (see the module docstring)."""
    from . import __version__

    teacher = OmegaConf.to_container(cfg.teacher, resolve=True)
    for k in SAMPLING_ONLY + IMPORT_ONLY:
        teacher.pop(k, None)
    data_cfg = OmegaConf.to_container(cfg.data, resolve=True)
    data_cfg.pop("path", None)  # where the file lies does not matter; its content does
    return {"format": KEY_FORMAT, "package": __version__, "source": source_digest(), "torch": torch.__version__,
            "data": {**data_cfg, "content": data_digest(data)}, "net": arch, "teacher": teacher, "seed": cfg.seed,
            "device": device.type, "precision": cfg.compute.precision, "compile": bool(cfg.compute.compile)}


def key_of(document: dict) -> str:
    return hashlib.sha256(json.dumps(document, sort_keys=True, default=str).encode()).hexdigest()


class TeacherCache:
    """One cache folder; `entry(key)` is where a key's teacher lives."""

    def __init__(self, root: Path):
        self.root = Path(root)
        self.folder = self.root / "teachers"

    def entry(self, key: str) -> Path:
        return self.folder / key

    @contextlib.contextmanager
    def locked(self, key: str):
        """Hold the key's lock (an advisory flock, dropped by the kernel if the process dies)."""
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            fd = os.open(self.folder / f".{key}.lock", os.O_RDWR | os.O_CREAT, 0o666)
        except OSError as e:  # a read-only or missing cache folder: run without the lock (and without storing)
            log.warning(f"teacher cache: cannot use {self.folder} ({e.strerror}); continuing without it")
            yield
            return
        try:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                log.info(f"teacher cache: another process is training the same teacher ({key[:12]}); waiting for it")
                fcntl.flock(fd, fcntl.LOCK_EX)
            yield
        finally:
            os.close(fd)

    def load(self, key: str, document: dict, module: torch.nn.Module) -> dict | None:
        """Load the cached teacher into module and return its model.json meta; None when there is no entry.
        An entry that fails any check is reported in one line and treated as absent (never partly used)."""
        folder = self.entry(key)
        if not folder.is_dir():
            return None
        try:
            saved = checkpoint.read_json(folder / KEY_FILE, {"format": int})
            if key_of(saved) != key or saved != json.loads(json.dumps(document, default=str)):
                raise checkpoint.CheckpointError(f"{folder / KEY_FILE}: describes another teacher")
            state, meta = checkpoint.load_model_files(folder)
            backup = {k: v.clone() for k, v in module.state_dict().items()}
            try:
                module.load_state_dict(state)
            except (RuntimeError, KeyError, ValueError) as e:
                module.load_state_dict(backup)
                first = (str(e).strip().splitlines() or [type(e).__name__])[0][:120]
                raise checkpoint.CheckpointError(f"{folder / checkpoint.WEIGHTS_FILE}: does not fit ({first})") from None
        except checkpoint.CheckpointError as e:
            log.warning(f"teacher cache: {e}; not used, training the teacher anew")
            return None
        return meta

    def store(self, key: str, document: dict, state: dict, meta: dict) -> Path | None:
        """Write the entry in a temp folder, then rename it into place (replacing a damaged one). A cache folder
        that cannot be written is one warning line, not a failed run (the teacher is in the run folder)."""
        tmp = self.folder / f".tmp-{key[:16]}-{secrets.token_hex(4)}"
        try:
            self.folder.mkdir(parents=True, exist_ok=True)
            checkpoint.atomic_write_json(tmp / KEY_FILE, document)
            checkpoint.save_model(tmp, state, {**meta, "cache_key": key})
            target = self.entry(key)
            if target.exists():  # only a damaged entry gets here (we hold the key's lock)
                shutil.rmtree(target)
            os.rename(tmp, target)
        except OSError as e:
            log.warning(f"teacher cache: cannot write {self.entry(key)} ({e.strerror or e}); the teacher is not cached")
            return None
        finally:
            shutil.rmtree(tmp, ignore_errors=True)
        return self.entry(key)
