"""Guided distillation (distillrun.methods.guided): the stage-one target, w handed per example through progressive
halving, the per-w evaluation and the stop rule over the w grid. References: the definition of classifier-free
guidance (Meng et al. 2023, Eq. 2, w = 0 the conditional model), the exact mixture posterior for label fidelity,
and Salimans & Ho 2022, Alg. 2 for the halving target."""
from __future__ import annotations

import math

import pytest
import torch

from distillrun import evaluate, stopping
from distillrun.data import Dataset
from distillrun.data.mixture import archipelago
from distillrun.denoiser import GuidanceCond, NetDenoiser, split_cond
from distillrun.guidance import Guided, WithWeight
from distillrun.methods import guided as G
from distillrun.methods import progressive
from distillrun.methods.teacher import oracle_fit_loss
from distillrun.nets import build_net
from distillrun.nets.oracle import OracleDenoiser
from distillrun.schedule import Schedule
from distillrun.training import LoopSpec, train_loop

torch.set_num_threads(1)
K = 6


def _data(n=4096):
    mix = archipelago()
    x, labels = mix.sample(n, torch.Generator().manual_seed(0))
    return Dataset("archipelago", x, labels, mix)


class VNet(torch.nn.Module):
    """A 'network' whose v-output is that of a fixed Denoiser (x0/eps -> v), recording the cond it is given."""

    def __init__(self, den, schedule):
        super().__init__()
        self.den, self.schedule, self.seen = den, schedule, []
        self.p = torch.nn.Parameter(torch.zeros(()))

    def forward(self, x_t, t, cond=None):
        self.seen.append(cond)
        x0, eps = self.den.predict(x_t, t, cond)
        a, s = self.schedule.alpha_sigma(t.double())
        a, s = a[:, None].to(x_t.dtype), s[:, None].to(x_t.dtype)
        return (a * eps - s * x0) + 0 * self.p


class GuidedStudentOracle:
    """The exact guided teacher read as a w-conditioned student: predict(x, t, GuidanceCond(labels, w))."""

    def __init__(self, oracle):
        self.oracle, self.schedule = oracle, oracle.schedule

    def predict(self, x_t, t, cond=None):
        return Guided(self.oracle, K).predict(x_t, t, cond)


def test_guidance_fit_target_is_the_guided_teacher_at_each_rows_w():
    sch = Schedule("cosine")
    oracle = OracleDenoiser(archipelago(), sch, labelled=True)
    data = _data()
    draw = G.with_guidance_weights(data.batches(256, "cpu"), 0.0, 4.0)
    loss = G.guidance_fit_loss(Guided(oracle, K))
    # a student that IS the guided teacher (with each row's own w) has zero loss ...
    exact = NetDenoiser(VNet(GuidedStudentOracle(oracle), sch), "v", sch)
    g = torch.Generator().manual_seed(0)
    assert float(loss(exact, None, draw(g), g).detach()) < 1e-8
    w_seen = exact.net.seen[-1].w
    assert float(w_seen.min()) >= 0 and float(w_seen.max()) <= 4 and float(w_seen.std()) > 0.5  # per example
    # ... one that ignores w (the guided teacher at w = 2 for every row) does not
    fixed = NetDenoiser(VNet(Guided(oracle, K, 2.0), sch), "v", sch)

    class FixedW(torch.nn.Module):
        def __init__(self):
            super().__init__()
            self.inner = fixed.net

        def forward(self, x, t, cond=None):
            labels, _ = split_cond(cond)
            return self.inner(x, t, labels)
    assert float(loss(NetDenoiser(FixedW(), "v", sch), None, draw(g), g).detach()) > 1e-3


