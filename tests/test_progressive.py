"""Progressive distillation (distillrun.methods.progressive, Salimans & Ho 2022): the closed-form x0 target,
the two-step teacher, the loss weights, the stage plan, and the paper's central claim on the archipelago mixture."""
from __future__ import annotations

import copy
import math

import numpy as np
import pytest
import torch

from distillrun import metrics as M
from distillrun.data.mixture import archipelago
from distillrun.denoiser import NetDenoiser
from distillrun.methods.progressive import (draw_student_times, loss_weight, progressive_loss, stage_plan,
                                            two_teacher_steps, x0_target)
from distillrun.methods.teacher import oracle_fit_loss
from distillrun.nets import build_net
from distillrun.nets.oracle import OracleDenoiser
from distillrun.samplers import sample, uniform_grid
from distillrun.schedule import Schedule, v_from_x0_eps
from distillrun.training import LoopSpec, train_loop

torch.set_num_threads(1)


def _coefs(sch: Schedule, t: float):
    a, s = sch.alpha_sigma(torch.tensor(t, dtype=torch.float64))
    return float(a), float(s)


# ----------------------------------------------------------------------------------- the x0 target
@pytest.mark.parametrize("kind", ["cosine", "linear"])
@pytest.mark.parametrize("t,t1,t2", [(1.0, 0.75, 0.5), (0.9, 0.6, 0.05), (0.4, 0.3, 0.2), (0.25, 0.125, 0.0),
                                     (0.02, 0.01, 0.0)])
def test_one_student_step_reproduces_two_teacher_steps(kind, t, t1, t2):
    # Salimans & Ho 2022, Alg. 2: x~ = (z_t'' - (sigma_t''/sigma_t) z_t) / (alpha_t'' - (sigma_t''/sigma_t) alpha_t)
    # is the x0 for which one DDIM step t -> t'' (x_t'' = alpha_t'' x~ + sigma_t'' (z_t - alpha_t x~) / sigma_t) lands
    # exactly on the teacher's two DDIM steps t -> t' -> t'', whatever the teacher predicted. Random float64 values.
    sch = Schedule(kind)
    g = torch.Generator().manual_seed(0)
    x_t, x0_a, eps_a, x0_b, eps_b = (torch.randn(128, 3, generator=g, dtype=torch.float64) for _ in range(5))
    (a, s), (a1, s1), (a2, s2) = _coefs(sch, t), _coefs(sch, t1), _coefs(sch, t2)
    x_t1 = a1 * x0_a + s1 * eps_a  # teacher's first DDIM step (Song et al. 2021, Eq. 12, eta = 0)
    x_t2 = a2 * x0_b + s2 * eps_b  # teacher's second DDIM step
    x_tilde = x0_target(x_t, x_t2, a, s, a2, s2)
    student = a2 * x_tilde + s2 * (x_t - a * x_tilde) / s
    torch.testing.assert_close(student, x_t2, rtol=1e-10, atol=1e-10)
    if t2 == 0.0:  # sigma_t'' = 0: the target is the teacher's end point itself
        torch.testing.assert_close(x_tilde, x_t2, rtol=0, atol=1e-15)


@pytest.mark.parametrize("kind", ["cosine", "linear"])
@pytest.mark.parametrize("steps", [1, 2, 8])
def test_two_teacher_steps_equal_the_sampler_on_the_sub_grid(kind, steps):
    # The target of the student step t -> t - 1/N is defined by two teacher DDIM steps on the grid of 2N steps
    # (Salimans & Ho 2022, Alg. 2); the reference is distillrun.samplers.sample run by the oracle on [t, t', t''],
    # inverted through the closed form of x~ above. Every start time of the student's grid is checked, including
    # t = 1 (SNR 0) and t'' = 0.
    sch = Schedule(kind)
    oracle = OracleDenoiser(archipelago(), sch)
    g = torch.Generator().manual_seed(1)
    for i in range(1, steps + 1):
        t = i / steps
        x_t = 1.3 * torch.randn(64, 2, generator=g, dtype=torch.float64)
        got = two_teacher_steps(oracle, x_t, torch.full((64,), t, dtype=torch.float64), steps)
        (a, s), (a2, s2) = _coefs(sch, t), _coefs(sch, t - 1 / steps)
        grid = torch.tensor([t, t - 0.5 / steps, t - 1 / steps], dtype=torch.float64)
        end = sample(oracle, x_t / s, grid, "ddim")  # sample starts from sigma_{t_0} * noise = x_t
        torch.testing.assert_close(got, x0_target(x_t, end, a, s, a2, s2), rtol=1e-9, atol=1e-9)
        if i == 1:
            torch.testing.assert_close(got, end, rtol=1e-12, atol=1e-12)


