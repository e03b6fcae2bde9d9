"""The verbs beside the run command: `recipes`, `draw`, `compare`.

Outside references: a drawn progressive student is compared with a network rebuilt here by hand from the
stage's safetensors file (safetensors' own loader) and sampled with samplers.sample (DDIM, Song et al. 2021);
a default draw is scored again and must give the quality numbers the pipeline wrote to metrics.json; PNGs are
read back with matplotlib's reader; the console script's exit code is checked in a real subprocess.
"""
import json
import shutil
import subprocess
import sys

import matplotlib.image as mpimg
import numpy as np
import pytest
import torch
from conftest import TINY as TINY_SIZES, compose_run
from omegaconf import OmegaConf
from safetensors.torch import load_file

from distillrun import cli, evaluate, pipeline, verbs
from distillrun.denoiser import NetDenoiser
from distillrun.nets.mlp import TimeMLP
from distillrun.samplers import sample, uniform_grid
from distillrun.schedule import Schedule

TINY = ["teacher.iterations=60", "method.iterations=10", "teacher.steps=8", "tracking=off", *TINY_SIZES,
        "stop.tolerance=100"]  # a loose tolerance: every stage is within, so there is a chosen student


def make_run(folder, *extra):
    cfg = compose_run(*TINY, *extra, f"run_dir={folder}")
    assert cli.run_job(cfg) == 0
    return folder


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    torch.set_num_threads(1)
    base = tmp_path_factory.mktemp("verbs")
    return {"progressive": make_run(base / "prog"),
            "consistency": make_run(base / "cons", "method=consistency", "method.steps=[2,1]")}


def draw(*argv):
    assert verbs.main("draw", [str(a) for a in argv]) == 0


# ----------------------------------------------------------------------------------------------- recipes
def test_recipes_lists_every_recipe_with_time_and_command(capsys):
    assert verbs.main("recipes", []) == 0
    out = capsys.readouterr().out
    for name in verbs.recipe_names():
        assert f"\n{name}: " in out
        assert f"recipe={name}" in out
    assert out.count("CPU time: ") == len(verbs.recipe_names()) >= 8


def test_recipes_name_prints_the_yaml(capsys):
    assert verbs.main("recipes", ["own_data"]) == 0
    assert "override /data: array" in capsys.readouterr().out


def test_recipe_header_joins_continuation_lines(tmp_path):
    path = tmp_path / "r.yaml"
    path.write_text("# @package _global_\n# Purpose: one\n#   two.\n# Note: not a field\n#   ignored\n"
                    "# Command: a \\\n#          b\n# CPU time: 1 min (estimate)\nseed: 1\n# Purpose: not header\n")
    assert verbs.recipe_header(path) == {"Purpose": "one two.", "Command": ["a \\", "b"], "CPU time": "1 min (estimate)"}


# -------------------------------------------------------------------------------------------------- draw
def test_draw_writes_npy_and_png_deterministically(runs, tmp_path):
    run = runs["progressive"]
    draw(run, "--count", 50, "--seed", 3, "--out", tmp_path / "a.npy")
    draw(run, "--count", 50, "--seed", 3, "--out", tmp_path / "b.npy")
    draw(run, "--count", 50, "--seed", 4, "--out", tmp_path / "c.npy")
    a, b, c = (np.load(tmp_path / f"{n}.npy") for n in "abc")
    assert a.shape == (50, 2) and np.array_equal(a, b) and not np.allclose(a, c)
    assert mpimg.imread(tmp_path / "a.png").ndim == 3


def test_draw_defaults_to_the_chosen_student(runs):
    run = runs["consistency"]
    chosen = json.loads((run / "summary.json").read_text())["chosen"]["index"]
    draw(run, "--count", 20, "--seed", 1)
    assert np.load(run / "drawn" / f"stage-{chosen:02d}_seed-1_n-20.npy").shape == (20, 2)
    assert (run / "drawn" / f"stage-{chosen:02d}_seed-1_n-20.png").exists()


def test_draw_into_an_existing_folder_uses_the_default_name(runs, tmp_path):
    draw(runs["progressive"], "--stage", 2, "--count", 5, "--seed", 7, "--out", tmp_path)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["stage-02_seed-7_n-5.npy", "stage-02_seed-7_n-5.png"]


