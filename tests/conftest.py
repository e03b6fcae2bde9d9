"""Shared pieces of the test suite: the tiny sizes every end-to-end test starts from, and composing a run config
the way the command line does (Hydra's compose API on the package's registered config groups)."""
import os
import tempfile

import pytest
from hydra import compose, initialize_config_module

from distillrun.config import register_configs

os.environ.setdefault("MLFLOW_DISABLE_TELEMETRY", "true")
# The teacher cache never lands in the user's ~/.cache or in the checkout: at import (before test modules capture
# os.environ for their subprocesses) it points at a fresh temporary folder; each test then gets its own empty one,
# so no test reuses a teacher that another test trained.
os.environ["DISTILLRUN_CACHE_DIR"] = tempfile.mkdtemp(prefix="distillrun-test-cache-")

# Small enough that a whole pipeline runs in seconds on one thread; each test file adds the iteration counts,
# step counts and tolerance it needs (those decide what its assertions can rely on).
TINY = ["eval.samples=256", "eval.bootstrap=5", "eval.projections=16", "compute.threads=1", "quiet=true",
        "data.n_train=4096", "net.width=32", "net.depth=2"]


def compose_run(*overrides, config: str = "run", **kwargs):
    """The run config composed from the package's config groups with these command-line style overrides
    (no TINY added: callers say which sizes they use). kwargs go to hydra.compose."""
    register_configs()
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        return compose(config, overrides=list(overrides), **kwargs)


@pytest.fixture(scope="session")
def compose_cfg():
    """compose_run as a fixture, for tests and fixtures of any scope."""
    return compose_run


@pytest.fixture(autouse=True)
def _own_teacher_cache(tmp_path_factory, monkeypatch):
    monkeypatch.setenv("DISTILLRUN_CACHE_DIR", str(tmp_path_factory.mktemp("teacher-cache")))