class _RecordingStudent:
    """Stands in for the student: records the (x_t, t) it is asked about and predicts x0_hat = 0.1 x_t."""

    def __init__(self, schedule: Schedule):
        self.schedule, self.calls = schedule, []

    def predict(self, x_t, t, cond=None):
        self.calls.append((x_t.clone(), t.clone()))
        return 0.1 * x_t, torch.zeros_like(x_t)


@pytest.mark.parametrize("kind", ["snr_trunc", "v"])
def test_progressive_loss_is_the_weighted_error_against_the_sub_grid_target(kind):
    # Salimans & Ho 2022, Alg. 2 put together: for the student's (x_t, t), the target is x~ from two teacher DDIM
    # steps t -> t - 1/(2N) -> t - 1/N, the loss is mean_i w(lambda_t_i) mean_d (x0_hat - x~)^2. The reference target
    # comes from distillrun.samplers.sample on the sub-grid (not from two_teacher_steps), inverted by Alg. 2's formula.
    sch = Schedule("cosine")
    mix = archipelago()
    oracle = OracleDenoiser(mix, sch)
    steps = 4
    student = _RecordingStudent(sch)
    x0 = mix.sample(64, torch.Generator().manual_seed(4))[0].double()
    loss = progressive_loss(oracle, steps, kind)(student, None, (x0, None), torch.Generator().manual_seed(5))
    (x_t, t), = student.calls
    assert set(torch.unique(t * steps).round().tolist()) <= {1.0, 2.0, 3.0, 4.0}
    expected = torch.zeros(64, dtype=torch.float64)
    for tv in torch.unique(t).tolist():
        rows = t == tv
        (a, s), (a2, s2) = _coefs(sch, tv), _coefs(sch, tv - 1 / steps)
        grid = torch.tensor([tv, tv - 0.5 / steps, tv - 1 / steps], dtype=torch.float64)
        x_tilde = x0_target(x_t[rows], sample(oracle, x_t[rows] / s, grid, "ddim"), a, s, a2, s2)
        err = ((0.1 * x_t[rows] - x_tilde) ** 2).mean(1)
        lam = sch.logsnr(torch.tensor(tv, dtype=torch.float64))
        snr = float(torch.exp(lam))
        expected[rows] = (max(snr, 1.0) if kind == "snr_trunc" else snr + 1.0) * err
    assert float(loss) == pytest.approx(float(expected.mean()), rel=1e-9)


# ------------------------------------------------------------------------------------------ weights
def test_loss_weight_values():
    # Salimans & Ho 2022, Sec. 4: 'truncated SNR' weighting max(SNR, 1) and 'SNR+1' weighting (v-loss).
    lam = torch.log(torch.tensor([0.01, 0.25, 1.0, 4.0, 100.0], dtype=torch.float64))
    f64 = dict(dtype=torch.float64)
    torch.testing.assert_close(loss_weight(lam, "snr_trunc"), torch.tensor([1.0, 1.0, 1.0, 4.0, 100.0], **f64))
    torch.testing.assert_close(loss_weight(lam, "v"), torch.tensor([1.01, 1.25, 2.0, 5.0, 101.0], **f64))


@pytest.mark.parametrize("kind", ["cosine", "linear"])
def test_v_weight_equals_v_space_error(kind):
    # Salimans & Ho 2022, Sec. 4: for fixed x_t, v = (alpha x_t - x0) / sigma (with alpha^2 + sigma^2 = 1), so
    # |v_hat - v|^2 = |x0_hat - x0|^2 / sigma^2 = (SNR + 1) |x0_hat - x0|^2: the 'v' weight is an MSE on v.
    sch = Schedule(kind)
    g = torch.Generator().manual_seed(2)
    t = torch.rand(256, generator=g, dtype=torch.float64) * 0.98 + 0.01
    alpha, sigma = (c[:, None] for c in sch.alpha_sigma(t))
    x_t = torch.randn(256, 2, generator=g, dtype=torch.float64)
    x0, x0_hat = (torch.randn(256, 2, generator=g, dtype=torch.float64) for _ in range(2))
    v = v_from_x0_eps(x0, (x_t - alpha * x0) / sigma, alpha, sigma)
    v_hat = v_from_x0_eps(x0_hat, (x_t - alpha * x0_hat) / sigma, alpha, sigma)
    weighted = loss_weight(sch.logsnr(t), "v") * ((x0_hat - x0) ** 2).sum(1)
    torch.testing.assert_close(weighted, ((v_hat - v) ** 2).sum(1), rtol=1e-9, atol=1e-12)