def test_progressive_halving_hands_each_rows_w_to_teacher_and_student():
    # Salimans & Ho 2022, Alg. 2 with the w-conditioned teacher of Meng et al. 2023, Sec. 4.1 (second stage): the
    # target uses two teacher DDIM steps at the SAME w as the student's row; checked with the exact guided teacher
    # as both (the loss is then the Alg. 2 self-consistency error of the exact teacher, > 0) vs a teacher at w = 0.
    sch = Schedule("cosine")
    oracle = OracleDenoiser(archipelago(), sch, labelled=True)
    teacher = GuidedStudentOracle(oracle)
    rec = NetDenoiser(VNet(teacher, sch), "v", sch)
    draw = G.with_guidance_weights(_data().batches(128, "cpu"), 1.0, 3.0)
    g = torch.Generator().manual_seed(3)
    batch = draw(g)
    progressive.progressive_loss(teacher, 64)(rec, None, batch, torch.Generator().manual_seed(4))
    cond = rec.net.seen[-1]
    assert isinstance(cond, GuidanceCond) and torch.equal(cond.w, batch[1].w) and torch.equal(cond.labels, batch[1].labels)


def test_evaluation_scores_the_exact_guided_teacher_as_its_own_reference():
    # The guided teacher at full steps, scored as a 'student': zero same-noise distance, its own sw2 as the teacher
    # value; label fidelity (exact posterior) rises and diversity falls with w (Ho & Salimans 2022, Fig. 1 / Sec. 5:
    # guidance trades diversity for fidelity).
    sch = Schedule("cosine")
    oracle = OracleDenoiser(archipelago(), sch, labelled=True)
    data = _data()
    bench = evaluate.make_bench(data, 512, 16, 5, 7, cond_needed=True)
    second = torch.randn(bench.noise.shape, generator=torch.Generator().manual_seed(99))
    grid = [0.0, 1.0, 4.0]
    ref = G.guided_reference(bench, oracle, K, 16, grid, "ddim", second)
    m = G.evaluate_guided(bench, lambda w: G.teacher_sampler(oracle, K, 16, w), oracle, K, 32, 16, grid, ref)
    for w in grid:
        k = f"guided/{G.w_key(w)}"
        assert m[f"{k}/student/teacher_rms"] == 0.0
        assert m[f"{k}/student/sw2"] == pytest.approx(m[f"{k}/teacher/sw2"], rel=1e-6)
        assert m[f"{k}/student/nfe"] == 32 and m[f"{k}/teacher/nfe"] == 32 and m[f"{k}/baseline/nfe"] == 32
        assert all(f"{k}/student/label{c}/fidelity" in m for c in range(K))
    fid = [m[f"guided/{G.w_key(w)}/teacher/fidelity"] for w in grid]
    div = [m[f"guided/{G.w_key(w)}/teacher/diversity"] for w in grid]
    # the islands are far apart: the exact teacher's samples sit on their own island already at w = 0 (fidelity ~1)
    assert fid[0] <= fid[1] <= fid[2] and fid[0] > 0.99 and div[0] > div[1] > div[2], (fid, div)
    # fidelity is the exact posterior of the intended label (Bayes' rule on the mixture): recomputed with scipy
    from scipy.stats import multivariate_normal
    mix = archipelago()
    x = bench.cache["guided_teacher@16/w1"][:50].double().numpy()
    lab = bench.cond[:50].numpy()
    dens = torch.tensor([[float(mix.weights[k]) * multivariate_normal(mix.means[k].numpy(), mix.covs[k].numpy()).pdf(xi)
                          for k in range(K)] for xi in x])
    post = (dens / dens.sum(1, keepdim=True))[torch.arange(50), lab]
    mine = G.per_label_fidelity(bench, bench.cache["guided_teacher@16/w1"][:50], bench.cond[:50])
    torch.testing.assert_close(mine.double(), post, rtol=1e-4, atol=1e-6)


