"""Checkpoint files: round trips, one-line errors for damaged files, atomic writes, optimizer state.

Outside references: safetensors' own reader (safe_open, save_file) for the files we write and read,
hashlib for the recorded digests, torch.optim.Adam for the optimizer-state round trip.
"""
import hashlib
import json
import os

import pytest
import torch
from safetensors import safe_open
from safetensors.torch import save as st_save, save_file as st_save_file
from torch import nn

from distillrun import checkpoint as ck

META = {"net": {"kind": "mlp", "data_shape": [2], "num_classes": 0, "kwargs": {"width": 8, "depth": 1}},
        "parameterization": "v", "schedule": "cosine", "stage": 2, "steps": 4}


class Tied(nn.Module):
    def __init__(self):
        super().__init__()
        self.a = nn.Linear(3, 3)
        self.b = nn.Linear(3, 3)
        self.b.weight = self.a.weight  # shared parameter: two state-dict keys, one storage
        self.register_buffer("scale", torch.tensor(2.0))


def _one_line(exc) -> str:
    text = str(exc.value)
    assert "\n" not in text
    return text


def test_model_round_trip_and_digest(tmp_path):
    torch.manual_seed(0)
    net = Tied()
    with pytest.raises(RuntimeError):  # safetensors refuses shared storage as-is (documented behaviour)
        st_save(net.state_dict())
    meta = ck.save_model(tmp_path / "stage-02", net, {**META, "net": {**META["net"], "data_shape": (2,)}, "extra": {"sigma_data": 0.5}})
    weights = tmp_path / "stage-02" / ck.WEIGHTS_FILE
    assert meta["sha256"] == hashlib.sha256(weights.read_bytes()).hexdigest()  # hashlib is the reference
    with safe_open(str(weights), framework="pt") as f:  # readable by safetensors' own reader
        assert set(f.keys()) == set(net.state_dict())
    state, back = ck.load_model_files(tmp_path / "stage-02")
    assert back == json.loads((tmp_path / "stage-02" / ck.MODEL_FILE).read_text())
    assert back["format"] == ck.MODEL_FORMAT and back["extra"] == {"sigma_data": 0.5}
    assert back["net"]["data_shape"] == [2]  # tuples are stored as JSON lists
    fresh = Tied()
    fresh.load_state_dict(state)
    for key, value in net.state_dict().items():
        assert torch.equal(fresh.state_dict()[key], value), key
    assert ck.model_complete(tmp_path / "stage-02")


def test_truncated_weights_named(tmp_path):
    ck.save_model(tmp_path, nn.Linear(4, 4), META)
    weights = tmp_path / ck.WEIGHTS_FILE
    weights.write_bytes(weights.read_bytes()[:-10])
    with pytest.raises(ck.CheckpointError) as exc:
        ck.load_model_files(tmp_path)
    text = _one_line(exc)
    assert text.startswith(f"{weights}: truncated or corrupted (sha256 mismatch)")
    assert f"delete {tmp_path}" in text
    assert not ck.model_complete(tmp_path)


@pytest.mark.parametrize("edit, expected", [
    (lambda m: m.pop("steps"), "missing field 'steps'"),
    (lambda m: m["net"].pop("num_classes"), "missing field 'net.num_classes'"),
    (lambda m: m.pop("net"), "missing field 'net'"),
    (lambda m: m.update(stage="2"), "field 'stage' is str"),
    (lambda m: m.update(stage=True), "field 'stage' is bool"),  # JSON true is not an int here
    (lambda m: m.update(format="other/9"), "format 'other/9'"),
])
def test_bad_model_json_fields(tmp_path, edit, expected):
    meta = ck.save_model(tmp_path, nn.Linear(2, 2), META)
    edit(meta)
    (tmp_path / ck.MODEL_FILE).write_text(json.dumps(meta))
    with pytest.raises(ck.CheckpointError) as exc:
        ck.load_model_files(tmp_path)
    text = _one_line(exc)
    assert text.startswith(str(tmp_path / ck.MODEL_FILE)) and expected in text


@pytest.mark.parametrize("content, expected", [
    (b'{"format": "distillrun-model/1",', "not valid JSON"),
    (b"\xff\xfe\x00", "not valid JSON"),
    (b"[1, 2]", "expected a JSON object, found list"),
    (None, "missing"),
])
def test_unreadable_model_json(tmp_path, content, expected):
    ck.save_model(tmp_path, nn.Linear(2, 2), META)
    path = tmp_path / ck.MODEL_FILE
    path.unlink() if content is None else path.write_bytes(content)
    with pytest.raises(ck.CheckpointError) as exc:
        ck.load_model_files(tmp_path)
    assert _one_line(exc).startswith(f"{path}: {expected}")
    assert not ck.model_complete(tmp_path)


def test_save_model_rejects_incomplete_meta_before_writing(tmp_path):
    with pytest.raises(ck.CheckpointError, match="missing field 'schedule'"):
        ck.save_model(tmp_path / "m", nn.Linear(2, 2), {k: v for k, v in META.items() if k != "schedule"})
    assert not (tmp_path / "m").exists()


