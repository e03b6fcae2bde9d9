"""Property: every set of config overrides either plans a valid run (dry_run=true) or is refused with one line
(`distillrun: error: ...`) and exit code 2, never a traceback.

Outside reference: hypothesis (property-based testing) generates the override sets; Hydra's own override
grammar and OmegaConf's typed configs decide what parses. The in-process test runs the CLI's pre-check
(compose + validate, what runs before Hydra starts a job) on many sets; the subprocess test runs the real
CLI with dry_run=true (which also loads the data and checks the run folder and store) on a few.
"""
import dataclasses
import io
import os
import subprocess
import sys
import tempfile
from contextlib import redirect_stderr

import pytest
from hydra import compose, initialize_config_module
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from distillrun import cli, config, pipeline
from distillrun.methods.consistency import ConsistencyConfig
from distillrun.methods.progressive import ProgressiveConfig

GROUP_OPTIONS = {
    "data": ["archipelago", "spiral", "rings", "digits", "tiles", "array", "image_folder", "nope"],
    "net": ["mlp", "unet", "nope"], "teacher": ["train", "oracle", "import"], "method": ["progressive", "consistency"],
    "stop": ["relative", "absolute"], "tracking": ["local", "off"], "compute": ["cpu", "gpu"],
}
NODES = {"data": config.DataConfig, "net": config.NetConfig, "teacher": config.TeacherConfig,
         "method": ConsistencyConfig, "eval": config.EvalConfig, "stop": config.StopConfig,
         "tracking": config.TrackingConfig, "compute": config.ComputeConfig}
NAMES = ["archipelago", "digits", "mlp", "unet", "cosine", "linear", "v", "eps", "x0", "ddim", "ancestral", "heun",
         "euler", "snr_trunc", "l2", "pseudo_huber", "inverse_gap", "uniform", "sw2", "mmd2", "fd", "nll_gap",
         "relative", "absolute", "cpu", "cuda", "auto", "bf16", "fp32", "train", "oracle", "import", "progressive",
         "consistency", "x:y", "/nonexistent/file.npy", "/etc", "${teacher.lr}", "${nope}", "'a,b'", "a b", "é"]


def keys() -> list[tuple[str, type]]:
    """Every key of the schema with its annotated type, plus ProgressiveConfig's own keys."""
    out = [(f"{group}.{f.name}", f.type) for group, node in NODES.items() for f in dataclasses.fields(node)]
    out += [(f"method.{f.name}", f.type) for f in dataclasses.fields(ProgressiveConfig)]
    out += [(f.name, f.type) for f in dataclasses.fields(config.RunConfig) if f.name not in NODES
            and f.name not in ("run_dir", "dry_run")]
    return sorted(set(out))


def number_text(x: float) -> str:
    return {float("inf"): "inf", float("-inf"): "-inf"}.get(x, "nan" if x != x else repr(x))


INTS = st.one_of(st.integers(-3, 40), st.sampled_from([64, 256, 1000, 2**20, 10**12])).map(str)
FLOATS = st.one_of(st.floats(allow_nan=True, allow_infinity=True).map(number_text),
                   st.sampled_from(["0", "1e-9", "0.5", "0.999", "1", "80", "-1"]))
LISTS = st.lists(st.integers(-1, 20), max_size=4).map(lambda xs: "[" + ",".join(map(str, xs)) + "]")
ANY = st.one_of(INTS, FLOATS, LISTS, st.sampled_from(NAMES + ["true", "false", "null"]))


def value_for(kind: str) -> st.SearchStrategy:
    kind = str(kind)
    typed = INTS if "int" in kind and "list" not in kind else FLOATS if "float" in kind else \
        LISTS if "list" in kind else st.sampled_from(["true", "false"]) if "bool" in kind else \
        st.sampled_from(NAMES + ["null"])
    return st.one_of(typed, typed, typed, ANY)  # mostly the right type, sometimes anything


