"""Fault injection: every bad input is refused before training in one line (`distillrun: error: ...`) that names
the key or file and what would be valid, with exit code 2, and nothing written to the run folder or the store.

Outside references: numpy's .npy format (numpy.save / numpy.lib.format) and its allow_pickle=False refusal of
object arrays; the safetensors file format (8-byte header length, JSON header, raw bytes); Pillow for image
files; POSIX flock for the run-folder lock. Counts: see BAD_DATA, BAD_TEACHERS, BAD_RUN_FOLDERS and the rest.
"""
import functools
import io
import json
import pickle
import shutil
from contextlib import redirect_stderr
from pathlib import Path

import numpy as np
import pytest
import torch
from conftest import compose_run
from omegaconf import OmegaConf, open_dict
from safetensors.torch import save_file
from test_resume import SMALL, cli

from distillrun import cli as cli_module
from distillrun import pipeline
from distillrun.recorder import Recorder


GROUPS = ("data", "net", "teacher", "method", "stop", "tracking", "compute")


@functools.lru_cache(maxsize=None)
def _composed(groups: tuple[str, ...]):
    return compose_run(*SMALL, *groups)


def compose_cfg(tmp_path, *overrides):
    """Hydra composes the config groups (cached: composing costs ~0.3 s); key=value overrides are merged into
    the typed config, so a key that does not exist still fails as it would on the command line."""
    groups = tuple(o for o in overrides if o.split("=", 1)[0] in GROUPS)
    keys = [o for o in overrides if o not in groups and not o.startswith("+")]
    cfg = OmegaConf.merge(_composed(groups), OmegaConf.from_dotlist(
        [f"run_dir={tmp_path / 'run'}", f"tracking.uri=sqlite:///{tmp_path / 'store.db'}", *keys]))
    with open_dict(cfg):  # +key=value: a key added to a free-form mapping (teacher.factory_kwargs)
        return OmegaConf.merge(cfg, OmegaConf.from_dotlist([o[1:] for o in overrides if o.startswith("+")]))


def refused(tmp_path, *overrides, run_dir_existed=False) -> str:
    """Run cli.run_job in-process; assert exit 2, one prefixed stderr line, nothing written. Returns the line."""
    err = io.StringIO()
    with redirect_stderr(err), pytest.raises(SystemExit) as exit_:
        cli_module.run_job(compose_cfg(tmp_path, *overrides))
    lines = err.getvalue().strip().splitlines()
    assert exit_.value.code == 2 and len(lines) == 1 and lines[0].startswith("distillrun: error: "), lines
    assert not (tmp_path / "store.db").exists()  # refused before the tracking store was opened
    if not run_dir_existed:
        assert not (tmp_path / "run").exists()
    return lines[0]


def npy(tmp_path, x, name="data.npy", **save):
    path = tmp_path / name
    np.save(path, x, **save)
    return path


def npz(tmp_path, **arrays):
    path = tmp_path / "data.npz"
    np.savez(path, **arrays)
    return path


def truncated(tmp_path):
    path = npy(tmp_path, np.zeros((100, 2), np.float32))
    path.write_bytes(path.read_bytes()[:200])
    return path


def garbage(tmp_path, name="data.npy"):
    path = tmp_path / name
    path.write_bytes(b"\x00garbage, not an array" * 10)
    return path


