"""The run folder as a resumable record: which config made it, who is writing it, what is safe to reuse.

A folder belongs to one config (config.yaml). A rerun with the same config resumes it; one that differs in
keys that change results is refused, naming those keys, unless fresh=true (which empties the folder first,
config.yaml last). A folder holding other files but no config.yaml is not ours: never reused, never emptied.
One process writes a folder at a time (an advisory lock that the kernel drops when the process dies, even by
SIGKILL, so a crashed run never blocks its own resume). Temp files left by a crash mid-write are removed.
"""
from __future__ import annotations

import fcntl
import os
import re
import shutil
from pathlib import Path

from omegaconf import DictConfig, OmegaConf

from . import checkpoint

# Keys that may change between a run and its resume: they do not change what a stage computes.
RESUMABLE_KEYS = ("run_dir", "dry_run", "quiet", "fresh", "tracking", "stop", "compute", "checkpoint_every")
CONFIG_FILE = "config.yaml"
LOCK_FILE = ".lock"
KEEP_ON_FRESH = (".hydra", "distillrun.log", LOCK_FILE)  # Hydra's record and log of this invocation; our lock
_TEMP_NAME = re.compile(r"^\..+\.[0-9a-f]{8}\.tmp$")  # checkpoint.atomic_write_bytes' temp files
_held: dict[str, int] = {}  # run folder -> open lock file descriptor of this process


class RunFolderError(ValueError):
    """The run folder cannot be used as asked; str() is one line."""


def changed_keys(cfg: DictConfig) -> list[str]:
    """'key (before -> now)' for every result-changing key where cfg differs from the folder's config.yaml
    (empty when there is none yet). Reads only; raises RunFolderError for an unreadable config.yaml."""
    saved = Path(cfg.run_dir) / CONFIG_FILE
    if not saved.exists():
        return []
    try:
        before = OmegaConf.to_container(OmegaConf.load(saved), resolve=True)
    except Exception:  # any YAML or interpolation fault: the file is not a config we wrote
        before = None
    if not isinstance(before, dict):
        raise RunFolderError(f"{saved}: unreadable config; delete the run folder or pass fresh=true")
    now = OmegaConf.to_container(cfg, resolve=True)
    return [f"{k} ({v0!r} -> {v1!r})" for k, v0, v1 in sorted(_diff(before, now))]


def _diff(a: dict, b: dict, prefix: str = "") -> list[tuple[str, object, object]]:
    out = []
    for k in set(a) | set(b):
        key = f"{prefix}{k}"
        if not prefix and k in RESUMABLE_KEYS:
            continue
        if isinstance(a.get(k), dict) and isinstance(b.get(k), dict):
            out += _diff(a[k], b[k], key + ".")
        elif a.get(k) != b.get(k):
            out.append((key, a.get(k), b.get(k)))
    return out


def check(cfg: DictConfig) -> None:
    """Refuse a folder made by a different config (unless fresh=true) before anything is written."""
    run_dir = Path(cfg.run_dir)
    if run_dir.is_dir() and not (run_dir / CONFIG_FILE).exists():
        others = sorted(p.name for p in run_dir.iterdir()
                        if p.name not in KEEP_ON_FRESH and not _TEMP_NAME.match(p.name))
        if others:  # not ours, or ours with config.yaml removed by hand: never reuse or wipe it
            raise RunFolderError(f"run_dir={run_dir} holds other files ({', '.join(others[:3])}) and no "
                                 f"{CONFIG_FILE}, so it is not a distillrun run folder; use a new or empty run_dir")
    elif run_dir.exists() and not run_dir.is_dir():
        raise RunFolderError(f"run_dir={run_dir} is a file; use a new or empty folder")
    changed = changed_keys(cfg)
    if changed and not cfg.fresh:
        shown = "; ".join(changed[:6]) + (f"; and {len(changed) - 6} more" if len(changed) > 6 else "")
        raise RunFolderError(f"{cfg.run_dir} was made by a different config (changed: {shown}); "
                             "use another run_dir, or fresh=true to discard its stages and start over")


def lock(run_dir: Path) -> None:
    """Take this process's exclusive lock on the folder (POSIX flock; released by the kernel on exit)."""
    key = str(run_dir.resolve())
    if key in _held:
        return
    fd = os.open(run_dir / LOCK_FILE, os.O_RDWR | os.O_CREAT, 0o666)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        os.close(fd)
        raise RunFolderError(f"{run_dir} is being written by another distillrun process; "
                             "wait for it to finish or use another run_dir") from None
    _held[key] = fd


def unlock(run_dir: Path) -> None:
    fd = _held.pop(str(Path(run_dir).resolve()), None)
    if fd is not None:
        os.close(fd)  # closing the descriptor drops the flock


def load_model_into(module, folder: Path) -> dict:
    """Load a folder written by checkpoint.save_model into module (strict); returns its model.json meta.
    Damaged files and weights that do not fit the configured network are one CheckpointError line."""
    hint = f"delete {folder} to recompute it"
    state, meta = checkpoint.load_model_files(folder, hint)
    try:
        module.load_state_dict(state)
    except (RuntimeError, KeyError, ValueError) as exc:
        lines = [ln.strip() for ln in str(exc).splitlines() if ln.strip()] or [type(exc).__name__]
        raise checkpoint.CheckpointError(f"{folder / checkpoint.WEIGHTS_FILE}: does not fit the configured network "
                                         f"({lines[min(1, len(lines) - 1)][:160]}); {hint}") from None
    return meta


def remove_temp_files(run_dir: Path) -> None:
    """Delete half-written temp files that a killed process left behind (never read: names differ)."""
    for p in run_dir.rglob(".*.tmp"):
        if p.is_file() and _TEMP_NAME.match(p.name):
            p.unlink(missing_ok=True)


def open_run_dir(cfg: DictConfig) -> Path:
    """Create or reuse (and lock) the run folder; refuse one made by a config that differs in keys that matter.
    With fresh=true and a different config, the folder is emptied first."""
    run_dir = Path(cfg.run_dir)
    check(cfg)  # before creating anything
    run_dir.mkdir(parents=True, exist_ok=True)
    lock(run_dir)
    try:
        check(cfg)  # again under the lock: another process may have claimed the folder meanwhile
    except RunFolderError:
        unlock(run_dir)
        raise
    if changed_keys(cfg):  # fresh=true: start over; config.yaml goes last, so a kill mid-way leaves it refused
        for p in sorted(run_dir.iterdir(), key=lambda p: p.name == CONFIG_FILE):
            if p.name not in KEEP_ON_FRESH:
                shutil.rmtree(p) if p.is_dir() else p.unlink()
    remove_temp_files(run_dir)
    checkpoint.atomic_write_bytes(run_dir / CONFIG_FILE, OmegaConf.to_yaml(cfg, resolve=True).encode())
    return run_dir