@st.composite
def override_sets(draw) -> list[str]:
    """0-6 overrides: group choices, typed keys with good and bad values, unknown or added keys, deletions."""
    schema = keys()
    picks = []
    for _ in range(draw(st.integers(0, 6))):
        kind = draw(st.sampled_from(["group", "key", "key", "key", "odd"]))
        if kind == "group":
            group = draw(st.sampled_from(sorted(GROUP_OPTIONS)))
            picks.append(f"{group}={draw(st.sampled_from(GROUP_OPTIONS[group]))}")
        elif kind == "key":
            key, typ = draw(st.sampled_from(schema))
            picks.append(f"{key}={draw(value_for(typ))}")
        else:
            picks.append(draw(st.sampled_from(["+foo=1", "+method.foo=2", "method.bogus=3", "~data", "~method.lr",
                                               "+teacher.factory_kwargs.width=4", "++method.lr=0.001", "seed=1,2",
                                               "data.name=", "=5", "eval.samples=[1", "teacher.steps=${method.lr}"])))
    return picks


def precheck(overrides: list[str]) -> str | None:
    """None when the CLI's pre-check accepts the overrides, else the one stderr line it printed (exit code 2)."""
    err = io.StringIO()
    try:
        with redirect_stderr(err):
            cli.precheck(overrides)
    except SystemExit as e:
        lines = err.getvalue().strip().splitlines()
        assert e.code == 2 and len(lines) == 1 and lines[0].startswith("distillrun: error: "), (overrides, lines)
        return lines[0]
    assert err.getvalue() == ""
    return None


def plans(overrides: list[str]) -> str:
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        cfg = compose("run", overrides=overrides)
    config.validate(cfg)
    stages = pipeline.plan_stages(cfg)
    assert stages and all(s.steps >= 1 and s.iterations >= 1 for s in stages)
    return pipeline.describe_plan(cfg, stages)


FUZZ = settings(max_examples=int(os.environ.get("DISTILLRUN_FUZZ_EXAMPLES", 30)), deadline=None, database=None,
                suppress_health_check=[HealthCheck.too_slow])


@FUZZ
@given(override_sets())
def test_overrides_plan_or_are_refused_in_one_line(overrides):
    config.register_configs()
    if precheck(overrides) is None:
        assert plans(overrides).startswith("method ")


def run_cli_dry(overrides: list[str]) -> subprocess.CompletedProcess:
    folder = tempfile.mkdtemp(prefix="distillrun-fuzz-")
    env = {**os.environ, "OMP_NUM_THREADS": "1", "MLFLOW_DISABLE_TELEMETRY": "true"}
    return subprocess.run([sys.executable, "-m", "distillrun.cli", *overrides, "dry_run=true",
                           f"run_dir={folder}/run"], cwd=folder, env=env, capture_output=True, text=True)


def assert_planned_or_refused(overrides, p: subprocess.CompletedProcess) -> None:
    assert "Traceback" not in p.stdout + p.stderr, (overrides, p.stderr[-3000:])
    if p.returncode == 0:
        assert p.stdout.startswith("method "), (overrides, p.stdout)
    else:
        lines = p.stderr.strip().splitlines()
        assert p.returncode == 2 and len(lines) == 1, (overrides, p.returncode, p.stderr)
        assert lines[0].startswith("distillrun: error: "), (overrides, p.stderr)


@settings(max_examples=3, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow])
@given(override_sets())
def test_real_cli_dry_run_plans_or_refuses_in_one_line(overrides):
    assert_planned_or_refused(overrides, run_cli_dry(overrides))


@pytest.mark.slow
@settings(max_examples=25, deadline=None, database=None, suppress_health_check=[HealthCheck.too_slow])
@given(override_sets())
def test_real_cli_dry_run_many(overrides):
    assert_planned_or_refused(overrides, run_cli_dry(overrides))
