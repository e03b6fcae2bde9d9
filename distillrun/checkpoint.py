"""Checkpoint files: atomic writes, safetensors tensors with JSON metadata, integrity checks.

A saved model is one folder (a stage folder, the teacher folder):
    weights.safetensors   the network's state dict (safetensors: tensors only, never code)
    model.json            what rebuilds the network (MODEL_FIELDS; "net" also holds the build
                          arguments, e.g. "kwargs" or "factory") plus any extra keys, and
                          "sha256", the digest of weights.safetensors
model.json is written last, so a folder whose model.json digest matches its weights is complete.

Mid-stage training state is a single safetensors file; its header metadata carries the JSON meta
and a digest of the tensor contents, so each save is one atomic write and a crash can never leave
a new tensor file next to an old meta file.

Every problem found while reading raises CheckpointError: one line naming the file and the fault.
"""
from __future__ import annotations

import contextlib
import hashlib
import json
import os
import secrets
import signal
from pathlib import Path
from typing import Any, Mapping

import torch

MODEL_FORMAT = "distillrun-model/1"
STATE_FORMAT = "distillrun-state/1"
WEIGHTS_FILE = "weights.safetensors"
MODEL_FILE = "model.json"
# Required model.json fields; dotted keys are nested ("net.kind" is meta["net"]["kind"]).
MODEL_FIELDS: dict[str, Any] = {
    "format": str,
    "net.kind": str,  # a key of distillrun.nets.NETS, or "import" (a user's factory)
    "net.data_shape": list,  # what one sample looks like: [d] or [C, S, S]
    "net.num_classes": int,  # 0: unconditional
    "parameterization": str,  # eps | x0 | v, or the method's own output form
    "schedule": str,  # a name of schedule.SCHEDULES
    "stage": int,  # 0: the teacher
    "steps": int,  # sampler steps this network was trained for
    "sha256": str,  # of weights.safetensors, added by save_model
}
_STATE_KEYS = ("distillrun.format", "distillrun.meta", "distillrun.digest")

# Test hook, not a user setting: DISTILLRUN_KILL_AT=<point> makes the process SIGKILL itself when it reaches
# that point, so tests can crash a run at a precise place and check its resume. Points: "<folder>:iteration=N"
# (after iteration N of the teacher/ or stage-NN/ training loop and its state save), "stage-NN:evaluate",
# "stage-NN:weights" (weights saved, metrics.json not yet), "reference:evaluate", "tracking:pipeline" and
# "tracking:stage-NN" (MLflow run created, its id not yet in tracking.json), "write:<folder>/<file>" (half of
# the file's bytes are in its temp file; <folder> is the parent's name, e.g. stage-02, teacher, or the run
# folder's own name for summary.json). Read once at import: unset, each call site costs one falsy test.
KILL_AT = os.environ.get("DISTILLRUN_KILL_AT") or None


def kill_point(where: str) -> None:
    """SIGKILL this process if DISTILLRUN_KILL_AT names `where` (POSIX: SIGKILL cannot be caught or ignored)."""
    if KILL_AT is not None and KILL_AT == where:
        os.kill(os.getpid(), signal.SIGKILL)


class CheckpointError(ValueError):
    """A checkpoint file that cannot be used; str() is the one line shown to the user."""


def _fail(path, what: str, hint: str | None = None) -> CheckpointError:
    text = f"{path}: {what}" + (f"; {hint}" if hint else "")
    return CheckpointError(" ".join(text.split()))


# ---------------------------------------------------------------- atomic writes