def images(tmp_path, loose=2, classes=(), corrupt=False, same=False):
    from PIL import Image

    folder = tmp_path / "images"
    folder.mkdir()
    for i in range(loose):
        Image.fromarray(np.full((8, 8), 0 if same else 40 * i, np.uint8)).save(folder / f"{i}.png")
    for c in classes:
        (folder / c).mkdir()
        Image.fromarray(np.zeros((8, 8), np.uint8)).save(folder / c / "a.png")
    if corrupt:
        (folder / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n truncated")
    return folder


G = np.random.default_rng(0)
VEC = G.normal(size=(64, 2)).astype(np.float32)
IMG = G.uniform(-1, 1, size=(64, 1, 8, 8)).astype(np.float32)
ARRAY = ["data=array", "net=mlp"]
IMAGE_ARRAY = ["data=array", "net=unet"]
# (id, files maker -> path, extra overrides, what the line must say)
BAD_DATA = [
    ("nan", lambda t: npy(t, np.where(VEC > 2, np.nan, VEC)), ARRAY, "NaN or inf"),
    ("inf", lambda t: npy(t, np.where(VEC > 2, np.inf, VEC)), ARRAY, "NaN or inf"),
    ("one-dim", lambda t: npy(t, VEC[:, 0]), ARRAY, "valid: (N, d) vectors or (N, C, H, W)"),
    ("three-dim", lambda t: npy(t, IMG[:, 0]), ARRAY, "has shape (64, 8, 8)"),
    ("two-channels", lambda t: npy(t, np.repeat(IMG, 2, 1)), IMAGE_ARRAY, "C in {1, 3}"),
    ("bool", lambda t: npy(t, VEC > 0), ARRAY, "dtype 'bool' is not numeric"),
    ("strings", lambda t: npy(t, VEC.astype(str)), ARRAY, "is not numeric"),
    ("complex", lambda t: npy(t, VEC.astype(np.complex64)), ARRAY, "is not numeric"),
    ("objects", lambda t: npy(t, np.array([{"a": 1}, None], dtype=object), allow_pickle=True), ARRAY,
     "needs pickle, which is refused"),
    ("empty", lambda t: npy(t, np.zeros((0, 2), np.float32)), ARRAY, "array is empty"),
    ("image-range", lambda t: npy(t, IMG * 150 + 150), IMAGE_ARRAY, "outside [-1, 1]"),
    ("npz-key", lambda t: npz(t, x=VEC), ARRAY + ["data.key=nope"], "has no array 'nope'"),
    ("npz-float-labels", lambda t: npz(t, x=VEC, labels=np.zeros(64)), ARRAY, "'labels' has shape (64,) and dtype"),
    ("npz-negative-labels", lambda t: npz(t, x=VEC, labels=-np.ones(64, np.int64)), ARRAY, "negative"),
    ("npz-short-labels", lambda t: npz(t, x=VEC, labels=np.zeros(3, np.int64)), ARRAY, "valid: (64,) integers"),
    ("truncated", truncated, ARRAY, "data.npy"),
    ("garbage", garbage, ARRAY, "data.npy"),
    ("extension", lambda t: garbage(t, "data.csv"), ARRAY, "valid: .npy, .npz"),
    ("missing", lambda t: t / "nowhere.npy", ARRAY, "data.path"),
    ("folder-as-array", lambda t: t, ARRAY, "does not exist (or is not a file)"),
    ("vectors-for-unet", lambda t: npy(t, VEC), IMAGE_ARRAY, "net.kind=unet does not fit data of shape (2,)"),
    ("non-square", lambda t: npy(t, IMG[:, :, :, :6]), IMAGE_ARRAY, "cannot take data of shape (1, 8, 6)"),
    ("unet-too-deep", lambda t: npy(t, IMG[:, :, :6, :6]), IMAGE_ARRAY + ["net.mults=[1,2,2,2]"],
     "cannot take data of shape (1, 6, 6)"),
    ("single-sample", lambda t: npy(t, VEC[:1]), ARRAY, "1 of its 1 samples are one and the same point"),
    ("constant", lambda t: npy(t, np.ones((64, 2), np.float32)), ARRAY, "64 of its 64 samples are one and the same"),
    ("image-folder-same", lambda t: images(t, loose=3, same=True), ["data=image_folder", "net=unet"],
     "3 of its 3 samples are one and the same"),
    ("mostly-one-point", lambda t: npy(t, np.where(np.arange(64)[:, None] < 40, 0, VEC).astype(np.float32)), ARRAY,
     "40 of its 64 samples"),
    ("labels-missing", lambda t: npy(t, VEC), ARRAY + ["net.class_cond=true"], "has no labels"),
    ("image-folder-empty", lambda t: images(t, loose=0), ["data=image_folder", "net=unet"], "holds no images"),
    ("image-corrupt", lambda t: images(t, corrupt=True), ["data=image_folder", "net=unet"], "broken.png"),
    ("image-mixed", lambda t: images(t, classes=("cat",)), ["data=image_folder", "net=unet"], "mixes loose images"),
]


@pytest.mark.parametrize("make, extra, says", [c[1:] for c in BAD_DATA], ids=[c[0] for c in BAD_DATA])
def test_bad_data_is_refused_in_one_line(tmp_path, make, extra, says):
    line = refused(tmp_path, *extra, f"data.path={make(tmp_path)}")
    assert says in line


def test_good_user_arrays_pass_the_same_checks(tmp_path):
    # The checks above must not refuse good data: vectors, and images in [0, 255] with rescale.
    for extra, x, bound in [(ARRAY, VEC, 10), (IMAGE_ARRAY + ["data.rescale=true"], IMG * 127 + 128, 1)]:
        cfg = compose_cfg(tmp_path, *extra, f"data.path={npy(tmp_path, x)}")
        data = pipeline.preflight(cfg)
        assert data.x.shape == x.shape and float(data.x.abs().max()) <= bound


@pytest.mark.parametrize("data", ["archipelago", "tiles"])
def test_data_too_large_for_memory_is_refused(tmp_path, data):
    # 10^12 points: torch and numpy refuse the allocation at once (more bytes than any machine here has).
    line = refused(tmp_path, f"data={data}", "net=mlp" if data == "archipelago" else "net=unet", "data.n_train=1000000000000")
    assert "data.n_train=1000000000000" in line and "does not fit in memory" in line


TEACHER_MODULE = '''
import torch
from torch import nn

class Net(nn.Module):
    def __init__(self, dim=2, out=None):
        super().__init__()
        self.lin = nn.Linear(dim + 1, out or dim)

    def forward(self, x, t, cond=None):
        return self.lin(torch.cat([x, t[:, None]], 1))

def build(dim=2, out=None):
    return Net(dim, out)

def broken():
    raise RuntimeError("no weights for you")

def not_a_module():
    return 42
'''


@pytest.fixture
def teacher_files(tmp_path, monkeypatch):
    """A user teacher module (2D data) on sys.path, and weights files good and bad."""
    (tmp_path / "user_teacher.py").write_text(TEACHER_MODULE)
    (tmp_path / "user_syntax.py").write_text("def build(:\n")
    (tmp_path / "user_raises.py").write_text("raise RuntimeError('needs a GPU at import')\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    net = torch.nn.Linear(3, 2)
    good = {"lin.weight": net.weight.detach(), "lin.bias": net.bias.detach()}
    files = {"good": good, "missing-key": {"lin.weight": good["lin.weight"]},
             "wrong-shape": {"lin.weight": torch.zeros(2, 4), "lin.bias": good["lin.bias"]},
             "nan": {"lin.weight": good["lin.weight"] * np.nan, "lin.bias": good["lin.bias"]},
             "out3": {"lin.weight": torch.zeros(3, 3), "lin.bias": torch.zeros(3)}}
    for name, state in files.items():
        save_file({k: v.contiguous() for k, v in state.items()}, tmp_path / f"{name}.safetensors")
    (tmp_path / "pickled.safetensors").write_bytes(pickle.dumps(good))  # written here, never loaded by anyone
    (tmp_path / "cut.safetensors").write_bytes((tmp_path / "good.safetensors").read_bytes()[:-7])
    return tmp_path


# (id, factory, weights file, extra overrides, what the line must say)
BAD_TEACHERS = [
    ("no-module", "no_such_module_xyz:build", "good", [], "cannot import (ModuleNotFoundError"),
    ("syntax-error", "user_syntax:build", "good", [], "cannot import (SyntaxError"),
    ("raises-on-import", "user_raises:build", "good", [], "needs a GPU at import"),
    ("no-function", "user_teacher:nope", "good", [], "cannot import (AttributeError"),
    ("factory-raises", "user_teacher:broken", "good", [], "calling it failed (RuntimeError: no weights for you)"),
    ("not-a-module", "user_teacher:not_a_module", "good", [], "returned int, expected a torch.nn.Module"),
    ("pickle-not-safetensors", "user_teacher:build", "pickled", [], "not a readable safetensors file"),
    ("truncated-weights", "user_teacher:build", "cut", [], "not a readable safetensors file"),
    ("missing-key", "user_teacher:build", "missing-key", [], "does not match the module"),
    ("wrong-shape", "user_teacher:build", "wrong-shape", [], "size mismatch for lin.weight"),
    ("nan-weights", "user_teacher:build", "nan", [], "holds NaN or inf values"),
    ("wrong-output", "user_teacher:build", "out3", ["+teacher.factory_kwargs.out=3"], "output shape (2, 3)"),
    ("no-weights-file", "user_teacher:build", "absent", [], "teacher.weights"),
]


@pytest.mark.parametrize("factory, weights, extra, says", [c[1:] for c in BAD_TEACHERS],
                         ids=[c[0] for c in BAD_TEACHERS])
def test_bad_teacher_is_refused_in_one_line(teacher_files, factory, weights, extra, says):
    line = refused(teacher_files, "teacher=import", f"teacher.factory={factory}",
                   f"teacher.weights={teacher_files / f'{weights}.safetensors'}", *extra)
    assert says in line and ("teacher.factory" in line or "teacher.weights" in line)


def test_good_user_teacher_passes_the_same_checks(teacher_files):
    cfg = compose_cfg(teacher_files, "teacher=import", "teacher.factory=user_teacher:build",
                      f"teacher.weights={teacher_files / 'good.safetensors'}")
    assert pipeline.preflight(cfg).shape == (2,)


BAD_TRACKING = [
    ("server-down", "tracking.uri=http://127.0.0.1:9", "does not answer"),  # port 9 (discard): nothing listens
    ("store-under-a-file", "tracking.uri=sqlite:///{tmp}/afile/store.db", "is not writable"),
]


@pytest.mark.parametrize("override, says", [c[1:] for c in BAD_TRACKING], ids=[c[0] for c in BAD_TRACKING])
def test_unusable_tracking_store_fails_before_training(tmp_path, override, says):
    (tmp_path / "afile").write_text("a file, not a folder")
    line = refused(tmp_path, override.format(tmp=tmp_path))
    assert says in line and "tracking" in line


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """A finished tiny run folder (tracking off), copied by each test that damages it."""
    tmp = tmp_path_factory.mktemp("finished")
    err = io.StringIO()
    with redirect_stderr(err), pytest.raises(SystemExit) as exit_:
        cli_module.run_job(compose_cfg(tmp, "tracking.enabled=false"))
        raise SystemExit(0)
    assert exit_.value.code == 0, err.getvalue()
    return tmp / "run"


def cut(path: Path, keep: float = 0.5):
    path.write_bytes(path.read_bytes()[:int(len(path.read_bytes()) * keep)])


def flip(path: Path):
    data = bytearray(path.read_bytes())
    data[-3] ^= 0xFF
    path.write_bytes(bytes(data))


def edit_json(path: Path, **changes):
    path.write_text(json.dumps({**json.loads(path.read_text()), **changes}))


def state_file(run: Path):
    """Put a mid-run state back into stage 3 (as a kill during its evaluation would leave) and damage it."""
    from distillrun import checkpoint
    checkpoint.save_state(run / "stage-03/partial.safetensors", {"x": torch.zeros(3)}, {"iteration": 10})
    (run / "stage-03/metrics.json").unlink()
    flip(run / "stage-03/partial.safetensors")


# (id, damage(run folder), extra overrides, what the line must say)
BAD_RUN_FOLDERS = [
    ("other-config", lambda r: None, ["method.lr=0.1"],
     "made by a different config (changed: method.lr (0.0003 -> 0.1))"),
    ("config-unreadable", lambda r: (r / "config.yaml").write_text("a: [unclosed"), [], "config.yaml: unreadable"),
    ("stage-weights-truncated", lambda r: cut(r / "stage-02/weights.safetensors"), [], "sha256 mismatch"),
    ("stage-weights-flipped", lambda r: flip(r / "stage-02/weights.safetensors"), [], "stage-02/weights.safetensors"),
    ("metrics-half-written", lambda r: cut(r / "stage-01/metrics.json"), [], "metrics.json: not valid JSON"),
    ("metrics-field-missing", lambda r: edit_json(r / "stage-01/metrics.json", failed=3), [],
     "field 'failed' is int"),
    ("metrics-wrong-stage", lambda r: shutil.copy(r / "stage-01/metrics.json", r / "stage-02/metrics.json"), [],
     "is for stage 1 at 4 steps, not stage 2 at 2"),
    ("model-json-half-written", lambda r: cut(r / "stage-01/model.json"), [], "model.json: not valid JSON"),
    ("teacher-weights-truncated", lambda r: cut(r / "teacher/weights.safetensors", 0.9), [], "teacher/weights"),
    ("teacher-weights-other-net", lambda r: edit_json(r / "teacher/model.json", sha256="0"), [], "sha256 mismatch"),
    ("reference-half-written", lambda r: cut(r / "reference.json"), [], "reference.json: not valid JSON"),
    ("reference-other-steps", lambda r: edit_json(r / "reference.json", steps=4), [], "made for teacher.steps=4"),
    ("state-corrupted", state_file, [], "partial.safetensors"),
]


@pytest.mark.parametrize("damage, extra, says", [c[1:] for c in BAD_RUN_FOLDERS], ids=[c[0] for c in BAD_RUN_FOLDERS])
def test_damaged_or_foreign_run_folder_is_refused_in_one_line(finished, tmp_path, damage, extra, says):
    run = tmp_path / "run"
    shutil.copytree(finished, run)
    damage(run)
    line = refused(tmp_path, "tracking.enabled=false", *extra, run_dir_existed=True)
    assert says in line


@pytest.mark.parametrize("make, says", [
    (lambda r: (r.mkdir(), (r / "notes.txt").write_text("mine")), "holds other files (notes.txt) and no config.yaml"),
    (lambda r: r.write_text("a file"), "is a file"),
], ids=["not-a-run-folder", "run-dir-is-a-file"])
def test_run_dir_that_is_not_a_run_folder_is_refused_even_with_fresh(tmp_path, make, says):
    make(tmp_path / "run")
    assert says in refused(tmp_path, "tracking.enabled=false", "fresh=true", run_dir_existed=True)
    assert (tmp_path / "run").exists() and not (tmp_path / "run" / "config.yaml").exists()  # untouched


def test_fresh_true_starts_a_foreign_folder_over(finished, tmp_path):
    from distillrun import runfolder
    run = tmp_path / "run"
    shutil.copytree(finished, run)
    cfg = compose_cfg(tmp_path, "tracking.enabled=false", "method.lr=0.1", "fresh=true")
    try:
        runfolder.open_run_dir(cfg)
    finally:
        runfolder.unlock(run)
    assert sorted(p.name for p in run.iterdir()) == [".lock", "config.yaml"]
    assert "lr: 0.1" in (run / "config.yaml").read_text()


def test_folder_in_use_by_another_process_is_refused(finished, tmp_path):
    import fcntl
    import os
    run = tmp_path / "run"
    shutil.copytree(finished, run)
    fd = os.open(run / ".lock", os.O_RDWR)  # another open file description: flock conflicts with it
    fcntl.flock(fd, fcntl.LOCK_EX)
    try:
        assert "being written by another distillrun process" in refused(tmp_path, "tracking.enabled=false",
                                                                         run_dir_existed=True)
    finally:
        os.close(fd)


def test_damaged_tracking_ids_are_refused_in_one_line(finished, tmp_path):
    from types import SimpleNamespace

    from distillrun.checkpoint import CheckpointError
    run = tmp_path / "run"
    shutil.copytree(finished, run)
    (run / "tracking.json").write_text('{"pipeline": "abc", "stag')
    rec = Recorder(compose_cfg(tmp_path), SimpleNamespace(enabled=True))
    with pytest.raises(CheckpointError, match="tracking.json: not valid JSON"):
        rec._load_ids(run)


# The real CLI, in a subprocess, for the three kinds of refusal (its exit code and stderr are the contract).
@pytest.mark.parametrize("kind", ["data", "config", "run-folder"])
def test_cli_refuses_in_one_line_with_exit_2(finished, tmp_path, kind):
    args = {"data": ["data=array", f"data.path={npy(tmp_path, np.where(VEC > 2, np.nan, VEC))}",
                     f"run_dir={tmp_path / 'new'}"],
            "config": ["method.lr=1e-3,1e-4", f"run_dir={tmp_path / 'new'}"],  # a sweep without --multirun
            "run-folder": ["method.lr=0.1", f"run_dir={finished}"]}[kind]
    p = cli([*SMALL, "tracking.enabled=false", *args], tmp_path)
    lines = p.stderr.strip().splitlines()
    assert p.returncode == 2 and len(lines) == 1 and lines[0].startswith("distillrun: error: "), p.stderr
    assert "Traceback" not in p.stdout + p.stderr
    assert not (tmp_path / "new" / "config.yaml").exists()


def test_package_never_unpickles():
    # Python's pickle documentation: unpickling untrusted data can run arbitrary code. So the package reads
    # tensors with safetensors only, numpy arrays with allow_pickle=False, and YAML through OmegaConf.
    import re

    import distillrun
    unsafe = re.compile(r"torch\.lo" + r"ad\(|pickle\.loads?\(|allow_pickle=True|yaml\.(unsafe_)?load\(|"
                        r"np\.load\((?![^)]*allow_pickle=False)")
    hits = [f"{p.name}:{i}" for p in Path(distillrun.__file__).parent.rglob("*.py")
            for i, line in enumerate(p.read_text().splitlines(), 1) if unsafe.search(line)]
    assert hits == []