def test_stop_rule_judges_worst_or_chosen_w():
    m = {}
    for w, (q, t) in {0.0: (1.0, 1.0), 1.0: (1.1, 1.0), 4.0: (2.0, 1.0)}.items():
        k = f"guided/{G.w_key(w)}"
        m.update({f"{k}/student/sw2": q, f"{k}/student/sw2_se": 0.0, f"{k}/teacher/sw2": t, f"{k}/teacher/sw2_se": 0.0})
    v, w = G.judge_guided(m, [0.0, 1.0, 4.0], "sw2", 0.25, "relative", 2.0, None)
    assert (v.verdict, w) == (stopping.OVER, 4.0) and "w=4" in v.reason
    v, w = G.judge_guided(m, [0.0, 1.0, 4.0], "sw2", 0.25, "relative", 2.0, 1.0)
    assert (v.verdict, w) == (stopping.WITHIN, 1.0)
    m["guided/w4/student/sw2"] = 1.2
    v, w = G.judge_guided(m, [0.0, 1.0, 4.0], "sw2", 0.25, "relative", 2.0, None)
    assert (v.verdict, w) == (stopping.WITHIN, 4.0)  # within everywhere: the smallest margin (1.25 - 1.2) is at w = 4


def fit_stage_one(iterations: int = 800, fit_iterations: int = 800, w_max: float = 4.0, lr: float = 1e-3):
    """Init net fitted to the exact labelled oracle (dropout 0.15), then stage one at w ~ U[0, w_max]; returns
    per-w RMS x0 error against the exact guided teacher for the init net (w-agnostic) and the stage-one student."""
    sch = Schedule("cosine")
    oracle = OracleDenoiser(archipelago(), sch, labelled=True)
    data = _data(65536)
    torch.manual_seed(0)
    init = NetDenoiser(build_net("mlp", (2,), K, width=128, depth=3), "v", sch)
    init = train_loop(init, oracle_fit_loss(oracle, 0.15, K), data.batches(512, "cpu"),
                      LoopSpec(fit_iterations, 2e-3, warmup=100, decay="cosine", save_every=10**9),
                      generator=torch.Generator().manual_seed(1), quiet=True).model
    student = NetDenoiser(build_net("mlp", (2,), K, width=128, depth=3, guidance=True), "v", sch)
    student.load_state_dict(init.state_dict(), strict=False)
    student = train_loop(student, G.guidance_fit_loss(Guided(oracle, K)),
                         G.with_guidance_weights(data.batches(512, "cpu"), 0.0, w_max),
                         LoopSpec(iterations, lr, warmup=50, decay="linear", save_every=10**9),
                         generator=torch.Generator().manual_seed(2), quiet=True).model
    out = {}
    g = torch.Generator().manual_seed(5)
    x0, labels = data.mixture.sample(4000, g)
    t = torch.rand(4000, generator=g) * 0.98 + 0.01
    a, s = sch.alpha_sigma(t)
    x_t = a[:, None] * x0 + s[:, None] * torch.randn(4000, 2, generator=g)
    for w in (0.0, 1.0, 2.0, 4.0):
        want = Guided(oracle, K, w).predict(x_t, t, labels)[0]
        with torch.no_grad():
            got_s = WithWeight(student, w).predict(x_t, t, labels)[0]
            got_i = Guided(init, K, w).predict(x_t, t, labels)[0]
            agnostic = init.predict(x_t, t, labels)[0]  # the conditional net, blind to w
        rms = lambda a_, b_: float(((a_.double() - b_.double()) ** 2).sum(1).mean().sqrt())  # noqa: E731
        out[w] = {"student": rms(got_s, want), "guided_init": rms(got_i, want), "w_blind": rms(agnostic, want)}
    return out


@pytest.mark.slow
def test_stage_one_student_reproduces_the_guided_teacher_across_w():
    # The check "the stage-one student reproduces the guided teacher's one-step output across the w range".
    # Measured RMS x0 error against the exact guided teacher (t ~ U(0.01, 0.99), x_t from the data), 2500 iterations:
    # w = 0 / 1 / 2 / 4: 0.080 / 0.044 / 0.041 / 0.091; a w-blind network (the conditional one) 0.03 / 1.0 / 2.0 / 4.0.
    errs = fit_stage_one(iterations=2500, lr=5e-4)
    for w, e in errs.items():
        assert e["student"] < 0.1, errs
    assert errs[4.0]["w_blind"] > 4 * errs[4.0]["student"], errs


