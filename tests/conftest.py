"""Shared test setup: the teacher cache never lands in the user's ~/.cache or in the checkout.

At import (before test modules capture os.environ for their subprocesses) DISTILLRUN_CACHE_DIR points at a
fresh temporary folder for the session; each test then gets its own empty cache folder, so no test reuses a
teacher that another test trained."""
import os
import tempfile

import pytest

os.environ["DISTILLRUN_CACHE_DIR"] = tempfile.mkdtemp(prefix="distillrun-test-cache-")


@pytest.fixture(autouse=True)
def _own_teacher_cache(tmp_path_factory, monkeypatch):
    monkeypatch.setenv("DISTILLRUN_CACHE_DIR", str(tmp_path_factory.mktemp("teacher-cache")))
