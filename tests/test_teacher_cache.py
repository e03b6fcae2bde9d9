"""One teacher, trained once: the content-addressed teacher cache.

What is checked against something outside the cache code: weights are compared tensor by tensor with torch.equal
against a teacher trained without the cache; file integrity is the SHA-256 of the weights file (hashlib), which a
flipped byte must break. Training is counted by wrapping the training loop."""
import json
import logging

import numpy as np
import pytest
import torch
from hydra import compose, initialize_config_module

from distillrun import checkpoint, pipeline, teachers
from distillrun.config import register_configs, validate
from distillrun.teacher_cache import TeacherCache, key_document, key_of

TINY = ["teacher.iterations=40", "teacher.warmup=5", "teacher.steps=8", "compute.threads=1", "quiet=true",
        "data.n_train=1024", "net.width=16", "net.depth=1", "tracking=off"]


def make_cfg(tmp_path, *extra):
    register_configs()
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        cfg = compose("run", overrides=[*TINY, f"compute.cache_dir={tmp_path / 'cache'}", *extra])
    validate(cfg)
    return cfg


@pytest.fixture
def trainings(monkeypatch):
    """How many times the teacher's training loop ran."""
    count = [0]
    real = teachers.train_loop

    def counted(*args, **kwargs):
        count[0] += 1
        return real(*args, **kwargs)
    monkeypatch.setattr(teachers, "train_loop", counted)
    return count


def prepare(cfg, run_dir):
    torch.manual_seed(cfg.seed)  # as pipeline.run does before the teacher's network is built
    data = pipeline.load_data(cfg)
    run_dir.mkdir(parents=True, exist_ok=True)
    return teachers.prepare_teacher(cfg, data, run_dir)


def weights(teacher) -> dict:
    return {k: v.clone() for k, v in teacher.init_student.state_dict().items()}


def assert_same(a: dict, b: dict):
    assert a.keys() == b.keys() and all(torch.equal(a[k], b[k]) for k in a)


def entries(cfg):
    folder = TeacherCache(cfg.compute.cache_dir).folder
    return sorted(p for p in folder.iterdir() if not p.name.startswith(".")) if folder.exists() else []


def test_reuse_gives_identical_weights_and_skips_training(tmp_path, trainings, caplog):
    cfg = make_cfg(tmp_path)
    first = prepare(cfg, tmp_path / "a")
    assert trainings[0] == 1 and len(entries(cfg)) == 1
    with caplog.at_level(logging.INFO, logger="distillrun"):
        second = prepare(cfg, tmp_path / "b")
    assert trainings[0] == 1  # not trained again
    assert_same(weights(first), weights(second))
    assert any("reused the trained teacher" in r.getMessage() for r in caplog.records)
    assert second.cache_note.startswith("reused") and second.seconds == 0.0
    # the run folder holds its own complete copy (resume and draw never need the cache)
    meta = json.loads((tmp_path / "b" / "teacher" / "model.json").read_text())
    assert meta["sha256"] == json.loads((tmp_path / "a" / "teacher" / "model.json").read_text())["sha256"]
    # and the same as a teacher trained with the cache off
    off = prepare(make_cfg(tmp_path, "compute.teacher_cache=false"), tmp_path / "c")
    assert trainings[0] == 2
    assert_same(weights(first), weights(off))


@pytest.mark.parametrize("damage", ["flip", "truncate", "key"])
def test_a_damaged_entry_is_retrained_never_used(tmp_path, trainings, caplog, damage):
    cfg = make_cfg(tmp_path)
    first = prepare(cfg, tmp_path / "a")
    (entry,) = entries(cfg)
    if damage == "key":  # a key.json that does not describe this teacher (e.g. edited by hand)
        doc = json.loads((entry / "key.json").read_text())
        doc["seed"] = 99
        (entry / "key.json").write_text(json.dumps(doc))
    else:
        path = entry / checkpoint.WEIGHTS_FILE
        data = bytearray(path.read_bytes())
        if damage == "flip":
            data[-5] ^= 0xFF  # one bit pattern inside the last tensor's bytes
        else:
            data = data[: len(data) // 2]
        path.write_bytes(bytes(data))
    with caplog.at_level(logging.WARNING, logger="distillrun"):
        again = prepare(cfg, tmp_path / "b")
    assert trainings[0] == 2  # trained anew
    assert_same(weights(first), weights(again))  # never the damaged weights
    assert any("not used" in r.getMessage() for r in caplog.records)
    assert checkpoint.model_complete(entry)  # the entry was replaced by a sound one
    prepare(cfg, tmp_path / "c")
    assert trainings[0] == 2  # which is reused


@pytest.mark.parametrize("change", ["teacher.lr=3e-3", "teacher.iterations=41", "net.width=24", "seed=1",
                                    "data.seed=1", "data.name=spiral", "teacher.parameterization=eps"])
def test_a_changed_key_misses(tmp_path, trainings, change):
    prepare(make_cfg(tmp_path), tmp_path / "a")
    prepare(make_cfg(tmp_path, change), tmp_path / "b")
    assert trainings[0] == 2
    assert len(entries(make_cfg(tmp_path))) == 2


def test_sampling_only_settings_share_the_teacher(tmp_path, trainings):
    prepare(make_cfg(tmp_path), tmp_path / "a")
    prepare(make_cfg(tmp_path, "teacher.steps=16", "teacher.sampler=heun", "method=consistency",
                     "stop.tolerance=0.5", "eval.samples=512"), tmp_path / "b")
    assert trainings[0] == 1


def test_opt_out_neither_reads_nor_writes(tmp_path, trainings):
    cfg = make_cfg(tmp_path, "compute.teacher_cache=false")
    prepare(cfg, tmp_path / "a")
    prepare(cfg, tmp_path / "b")
    assert trainings[0] == 2 and not (tmp_path / "cache").exists()


def test_key_follows_data_content_not_its_path(tmp_path):
    rng = np.random.default_rng(0)
    x = rng.normal(size=(512, 2)).astype(np.float32)
    np.save(tmp_path / "one.npy", x)
    np.save(tmp_path / "two.npy", x)
    y = x.copy()
    y[17, 1] += 1e-3
    np.save(tmp_path / "three.npy", y)
    keys = []
    for name in ("one", "two", "three"):
        cfg = make_cfg(tmp_path, "data=array", f"data.path={tmp_path / name}.npy")
        data = pipeline.load_data(cfg)
        net_arch = {"kind": "mlp", "data_shape": [2], "num_classes": 0, "kwargs": {"width": 16, "depth": 1}}
        keys.append(key_of(key_document(cfg, data, net_arch, torch.device("cpu"))))
    assert keys[0] == keys[1] != keys[2]


def test_default_location_is_outside_the_checkout(tmp_path, monkeypatch):
    from distillrun.teacher_cache import cache_root

    monkeypatch.delenv("DISTILLRUN_CACHE_DIR", raising=False)
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "xdg"))
    assert cache_root() == tmp_path / "xdg" / "distillrun"
    monkeypatch.setenv("DISTILLRUN_CACHE_DIR", str(tmp_path / "env"))
    assert cache_root() == tmp_path / "env"
    assert cache_root(str(tmp_path / "key")) == tmp_path / "key"