def test_w_student_from_teacher_network_keeps_its_outputs():
    torch.manual_seed(0)
    teacher = NetDenoiser(build_net("mlp", (2,), K, width=32, depth=2), "v", Schedule("cosine"))
    student = G.w_student(teacher)
    assert student.net.arch["guidance"] and not teacher.net.arch.get("guidance")
    x, t, labels = torch.randn(7, 2), torch.rand(7), torch.arange(7) % K
    with torch.no_grad():
        for w in (0.0, 3.0):
            torch.testing.assert_close(WithWeight(student, w).predict(x, t, labels)[0], teacher.predict(x, t, labels)[0],
                                       rtol=0, atol=0)
    again = G.w_student(student)
    assert again is not student and again.net.arch["guidance"]
    with pytest.raises(ValueError, match="imported teacher"):
        G.w_student(NetDenoiser(torch.nn.Linear(2, 2), "v", Schedule("cosine")))


def test_stage_plan_fit_then_halvings():
    assert G.stage_plan(256, 4) == [(256, 256), (128, 256), (64, 128), (32, 64), (16, 32), (8, 16), (4, 8)]
    assert G.stage_plan(8, 4) == [(8, 8), (4, 8)]


def test_draw_request_checks_label_and_w_range():
    meta = {"net": {"num_classes": 6}, "guidance": {"w_min": 0.0, "w_max": 4.0}}
    G.check_request(meta, 5, 4.0)
    with pytest.raises(ValueError, match="--label 6: unknown label; valid: 0..5"):
        G.check_request(meta, 6, 1.0)
    with pytest.raises(ValueError, match=r"--w 4.5: outside .* \[0, 4\]"):
        G.check_request(meta, 0, 4.5)
    with pytest.raises(ValueError, match="--w -1"):
        G.check_request(meta, 0, -1.0)


# ------------------------------------------------------------------------------------ through the CLI pipeline
GUIDED_TINY = ["teacher.iterations=40", "method.fit_iterations=20", "method.iterations=10", "eval.samples=128",
               "eval.bootstrap=5", "eval.projections=16", "teacher.steps=8", "method.target_steps=4",
               "compute.threads=1", "tracking=off", "quiet=true"]


def _compose(*overrides):
    from hydra import compose, initialize_config_module

    from distillrun.config import register_configs
    register_configs()
    with initialize_config_module("distillrun.configs", version_base="1.3"):
        return compose("run", overrides=["recipe=archipelago_guided", *overrides])


def test_guided_recipe_runs_scores_every_w_and_draws(tmp_path, capsys):
    import json

    from distillrun import cli, verbs
    run = tmp_path / "run"
    cfg = _compose(*GUIDED_TINY, "stop.tolerance=1000", f"run_dir={run}")
    assert cli.run_job(cfg) == 0
    summary = json.loads((run / "summary.json").read_text())
    assert [(r["steps"], r["teacher_steps"]) for r in summary["stages"]] == [(8, 8), (4, 8)]
    out = capsys.readouterr().out
    assert "NFE" in out and "baseline NFE" in out
    for r in summary["stages"]:
        m = r["metrics"]
        for w in ("w0", "w1", "w2", "w4"):
            for name in ("student/sw2", "student/sw2_se", "student/teacher_rms", "student/fidelity",
                         "student/diversity", "teacher/sw2", "baseline/sw2", "student/label5/fidelity"):
                assert math.isfinite(m[f"guided/{w}/{name}"]), (w, name)
            assert m[f"guided/{w}/student/nfe"] == r["steps"]  # 1 evaluation per step
            assert m[f"guided/{w}/teacher/nfe"] == 16  # 8 steps x 2 evaluations
            assert m[f"guided/{w}/baseline/nfe"] == r["steps"]  # the guided teacher at half the steps
        assert m["guided/judged_w"] in (0.0, 1.0, 2.0, 4.0)
        assert m["quality/sw2"] == m[f"guided/{G.w_key(m['guided/judged_w'])}/student/sw2"]
    meta = json.loads((run / "stage-02" / "model.json").read_text())
    assert meta["guidance"]["w_min"] == 0.0 and meta["guidance"]["w_max"] == 4.0
    assert (run / "guided_fidelity_diversity.png").stat().st_size > 1000
    assert verbs.main("draw", [str(run), "--label", "2", "--w", "1.5", "--count", "32"]) == 0
    x = __import__("numpy").load(run / "drawn" / "stage-02_seed-1234_n-32_label-2_w-1.5.npy")
    assert x.shape == (32, 2)
    assert verbs.main("draw", [str(run), "--w", "4.5"]) == 2
    assert verbs.main("draw", [str(run), "--label", "6"]) == 2
    assert "outside the guidance weights" in capsys.readouterr().err