@pytest.mark.parametrize("broken", ["replace", "fsync"])
def test_atomic_write_keeps_old_file(tmp_path, monkeypatch, broken):
    target = tmp_path / "a.json"
    ck.atomic_write_json(target, {"old": 1})

    def fail(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(os, broken, fail)
    with pytest.raises(OSError):
        ck.atomic_write_json(target, {"new": 2})
    monkeypatch.undo()
    assert json.loads(target.read_text()) == {"old": 1}
    assert os.listdir(tmp_path) == ["a.json"]  # the temp file is gone


def test_atomic_write_creates_parents_and_rejects_non_json(tmp_path):
    target = tmp_path / "x" / "y" / "m.json"
    ck.atomic_write_json(target, {"a": [1, 2]})
    assert json.loads(target.read_text()) == {"a": [1, 2]}
    with pytest.raises(TypeError):
        ck.atomic_write_json(target, {"a": {1, 2}})
    assert json.loads(target.read_text()) == {"a": [1, 2]}
    assert sorted(os.listdir(target.parent)) == ["m.json"]


def test_read_tensors_user_file(tmp_path):
    path = tmp_path / "teacher.safetensors"
    st_save_file({"w": torch.arange(6.0).reshape(2, 3)}, str(path))  # written by safetensors itself
    assert torch.equal(ck.read_tensors(path)["w"], torch.arange(6.0).reshape(2, 3))
    path.write_bytes(b"\x10\x00\x00\x00\x00\x00\x00\x00{not a header}")
    with pytest.raises(ck.CheckpointError) as exc:
        ck.read_tensors(path)
    assert _one_line(exc).startswith(f"{path}: not a readable safetensors file")


def _adam_setup(seed=0):
    torch.manual_seed(seed)
    net = nn.Sequential(nn.Linear(3, 5), nn.Tanh(), nn.Linear(5, 1))
    opt = torch.optim.Adam(net.parameters(), lr=1e-2, betas=(0.8, 0.95), weight_decay=1e-3, amsgrad=True)
    sched = torch.optim.lr_scheduler.LinearLR(opt, 1.0, 0.1, total_iters=10)
    return net, opt, sched


def _step(net, opt, sched, x):
    opt.zero_grad()
    (net(x) ** 2).mean().backward()
    opt.step()
    sched.step()


def test_optimizer_state_round_trip_bit_identical(tmp_path):
    x = torch.randn(16, 3, generator=torch.Generator().manual_seed(1))
    net, opt, sched = _adam_setup()
    for _ in range(3):
        _step(net, opt, sched, x)
    opt_tensors, opt_meta = ck.flatten_optimizer_state(opt.state_dict())
    tensors = {**{f"model.{k}": v for k, v in net.state_dict().items()},
               **{f"opt.{k}": v for k, v in opt_tensors.items()}}
    ck.save_state(tmp_path / "state.safetensors", tensors, {"iteration": 3, "optimizer": opt_meta,
                                                             "scheduler": sched.state_dict()})
    back, meta = ck.load_state(tmp_path / "state.safetensors")
    net2, opt2, sched2 = _adam_setup(seed=5)  # different init: everything must come from the file
    net2.load_state_dict({k[6:]: v for k, v in back.items() if k.startswith("model.")})
    opt2.load_state_dict(ck.unflatten_optimizer_state(
        {k[4:]: v for k, v in back.items() if k.startswith("opt.")}, meta["optimizer"]))
    sched2.load_state_dict(meta["scheduler"])
    assert opt2.param_groups[0]["betas"] == (0.8, 0.95) and isinstance(opt2.param_groups[0]["betas"], tuple)
    _step(net, opt, sched, x)
    _step(net2, opt2, sched2, x)
    for p, q in zip(net.parameters(), net2.parameters()):
        assert torch.equal(p, q)


def test_state_header_and_corruption(tmp_path):
    path = tmp_path / "state.safetensors"
    ck.save_state(path, {"a": torch.ones(64), "rng": torch.zeros(8, dtype=torch.uint8)}, {"iteration": 7})
    with safe_open(str(path), framework="pt") as f:  # our header is plain safetensors metadata
        assert json.loads(f.metadata()["distillrun.meta"]) == {"iteration": 7}
    assert ck.load_state(path)[1] == {"iteration": 7}
    data = bytearray(path.read_bytes())
    data[-5] ^= 0xFF  # flip bits inside the tensor payload: still parses, content differs
    path.write_bytes(bytes(data))
    with pytest.raises(ck.CheckpointError) as exc:
        ck.load_state(path)
    assert _one_line(exc).startswith(f"{path}: corrupted (content digest mismatch)")
    path.write_bytes(bytes(data[:-20]))
    with pytest.raises(ck.CheckpointError, match="not a readable safetensors file"):
        ck.load_state(path)
    st_save_file({"a": torch.ones(2)}, str(path))
    with pytest.raises(ck.CheckpointError, match="not a training state file"):
        ck.load_state(path)