# ------------------------------------------------------------------------------------ stage plan, times
def test_stage_plan():
    # Salimans & Ho 2022, Alg. 2: each stage halves the step count, N -> N/2, until the target.
    assert stage_plan(256, 1) == [128, 64, 32, 16, 8, 4, 2, 1]
    assert stage_plan(16, 2) == [8, 4, 2]
    assert stage_plan(8, 8) == []


def test_student_times_lie_on_the_student_grid():
    # Salimans & Ho 2022, Alg. 2: t = i / N with i ~ U{1, ..., N}: every start time of the student's grid, uniformly.
    t = draw_student_times(40000, 8, torch.Generator().manual_seed(3))
    i = t * 8
    torch.testing.assert_close(i, i.round(), rtol=0, atol=1e-12)
    counts = torch.bincount(i.round().long(), minlength=9).numpy()
    assert counts[0] == 0
    assert np.all(np.abs(counts[1:] / 40000 - 1 / 8) < 4 * math.sqrt((1 / 8) * (7 / 8) / 40000))  # multinomial SE


# ------------------------------------------------------------------------------------- central claim
def _block_mmd(x: torch.Tensor, ref: torch.Tensor, blocks: int) -> np.ndarray:
    return np.array([M.mmd2_rbf(a, r, 0.3) for a, r in zip(x.double().tensor_split(blocks), ref.tensor_split(blocks))])


def test_distilled_student_beats_teacher_ddim_at_few_steps():
    # Salimans & Ho 2022, Fig. 4: a progressively distilled student at 4 and 2 steps is far better than DDIM of its
    # teacher at the same step counts. Here: the exact oracle is the teacher; an MLP (width 64, depth 2) is fitted to
    # it (oracle_fit_loss, 600 iterations) and distilled 16 -> 8 -> 4 -> 2 (200 iterations per stage, batch 256,
    # Adam 2e-3 decayed linearly to 0 per stage). Hyperparameters are ours, chosen for CPU cost (common practice is
    # thousands of iterations per stage).
    # Metric: MMD^2 (Gretton et al. 2012; RBF bandwidth 0.3, about one island's size) of 4000 samples against 4000
    # exact draws, as the mean over 8 paired blocks of 500 (same noise, same reference block), SE of the difference
    # = std(block differences) / sqrt(8). Measured over 5 seeds: student 0.0009-0.0018 vs oracle DDIM 0.0139 at
    # 4 steps, 0.0012-0.0022 vs 0.144 at 2 steps. Asserted: the student's MMD^2 is less than half the oracle's
    # and the difference exceeds 3 SE.
    mix = archipelago()
    sch = Schedule("cosine")
    oracle = OracleDenoiser(mix, sch)
    torch.manual_seed(0)
    draw = lambda g: (mix.sample(256, g)[0], None)  # noqa: E731
    net = NetDenoiser(build_net("mlp", (2,), 0, width=64, depth=2), "v", sch)
    fit = train_loop(net, oracle_fit_loss(oracle), draw, LoopSpec(iterations=600, lr=3e-3, warmup=50, decay="cosine"),
                     generator=torch.Generator().manual_seed(1), quiet=True)
    assert fit.failed is None
    students, teacher, student = {}, oracle, net
    for steps in (8, 4, 2):
        student = copy.deepcopy(student).requires_grad_(True)
        result = train_loop(student, progressive_loss(teacher, steps), draw, LoopSpec(iterations=200, lr=2e-3),
                            generator=torch.Generator().manual_seed(10 + steps), quiet=True)
        assert result.failed is None
        students[steps] = teacher = student.requires_grad_(False)

    n, blocks = 4000, 8
    ref = mix.sample(n, torch.Generator().manual_seed(100))[0].double()
    noise = torch.randn(n, 2, generator=torch.Generator().manual_seed(5))
    for steps in (4, 2):
        q_student = _block_mmd(sample(students[steps], noise, uniform_grid(steps)), ref, blocks)
        q_oracle = _block_mmd(sample(oracle, noise.double(), uniform_grid(steps)), ref, blocks)
        diff = q_oracle - q_student
        se = diff.std(ddof=1) / math.sqrt(blocks)
        assert q_student.mean() < 0.5 * q_oracle.mean(), (steps, q_student.mean(), q_oracle.mean())
        assert diff.mean() > 3 * se, (steps, diff.mean(), se)