@pytest.mark.parametrize("overrides,says", [
    (["method.w_min=2", "method.w_max=2"], "method.w_max=2.0: must be above method.w_min=2.0"),
    (["method.w_min=3", "method.w_max=1"], "method.w_max=1.0: must be above method.w_min=3.0"),
    (["method.w_grid=[0,5]"], "method.w_grid=[0.0, 5.0]: must be distinct weights inside"),
    (["teacher.label_dropout=1.0"], "teacher.label_dropout=1.0: must be in [0, 1)"),
    (["teacher.label_dropout=-0.1"], "teacher.label_dropout=-0.1: must be in [0, 1)"),
    (["teacher=train", "teacher.label_dropout=0"], "teacher.label_dropout=0.0: method=guided needs the unconditional"),
    (["net.class_cond=false"], "net.class_cond=False: method=guided distils a class-conditional teacher"),
    (["stop=absolute", "stop.metric=nll_gap"], "stop.metric='nll_gap': method=guided scores students against"),
    (["method.judge_w=3"], "method.judge_w=3.0: must be null (the worst w) or one of method.w_grid"),
    (["data=spiral", "teacher=train"], "(method=guided) but data.name=spiral has no labels"),
])
def test_bad_guided_input_is_refused_in_one_line(tmp_path, overrides, says):
    import io
    from contextlib import redirect_stderr

    from distillrun import cli
    cfg = _compose(*GUIDED_TINY, f"run_dir={tmp_path / 'run'}", *overrides)
    err = io.StringIO()
    with redirect_stderr(err), pytest.raises(SystemExit) as exit_:
        cli.run_job(cfg)
    lines = err.getvalue().strip().splitlines()
    assert exit_.value.code == 2 and len(lines) == 1 and says in lines[0], lines
    assert not (tmp_path / "run").exists()


@pytest.mark.parametrize("source", ["oracle", "train"])
def test_teacher_training_gets_label_dropout_and_the_null_label(tmp_path, monkeypatch, source):
    # The wiring of teacher.label_dropout: prepare_teacher builds its loss with p and the null index K (= number of
    # classes), and the loss then hands the network the null label at that rate (a recording network).
    from distillrun import teachers
    from distillrun.methods import teacher as T
    from distillrun.pipeline import load_data

    seen = {}
    real = {"oracle": T.oracle_fit_loss, "train": T.denoising_loss_with_dropout}[source]

    def spy(*args):
        seen["args"] = args[-2:]
        return real(*args)
    monkeypatch.setattr(teachers, "oracle_fit_loss" if source == "oracle" else "denoising_loss_with_dropout", spy)
    cfg = _compose(*GUIDED_TINY, f"teacher={source}", "teacher.label_dropout=0.3", "teacher.iterations=2",
                   f"run_dir={tmp_path}")
    teachers.prepare_teacher(cfg, load_data(cfg), tmp_path)
    assert seen["args"] == (0.3, K)
    rec = NetDenoiser(VNet(OracleDenoiser(archipelago(), Schedule("cosine"), labelled=True), Schedule("cosine")), "v",
                      Schedule("cosine"))
    x, labels = _data(20000).x, _data(20000).labels
    real(*((OracleDenoiser(archipelago(), labelled=True),) if source == "oracle" else ()), 0.3, K)(
        rec, None, (x, labels), torch.Generator().manual_seed(0))
    share = float((rec.net.seen[-1] == K).float().mean())
    assert abs(share - 0.3) < 4 * math.sqrt(0.3 * 0.7 / 20000)