@pytest.mark.parametrize("stage", [1, 3])
def test_progressive_draw_equals_ddim_of_a_hand_rebuilt_network(runs, tmp_path, stage):
    folder = runs["progressive"] / f"stage-{stage:02d}"
    meta = json.loads((folder / "model.json").read_text())
    net = TimeMLP(dim=2, **meta["net"]["kwargs"])
    net.load_state_dict({k.removeprefix("net."): v for k, v in load_file(str(folder / "weights.safetensors")).items()})
    student = NetDenoiser(net, meta["parameterization"], Schedule(meta["schedule"]))
    noise = torch.randn((64, 2), generator=torch.Generator().manual_seed(11))
    expected = sample(student, noise, uniform_grid(meta["steps"]), "ddim")
    draw(runs["progressive"], "--stage", stage, "--count", 64, "--seed", 11, "--out", tmp_path / "x.npy")
    torch.testing.assert_close(torch.from_numpy(np.load(tmp_path / "x.npy")), expected, rtol=0, atol=1e-6)


def test_draw_stage_0_is_the_teacher_at_full_steps_as_a_hand_rebuilt_network(runs, tmp_path):
    # The teacher from teacher/weights.safetensors, rebuilt by hand and sampled with samplers.sample (DDIM, Song et
    # al. 2021) at teacher.steps on the same noise.
    run = runs["progressive"]
    cfg = OmegaConf.load(run / "config.yaml")
    meta = json.loads((run / "teacher" / "model.json").read_text())
    net = TimeMLP(dim=2, **meta["net"]["kwargs"])
    net.load_state_dict({k.removeprefix("net."): v for k, v in load_file(str(run / "teacher" / "weights.safetensors")).items()})
    teacher = NetDenoiser(net, meta["parameterization"], Schedule(meta["schedule"]))
    noise = torch.randn((64, 2), generator=torch.Generator().manual_seed(5))
    expected = sample(teacher, noise, uniform_grid(cfg.teacher.steps), cfg.teacher.sampler)
    draw(run, "--stage", 0, "--count", 64, "--seed", 5, "--out", tmp_path / "t.npy")
    torch.testing.assert_close(torch.from_numpy(np.load(tmp_path / "t.npy")), expected, rtol=0, atol=1e-6)
    assert (tmp_path / "t.png").exists()


def test_draw_beside_teacher_puts_a_second_panel_in_the_picture(runs, tmp_path):
    # Two panels side by side: the picture is about twice as wide as the single one (matplotlib's PNG reader).
    run = runs["progressive"]
    draw(run, "--stage", 2, "--count", 64, "--seed", 5, "--out", tmp_path / "one.npy")
    draw(run, "--stage", 2, "--count", 64, "--seed", 5, "--beside-teacher", "--out", tmp_path / "two.npy")
    one, two = mpimg.imread(tmp_path / "one.png"), mpimg.imread(tmp_path / "two.png")
    assert 1.7 < two.shape[1] / one.shape[1] < 2.3
    assert np.array_equal(np.load(tmp_path / "one.npy"), np.load(tmp_path / "two.npy"))  # the stage's samples alone


@pytest.mark.parametrize("method", ["progressive", "consistency"])
def test_default_draw_repeats_the_samples_the_stage_was_scored_on(runs, method, tmp_path):
    run = runs[method]
    cfg = OmegaConf.load(run / "config.yaml")
    draw(run, "--stage", 1, "--out", tmp_path / "x.npy")  # default count and seed: the run's noise bank
    bench = evaluate.make_bench(pipeline.load_data(cfg), cfg.eval.samples, cfg.eval.projections, cfg.eval.bootstrap,
                                cfg.eval.seed, cond_needed=False)
    again = evaluate.quality(bench, torch.from_numpy(np.load(tmp_path / "x.npy")))
    scored = json.loads((run / "stage-01" / "metrics.json").read_text())["metrics"]
    for name in ("sw2", "mmd2", "nll_gap", "precision", "coverage", "c2st", "mmd2_div16"):
        assert again[name] == pytest.approx(scored[f"quality/{name}"], rel=1e-9, abs=1e-12)