def atomic_write_bytes(path, data: bytes) -> None:
    """Write data to path through a hidden temp file in the same folder, fsync, then os.replace."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.parent / f".{path.name}.{secrets.token_hex(4)}.tmp"
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666)  # mode honours the umask
    try:
        with os.fdopen(fd, "wb") as f:
            if KILL_AT is not None and KILL_AT == f"write:{path.parent.name}/{path.name}":
                f.write(data[:len(data) // 2])
                f.flush()
                kill_point(KILL_AT)
            f.write(data)
            f.flush()
            os.fsync(f.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise
    with contextlib.suppress(OSError):  # make the rename itself durable where the OS allows
        dir_fd = os.open(path.parent, os.O_RDONLY)
        try:
            os.fsync(dir_fd)
        finally:
            os.close(dir_fd)


def atomic_write_json(path, obj) -> None:
    """Serialise first (a TypeError leaves the old file untouched), then write atomically."""
    atomic_write_bytes(path, (json.dumps(obj, indent=2) + "\n").encode("utf-8"))


def _prepare(tensors: Mapping[str, torch.Tensor]) -> dict[str, torch.Tensor]:
    """Detached, CPU, contiguous tensors; a tensor sharing storage with an earlier one is copied."""
    out, seen = {}, set()
    for name, t in tensors.items():
        if not isinstance(t, torch.Tensor):
            raise TypeError(f"'{name}' is a {type(t).__name__}, only tensors can be saved")
        t = t.detach().cpu()
        ptr = t.untyped_storage().data_ptr()
        whole = t.is_contiguous() and t.storage_offset() == 0 and \
            t.numel() * t.element_size() == t.untyped_storage().nbytes()
        if not whole or (ptr != 0 and ptr in seen):  # tied weights, views into larger tensors
            t = t.clone(memory_format=torch.contiguous_format)
        seen.add(t.untyped_storage().data_ptr())
        out[str(name)] = t
    return out


def atomic_save_tensors(path, tensors: Mapping[str, torch.Tensor], metadata: Mapping | None = None) -> str:
    """Save tensors as safetensors atomically; non-string metadata values are JSON-encoded.
    Returns the sha256 hex digest of the written file."""
    from safetensors.torch import save

    meta = {str(k): v if isinstance(v, str) else json.dumps(v) for k, v in (metadata or {}).items()}
    data = save(_prepare(tensors), metadata=meta or None)
    atomic_write_bytes(path, data)
    return hashlib.sha256(data).hexdigest()


# ---------------------------------------------------------------- validated reads

def _type_ok(value, types) -> bool:
    types = types if isinstance(types, tuple) else (types,)
    if isinstance(value, bool) and bool not in types:
        return False  # JSON true is not a count
    if float in types and isinstance(value, int):
        return True
    return isinstance(value, types)


def check_fields(obj: Mapping, required: Mapping[str, Any], path, hint: str | None = None) -> None:
    """Raise CheckpointError unless every (dotted) key of required is in obj with the given type."""
    for key, types in required.items():
        value, parts = obj, key.split(".")
        for i, part in enumerate(parts):
            if not isinstance(value, Mapping) or part not in value:
                raise _fail(path, f"missing field '{'.'.join(parts[:i + 1])}'", hint)
            value = value[part]
        if not _type_ok(value, types):
            names = " or ".join(t.__name__ for t in (types if isinstance(types, tuple) else (types,)))
            raise _fail(path, f"field '{key}' is {type(value).__name__} {str(value)[:40]!r}, expected {names}", hint)


def _read_bytes(path, hint: str | None) -> bytes:
    path = Path(path)
    if not path.is_file():
        raise _fail(path, "missing" if not path.exists() else "not a file", hint)
    try:
        return path.read_bytes()
    except OSError as exc:
        raise _fail(path, f"cannot be read ({exc.strerror})", hint) from None


def read_json(path, required: Mapping[str, Any] | None = None, hint: str | None = None) -> dict:
    """Read a JSON object and check its required fields (see check_fields)."""
    raw = _read_bytes(path, hint)
    try:
        obj = json.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise _fail(path, "not valid JSON (not UTF-8 text)", hint) from None
    except json.JSONDecodeError as exc:
        raise _fail(path, f"not valid JSON ({exc.msg} at line {exc.lineno} column {exc.colno})", hint) from None
    if not isinstance(obj, dict):
        raise _fail(path, f"expected a JSON object, found {type(obj).__name__}", hint)
    check_fields(obj, required or {}, path, hint)
    return obj


def _parse_tensors(data: bytes, path, hint: str | None) -> dict[str, torch.Tensor]:
    from safetensors.torch import load

    try:
        return load(data)
    except Exception as exc:  # SafetensorError and friends: report, never a traceback
        raise _fail(path, f"not a readable safetensors file ({str(exc).strip()[:200]})", hint) from None


def read_tensors(path, hint: str | None = None) -> dict[str, torch.Tensor]:
    """Load a plain safetensors file (e.g. a user's teacher weights) with one-line errors."""
    return _parse_tensors(_read_bytes(path, hint), path, hint)


def _header_metadata(data: bytes, path, hint: str | None) -> dict:
    """__metadata__ of a safetensors header: 8-byte little-endian length, then JSON (safetensors format spec)."""
    try:
        n = int.from_bytes(data[:8], "little")
        meta = json.loads(data[8:8 + n].decode("utf-8")).get("__metadata__") or {}
    except (ValueError, AttributeError):
        raise _fail(path, "not a readable safetensors file (bad header)", hint) from None
    return meta


# ---------------------------------------------------------------- models

def save_model(folder, model: torch.nn.Module | Mapping[str, torch.Tensor], meta: Mapping) -> dict:
    """Write folder/weights.safetensors, then folder/model.json (meta + format + sha256); return that meta."""
    folder = Path(folder)
    state = model.state_dict() if isinstance(model, torch.nn.Module) else model
    # A JSON round trip copies nested dicts, turns tuples into lists and fails before touching any file.
    meta = json.loads(json.dumps({**meta, "format": MODEL_FORMAT, "sha256": ""}))
    check_fields(meta, MODEL_FIELDS, folder / MODEL_FILE)
    with contextlib.suppress(FileNotFoundError):
        (folder / MODEL_FILE).unlink()  # until the new JSON lands, the folder reads as incomplete
    meta["sha256"] = atomic_save_tensors(folder / WEIGHTS_FILE, state, {"format": MODEL_FORMAT})
    atomic_write_json(folder / MODEL_FILE, meta)
    return meta


def _model_meta(folder: Path, hint: str) -> tuple[dict, bytes]:
    meta = read_json(folder / MODEL_FILE, MODEL_FIELDS, hint)
    if meta["format"] != MODEL_FORMAT:
        raise _fail(folder / MODEL_FILE, f"format '{meta['format']}' is not {MODEL_FORMAT}", hint)
    data = _read_bytes(folder / WEIGHTS_FILE, hint)
    if hashlib.sha256(data).hexdigest() != meta["sha256"]:
        raise _fail(folder / WEIGHTS_FILE, "truncated or corrupted (sha256 mismatch)", hint)
    return meta, data


def load_model_files(folder, hint: str | None = None) -> tuple[dict[str, torch.Tensor], dict]:
    """Validated (state_dict, meta) of a folder written by save_model."""
    folder = Path(folder)
    hint = hint or f"delete {folder} to retrain it"
    meta, data = _model_meta(folder, hint)
    return _parse_tensors(data, folder / WEIGHTS_FILE, hint), meta


def model_complete(folder) -> bool:
    """True when folder holds a model.json whose digest matches its weights file."""
    try:
        _model_meta(Path(folder), "")
    except CheckpointError:
        return False
    return True


# ---------------------------------------------------------------- training state

def tensor_digest(tensors: Mapping[str, torch.Tensor]) -> str:
    """sha256 over name, dtype, shape and raw bytes of every tensor, in name order (memory layout and device
    do not enter it)."""
    h = hashlib.sha256()
    for name in sorted(tensors):
        t = tensors[name].detach().cpu().contiguous()
        h.update(f"{name}|{t.dtype}|{tuple(t.shape)}|".encode())
        h.update(t.reshape(-1).view(torch.uint8).numpy().tobytes())
    return h.hexdigest()


def save_state(path, tensors: Mapping[str, torch.Tensor], meta: Mapping) -> None:
    """One safetensors file: tensors, plus JSON meta and a content digest in the header."""
    try:
        meta_text = json.dumps(meta)
    except (TypeError, ValueError) as exc:
        raise TypeError(f"training state meta for {path} is not JSON-able: {exc}") from None
    prepared = _prepare(tensors)
    header = dict(zip(_STATE_KEYS, (STATE_FORMAT, meta_text, tensor_digest(prepared))))
    atomic_save_tensors(path, prepared, header)


def load_state(path, hint: str | None = None) -> tuple[dict[str, torch.Tensor], dict]:
    """Validated (tensors, meta) of a file written by save_state."""
    hint = hint or "delete it to restart the stage from its beginning"
    data = _read_bytes(path, hint)
    header = _header_metadata(data, path, hint)
    if header.get(_STATE_KEYS[0]) != STATE_FORMAT:
        raise _fail(path, f"not a training state file (no {STATE_FORMAT} marker)", hint)
    tensors = _parse_tensors(data, path, hint)
    if tensor_digest(tensors) != header.get(_STATE_KEYS[2]):
        raise _fail(path, "corrupted (content digest mismatch)", hint)
    try:
        meta = json.loads(header.get(_STATE_KEYS[1], ""))
    except json.JSONDecodeError:
        raise _fail(path, "meta in the header is not valid JSON", hint) from None
    return tensors, meta


# ---------------------------------------------------------------- optimizer state

def _encode(value, key: str, tensors: dict):
    if isinstance(value, torch.Tensor):
        tensors[key] = value
        return {"__tensor__": key}
    if isinstance(value, tuple):  # e.g. Adam's betas: kept a tuple on the way back
        return {"__tuple__": [_encode(v, f"{key}.{i}", tensors) for i, v in enumerate(value)]}
    if isinstance(value, list):
        return [_encode(v, f"{key}.{i}", tensors) for i, v in enumerate(value)]
    if isinstance(value, dict):
        return {str(k): _encode(v, f"{key}.{k}", tensors) for k, v in value.items()}
    return value


def _decode(value, tensors: Mapping[str, torch.Tensor]):
    if isinstance(value, dict) and set(value) == {"__tensor__"}:
        if value["__tensor__"] not in tensors:
            raise CheckpointError(f"optimizer state: tensor '{value['__tensor__']}' is missing")
        return tensors[value["__tensor__"]]
    if isinstance(value, dict) and set(value) == {"__tuple__"}:
        return tuple(_decode(v, tensors) for v in value["__tuple__"])
    if isinstance(value, list):
        return [_decode(v, tensors) for v in value]
    if isinstance(value, dict):
        return {k: _decode(v, tensors) for k, v in value.items()}
    return value


def flatten_optimizer_state(state_dict: Mapping) -> tuple[dict[str, torch.Tensor], dict]:
    """Split opt.state_dict() into tensors (per-parameter state) and JSON-able meta (the rest)."""
    tensors: dict[str, torch.Tensor] = {}
    state = [[pid, _encode(s, f"state.{pid}", tensors)] for pid, s in state_dict["state"].items()]
    groups = [_encode(g, f"group.{i}", tensors) for i, g in enumerate(state_dict["param_groups"])]
    return tensors, {"state": state, "param_groups": groups}


def unflatten_optimizer_state(tensors: Mapping[str, torch.Tensor], meta: Mapping) -> dict:
    """Inverse of flatten_optimizer_state: a dict for opt.load_state_dict."""
    return {"state": {pid: _decode(s, tensors) for pid, s in meta["state"]},
            "param_groups": [_decode(g, tensors) for g in meta["param_groups"]]}