# ----------------------------------------------------------------------------------------------- compare
def test_compare_prints_a_row_per_stage_and_writes_plots(runs, tmp_path, capsys):
    assert verbs.main("compare", [str(runs["progressive"]), str(runs["consistency"]), "--out", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    # the default metric: the first run's stop metric (the metric that decided its last judged stage)
    metric = json.loads((runs["progressive"] / "summary.json").read_text())["stop_metric"]
    assert f"{metric} ± se" in out
    for label, run in (("prog", runs["progressive"]), ("cons", runs["consistency"])):
        summary = json.loads((run / "summary.json").read_text())
        rows = [line.split() for line in out.splitlines() if line.startswith(label + " ")]
        assert [r[2] for r in rows] == ["teacher"] + [str(s["index"]) for s in summary["stages"]]
        for row, s in zip(rows[1:], summary["stages"]):
            assert row[3] == str(s["steps"]) and row[4] == format(s["metrics"][f"quality/{metric}"], ".4g")
    for name in ("compare_quality.png", "compare_divergence.png", "compare_samples.png"):
        assert mpimg.imread(tmp_path / name).shape[0] > 100


def test_compare_one_run_writes_into_it_with_the_chosen_metric(runs, capsys):
    run = runs["progressive"]
    assert verbs.main("compare", [str(run), "--metric", "mmd2"]) == 0
    assert "mmd2 ± se" in capsys.readouterr().out
    assert (run / "compare_samples.png").exists()


# -------------------------------------------------------------------------------------------- bad input
def broken_copy(run, tmp_path, edit):
    copy = tmp_path / "copy"
    shutil.copytree(run, copy)
    edit(copy)
    return copy


def set_json(path, **fields):
    path.write_text(json.dumps({**json.loads(path.read_text()), **fields}))


BAD = [  # (verb, argv builder, words the one-line error must contain)
    ("draw", lambda r, t: [t / "missing"], "no such folder"),
    ("draw", lambda r, t: [t], "not a run folder"),
    ("draw", lambda r, t: [r, "--stage", "9"], "--stage 9"),
    ("draw", lambda r, t: [r, "--count", "0"], "--count 0"),
    ("draw", lambda r, t: [r, "--seed", "x"], "invalid int value"),
    ("draw", lambda r, t: [r, "--out", t / "x.txt"], "--out"),
    ("draw", lambda r, t: [r, "--bogus"], "unrecognized arguments"),
    ("draw", lambda r, t: [broken_copy(r, t, lambda c: set_json(c / "summary.json", chosen=None))],
     "no chosen student"),
    ("draw", lambda r, t: [broken_copy(r, t, lambda c: set_json(c / "stage-02" / "metrics.json", failed="NaN loss")),
                           "--stage", "2"], "failed"),
    ("draw", lambda r, t: [broken_copy(r, t, lambda c: (c / "stage-01" / "weights.safetensors").write_bytes(b"xx")),
                           "--stage", "1"], "sha256"),
    ("compare", lambda r, t: [r, "--metric", "fd"], "--metric fd"),
    ("compare", lambda r, t: [broken_copy(r, t, lambda c: (c / "summary.json").unlink())], "no summary.json"),
    ("recipes", lambda r, t: ["nope"], "not found"),
]


@pytest.mark.parametrize("verb,argv,words", BAD)
def test_bad_input_is_one_line_exit_2_and_writes_nothing(runs, tmp_path, capsys, verb, argv, words):
    args = [str(a) for a in argv(runs["progressive"], tmp_path)]
    before = sorted(p for p in tmp_path.rglob("*"))
    assert verbs.main(verb, args) == 2
    captured = capsys.readouterr()
    assert captured.out == "" and captured.err.count("\n") == 1 and words in captured.err
    assert sorted(p for p in tmp_path.rglob("*")) == before


def test_console_script_exit_code(tmp_path):
    done = subprocess.run([sys.executable, "-c", "from distillrun.cli import main; main()", "draw",
                           str(tmp_path / "missing")], capture_output=True, text=True)
    assert done.returncode == 2 and done.stderr.count("\n") == 1 and "no such folder" in done.stderr


# ---------------------------------------------------------------------------------------- sample pictures
def test_scatter_limits_fit_data_and_samples_and_count_what_falls_outside():
    # Axes from the pooled 0.2%..99.8% quantiles (torch.quantile) widened by 8% of the span: a component far from
    # [-3, 3] is inside, a single wild sample is outside and counted.
    from distillrun import report

    g = torch.Generator().manual_seed(0)
    data = torch.randn(1000, 2, generator=g)
    far = torch.randn(1000, 2, generator=g) * 0.1 + torch.tensor([8.0, -6.0])  # a component off the old fixed axes
    samples = torch.cat([far, torch.tensor([[1e4, 1e4]])])
    xlim, ylim = report.scatter_limits(data, samples)
    assert xlim[0] < -2.5 and xlim[1] > 8.0 and ylim[0] < -6.0 and ylim[1] > 2.5
    assert report.outside(samples, xlim, ylim) == 1
    assert report.outside(far, xlim, ylim) == 0
