"""Consistency distillation: coefficients, boundary condition, Karras grid, teacher ODE step, loss wiring,
multistep sampling, and a short distillation on the archipelago mixture. Each check names its reference."""
import copy
import dataclasses
import math

import numpy as np
import pytest
import torch
from scipy import stats
from scipy.integrate import solve_ivp

from distillrun import metrics
from distillrun.data.mixture import archipelago
from distillrun.denoiser import NetDenoiser
from distillrun.methods.consistency import (ConsistencyConfig, ConsistencyModel, c_out, c_skip, consistency_loss, consistency_sample,
                                            denoise_ve, huber_c_for, interval_weights, pseudo_huber, sample_sigmas,
                                            teacher_ode_step, training_sigmas)
from distillrun.methods.teacher import oracle_fit_loss
from distillrun.nets.mlp import TimeMLP
from distillrun.nets.oracle import OracleDenoiser
from distillrun.samplers import sample, uniform_grid
from distillrun.schedule import Schedule, broadcast
from distillrun.training import LoopSpec, train_loop

torch.set_num_threads(1)


def _student(seed=0, width=32, depth=2):
    torch.manual_seed(seed)
    return NetDenoiser(TimeMLP(2, width=width, depth=depth))


# ------------------------------------------------------------------------------------------ coefficients
@pytest.mark.parametrize("sigma,skip,out", [
    (0.002, 1.0, 0.0),  # sigma = sigma_min: c_skip = 1, c_out = 0 exactly
    # 0.25 / (0.25 + 0.25); 0.5 * 0.5 / sqrt(0.502^2 + 0.25) = 0.25 / sqrt(0.502004)
    (0.502, 0.5, 0.3528469923239136),
    (80.0, 3.90629272263522e-05, 0.49997773490522646),  # 0.25 / (79.998^2 + 0.25); 79.998 * 0.5 / sqrt(6400.25)
])
def test_coefficients_match_hand_values(sigma, skip, out):
    # Song et al. 2023, Appendix C: c_skip = sd^2 / ((sigma - sigma_min)^2 + sd^2),
    # c_out = (sigma - sigma_min) sd / sqrt(sigma^2 + sd^2); sd = 0.5, sigma_min = 0.002 (their CIFAR-10 values).
    assert c_skip(sigma, 0.5, 0.002) == pytest.approx(skip, rel=1e-12, abs=0)
    assert c_out(sigma, 0.5, 0.002) == pytest.approx(out, rel=1e-12, abs=0)


def test_edm_coefficients_at_sigma_data():
    # Karras et al. 2022, Table 1: at sigma = sigma_data, c_skip = 1/2 and c_out = sigma_data / sqrt(2).
    assert c_skip(0.7, 0.7) == pytest.approx(0.5, rel=1e-14)
    assert c_out(0.7, 0.7) == pytest.approx(0.7 / math.sqrt(2), rel=1e-14)


def test_boundary_condition_is_exact():
    # Song et al. 2023, Eq. 3 / Sec. 3: f(x, sigma_min) = x, here bit for bit (c_skip = 1, c_out = 0 exactly).
    model = ConsistencyModel(_student(), sigma_data=1.1, sigma_min=0.002)
    x = 3 * torch.randn(64, 2, generator=torch.Generator().manual_seed(1))
    with torch.no_grad():
        assert torch.equal(model(x, 0.002), x)
        grid = training_sigmas(18, 0.002, 80.0, 7.0)
        assert torch.equal(model(x, float(grid[0])), x)
        mixed = torch.where(torch.arange(64) % 2 == 0, grid[0], grid[5])  # per-sample levels
        out = model(x, mixed)
    assert torch.equal(out[::2], x[::2])
    assert (out[1::2] - x[1::2]).abs().max() > 1e-3  # away from sigma_min f is not the identity


def test_consistency_function_starts_as_the_student_denoiser():
    # Song et al. 2023, Appendix C with F read off D through the EDM preconditioning (Karras et al. 2022):
    # f - D = (c_skip - c_out c_skip_edm / c_out_edm) x + (c_out / c_out_edm - 1) D = O(sigma_min / sigma).
    student = _student(3)
    model = ConsistencyModel(student, sigma_data=1.0, sigma_min=0.002)
    x = 20 * torch.randn(256, 2, generator=torch.Generator().manual_seed(2))
    with torch.no_grad():
        f, d = model(x, 20.0), denoise_ve(student, x, 20.0)
    assert torch.allclose(f, d, atol=2e-3, rtol=0)


# ---------------------------------------------------------------------------------------- grid, weights
@pytest.mark.parametrize("n,sigma_min,sigma_max,rho", [(18, 0.002, 80.0, 7.0), (5, 0.01, 20.0, 3.0)])
def test_training_grid_is_karras_eq5(n, sigma_min, sigma_max, rho):
    # Karras et al. 2022, Eq. 5, evaluated with numpy:
    # sigma_i = (smax^(1/rho) + i/(N-1) (smin^(1/rho) - smax^(1/rho)))^rho.
    i = np.arange(n)
    eq5 = (sigma_max ** (1 / rho) + i / (n - 1) * (sigma_min ** (1 / rho) - sigma_max ** (1 / rho))) ** rho
    got = training_sigmas(n, sigma_min, sigma_max, rho)
    np.testing.assert_allclose(got.numpy()[::-1], eq5, rtol=1e-12)
    assert float(got[0]) == sigma_min and float(got[-1]) == sigma_max
    assert bool((got[1:] > got[:-1]).all())


def test_inverse_gap_weights_follow_the_grid_gaps():
    # Song & Dhariwal 2023, Sec. 3.4: lambda(sigma_n) = 1 / (sigma_{n+1} - sigma_n); ours rescaled to mean 1.
    grid = training_sigmas(10, 0.002, 80.0, 7.0)
    w = 1.0 / np.diff(grid.numpy())
    np.testing.assert_allclose(interval_weights(grid, "inverse_gap").numpy(), w / w.mean(), rtol=1e-12)
    assert torch.equal(interval_weights(grid, "uniform"), torch.ones(9, dtype=torch.float64))


def test_pseudo_huber_closed_forms():
    # Song & Dhariwal 2023, Sec. 3.3: d = sqrt(|x - y|^2 + c^2) - c; |(3, 4)| = 5 (Pythagoras).
    x, y = torch.tensor([[3.0, 4.0]], dtype=torch.float64), torch.zeros(1, 2, dtype=torch.float64)
    assert float(pseudo_huber(x, y, 0.0)) == pytest.approx(5.0, rel=1e-15)
    assert float(pseudo_huber(x, y, 1.0)) == pytest.approx(math.sqrt(26) - 1, rel=1e-15)
    # For |r| << c the distance is r^2 / (2c) (Taylor expansion of sqrt).
    assert float(pseudo_huber(1e-3 * x / 5, y, 1.0)) == pytest.approx(0.5e-6, rel=1e-5)
    # Song & Dhariwal 2023 quote c = 0.03 for CIFAR-10 (d = 3 * 32 * 32) from c = 0.00054 sqrt(d).
    assert huber_c_for(ConsistencyConfig(), 3 * 32 * 32) == pytest.approx(0.03, abs=1e-3)


def test_sample_sigmas_lie_on_the_training_grid():
    # Measured here (levels off the training grid hurt: benchmarks/consistency_tuning.py) and Song et al. 2023,
    # Alg. 1 (first level sigma_max).
    cfg = ConsistencyConfig()
    grid = set(training_sigmas(cfg.grid_points, cfg.sigma_min, cfg.sigma_max, cfg.rho).tolist())
    for sd in (0.5, 1.0):
        for steps in range(1, cfg.grid_points):
            levels = sample_sigmas(steps, cfg, sd)
            assert len(levels) == steps and levels[0] == cfg.sigma_max and set(levels) <= grid
            assert all(a > b for a, b in zip(levels, levels[1:])) and cfg.sigma_min not in levels
    with pytest.raises(ValueError, match="allows 1..17"):
        sample_sigmas(18, cfg, 1.0)


# ------------------------------------------------------------------------------------ teacher ODE step
class GaussianDenoiser:
    """Exact VP denoiser of N(m, s^2 I): E[x0 | x_t] = m + alpha s^2 / (alpha^2 s^2 + sigma^2) (x_t - alpha m)
    (Gaussian conditioning, e.g. Bishop 2006, Eq. 2.116); in the VE frame D = m + s^2 / (s^2 + sigma^2) (x - m)."""

    def __init__(self, m, s, schedule):
        self.m, self.s, self.schedule = m, s, schedule

    def predict(self, x_t, t, cond=None):
        alpha, sigma = (broadcast(c, x_t) for c in self.schedule.alpha_sigma(t.to(torch.float64)))
        x0 = self.m + alpha * self.s**2 / (alpha**2 * self.s**2 + sigma**2) * (x_t - alpha * self.m)
        return x0, (x_t - alpha * x0) / sigma


@pytest.mark.parametrize("kind", ["cosine", "linear"])
def test_heun_step_matches_solve_ivp_to_its_local_error(kind):
    # Reference: scipy.integrate.solve_ivp (rtol 1e-8) on dx/dsigma = (x - D(x, sigma)) / sigma (Karras et al. 2022,
    # Eq. 3 with sigma(t) = t). Expected one-step error, from the Taylor expansion of Heun's method for
    # y' = f(sigma, y): exact - heun = h^3 (-y'''/12 + f_y y''/4) + O(h^4); with y = m + c g, g = sqrt(s^2 + sigma^2)
    # this is c h^3 s^2 sigma / (2 g^5); Euler's is h^2 y''/2 = c h^2 s^2 / (2 g^3).
    m, s, s0 = torch.tensor([0.3, -0.2], dtype=torch.float64), 0.5, 2.0
    teacher = GaussianDenoiser(m, s, Schedule(kind))
    x = torch.tensor([[1.7, -0.9], [-1.1, 2.4]], dtype=torch.float64)
    g0 = math.sqrt(s**2 + s0**2)
    errors = {}
    for h in (-0.1, -0.2):
        rhs = lambda sig, y: (y - np.tile(m.numpy(), 2)) * sig / (s**2 + sig**2)  # noqa: E731
        ref = solve_ivp(rhs, (s0, s0 + h), x.numpy().ravel(), rtol=1e-8, atol=1e-12).y[:, -1].reshape(2, 2)
        for solver in ("heun", "euler"):
            errors[solver, h] = ref - teacher_ode_step(teacher, x, s0, s0 + h, solver).numpy()
    c = (x - m).numpy() / g0
    heun_pred = c * (-0.1) ** 3 * s**2 * s0 / (2 * g0**5)
    euler_pred = c * (-0.1) ** 2 * s**2 / (2 * g0**3)
    np.testing.assert_allclose(errors["heun", -0.1] / heun_pred, 1.0, atol=0.2)
    np.testing.assert_allclose(errors["euler", -0.1] / euler_pred, 1.0, atol=0.2)
    assert np.all(np.abs(errors["euler", -0.1]) > 10 * np.abs(errors["heun", -0.1]))
    ratio = errors["heun", -0.2] / errors["heun", -0.1]  # third order: halving h divides the error by ~8
    assert np.all((ratio > 6) & (ratio < 11))


# --------------------------------------------------------------------------------------------- the loss
def test_target_branch_gets_no_gradient():
    # Song et al. 2023, Alg. 2: the target f_{theta^-} is a stop-gradient copy. With ema_decay = 0 the target
    # is the model itself (Song & Dhariwal 2023); its gradient must equal the one against a frozen copy.
    cfg = dataclasses.replace(ConsistencyConfig(), grid_points=6, weighting="inverse_gap")
    teacher = OracleDenoiser(archipelago())
    loss_fn = consistency_loss(teacher, cfg, 2)
    batch = (archipelago().sample(64, torch.Generator().manual_seed(0))[0], None)
    grads = []
    for self_target in (True, False):
        model = ConsistencyModel(_student(4), 1.0, cfg.sigma_min)
        target = model if self_target else copy.deepcopy(model).requires_grad_(False)
        loss_fn(model, target, batch, torch.Generator().manual_seed(5)).backward()
        grads.append(torch.cat([p.grad.ravel() for p in model.parameters()]))
    assert grads[0].abs().max() > 0
    torch.testing.assert_close(grads[0], grads[1], rtol=1e-5, atol=1e-8)


def test_images_with_labels_run_through_loss_and_sampler():
    # Shapes only (no outside reference): (B, C, H, W) data, class labels, a NetDenoiser teacher; the boundary
    # condition of Song et al. 2023 holds per pixel.
    from distillrun.nets.unet import SmallUNet
    torch.manual_seed(0)
    teacher = NetDenoiser(SmallUNet(1, 8, base=8, num_classes=3))
    model = ConsistencyModel(copy.deepcopy(teacher), 0.5, 0.002)
    cfg = dataclasses.replace(ConsistencyConfig(), grid_points=6)
    x0, labels = torch.randn(4, 1, 8, 8), torch.tensor([0, 1, 2, 0])
    loss = consistency_loss(teacher, cfg, 64)(model, model, (x0, labels), torch.Generator().manual_seed(0))
    assert loss.dim() == 0 and torch.isfinite(loss)
    with torch.no_grad():
        assert torch.equal(model(x0, 0.002, labels), x0)
    out = consistency_sample(model, torch.randn(4, 1, 8, 8), sample_sigmas(2, cfg, 0.5), cond=labels)
    assert out.shape == x0.shape and torch.isfinite(out).all()


# ----------------------------------------------------------------------------------- multistep sampling
class ExactGaussianConsistency(torch.nn.Module):
    """The exact consistency function of N(m, s^2) data: the VE probability-flow ODE maps x at sigma to
    m + (x - m) sqrt((s^2 + sigma_min^2) / (s^2 + sigma^2)) at sigma_min
    (the solution of dx/dsigma = (x - m) sigma / (s^2 + sigma^2))."""

    def __init__(self, m, s, sigma_min):
        super().__init__()
        self.m, self.s, self.sigma_min = m, s, sigma_min

    def forward(self, x, sigma, cond=None):
        return self.m + (x - self.m) * math.sqrt((self.s**2 + self.sigma_min**2) / (self.s**2 + float(sigma) ** 2))


def _gaussian_after_step(mean, var, m, s, sigma, sigma_min):
    """x ~ N(mean, var) mapped by the exact f at sigma: N(m + (mean - m) r, var r^2),
    r = sqrt((s^2 + sigma_min^2) / (s^2 + sigma^2))."""
    r = math.sqrt((s**2 + sigma_min**2) / (s**2 + sigma**2))
    return m + (mean - m) * r, var * r**2


def test_multistep_sampling_matches_its_closed_form():
    # Song et al. 2023, Alg. 1 with the exact f of Gaussian data: x = sigma_0 z -> N(0, sigma_0^2) -> f -> re-noise
    # by sqrt(sigma_1^2 - sigma_min^2) (adds that variance) -> f; the result is Gaussian with the moments from
    # `_gaussian_after_step`. Reference: scipy.stats.kstest. sigma_min = 0.5 makes the "- sigma_min^2" visible.
    m, s, sigma_min, sigmas = 0.4, 0.5, 0.5, [2.0, 0.6]
    f = ExactGaussianConsistency(m, s, sigma_min)
    noise = torch.randn(20000, 1, generator=torch.Generator().manual_seed(0), dtype=torch.float64)
    two = consistency_sample(f, noise, sigmas, torch.Generator().manual_seed(1)).ravel().numpy()
    mean1, var1 = _gaussian_after_step(0.0, sigmas[0] ** 2, m, s, sigmas[0], sigma_min)
    for renoise_var, expect_match in ((sigmas[1] ** 2 - sigma_min**2, True), (sigmas[1] ** 2, False)):
        mean2, var2 = _gaussian_after_step(mean1, var1 + renoise_var, m, s, sigmas[1], sigma_min)
        p = stats.kstest(two, stats.norm(mean2, math.sqrt(var2)).cdf).pvalue
        assert (p > 1e-3) if expect_match else (p < 1e-6)
    one = consistency_sample(f, noise, sigmas[:1]).ravel().numpy()
    assert stats.kstest(one, stats.norm(mean1, math.sqrt(var1)).cdf).pvalue > 1e-3


# --------------------------------------------------------------------- distillation on the mixture
def _nll(mix, x):
    return -mix.log_prob(x).to(torch.float64)


@pytest.fixture(scope="module")
def distilled():
    """A 64x2 TimeMLP fitted to the oracle (600 iterations), then distilled with the oracle as ODE teacher
    (400 iterations, batch 256): about 6 s on one thread."""
    mix = archipelago()
    oracle = OracleDenoiser(mix)
    data = mix.sample(16384, torch.Generator().manual_seed(0))[0]
    draw = lambda g: (data[torch.randint(0, data.shape[0], (256,), generator=g)], None)  # noqa: E731
    student = _student(0, width=64)
    train_loop(student, oracle_fit_loss(oracle), draw, LoopSpec(iterations=600, lr=2e-3, warmup=50, decay="cosine"),
               generator=torch.Generator().manual_seed(1), quiet=True)
    cfg = dataclasses.replace(ConsistencyConfig(), sigma_max=20.0, weighting="inverse_gap", lr=1e-3,
                              iterations=400, batch_size=256)
    sd = float(data.std())
    spec = LoopSpec(iterations=cfg.iterations, lr=cfg.lr, ema_decay=cfg.ema_decay, grad_clip=cfg.grad_clip)
    res = train_loop(ConsistencyModel(student, sd, cfg.sigma_min), consistency_loss(oracle, cfg, 2), draw, spec,
                     generator=torch.Generator().manual_seed(2), quiet=True)
    assert res.failed is None
    return mix, oracle, res.model, cfg, sd


def test_one_step_student_beats_teacher_ddim_at_one_step(distilled):
    # Song et al. 2023, Table 1/Fig. 5 (one-step CD far better than 1-step DDIM of the teacher), checked on our data
    # with the exact NLL (mixture.log_prob) and sliced W2 (Bonneel et al. 2015) against exact samples.
    mix, oracle, model, cfg, sd = distilled
    noise = torch.randn(4000, 2, generator=torch.Generator().manual_seed(5))
    ddim = sample(oracle, noise, uniform_grid(1))
    one = consistency_sample(model, noise, sample_sigmas(1, cfg, sd))
    nll_ddim, nll_one = _nll(mix, ddim), _nll(mix, one)
    se = float(nll_one.std()) / math.sqrt(4000)
    assert float(nll_one.mean()) + 3 * se < float(nll_ddim.mean()) - 0.8 * (float(nll_ddim.mean()) - mix.entropy(50000))
    ref, proj = mix.sample(4000, torch.Generator().manual_seed(7))[0], metrics.random_projections(2, 64, seed=0)
    assert metrics.sliced_w2(one, ref, proj) < 0.3 * metrics.sliced_w2(ddim, ref, proj)


def test_two_steps_no_worse_than_one(distilled):
    # Song et al. 2023, Table 1 (2-step no worse than 1-step). Same starting noise, so the NLL difference is
    # paired; its standard error is std(diff) / sqrt(n).
    mix, _, model, cfg, sd = distilled
    noise = torch.randn(4000, 2, generator=torch.Generator().manual_seed(6))
    one = _nll(mix, consistency_sample(model, noise, sample_sigmas(1, cfg, sd)))
    two = _nll(mix, consistency_sample(model, noise, sample_sigmas(2, cfg, sd), torch.Generator().manual_seed(3)))
    diff = two - one
    assert float(diff.mean()) <= 2 * float(diff.std()) / math.sqrt(diff.numel())


@pytest.mark.slow
def test_tuned_defaults_reach_low_nll_gap():
    # The recommended 2D settings (benchmarks/consistency_tuning.py baseline, ~30 s): 1-step NLL gap well under 1 nat
    # (DDIM of the teacher at 1 step: ~52), and each of 2 and 3 steps no worse than one fewer
    # (Song et al. 2023, Table 1).
    mix = archipelago()
    oracle = OracleDenoiser(mix)
    data = mix.sample(65536, torch.Generator().manual_seed(0))[0]
    draw = lambda g: (data[torch.randint(0, data.shape[0], (256,), generator=g)], None)  # noqa: E731
    student = _student(0, width=128, depth=3)
    train_loop(student, oracle_fit_loss(oracle), draw, LoopSpec(iterations=2000, lr=2e-3, warmup=50, decay="cosine"),
               generator=torch.Generator().manual_seed(1), quiet=True)
    cfg = dataclasses.replace(ConsistencyConfig(), sigma_max=20.0, weighting="inverse_gap", lr=1e-3, iterations=1000)
    sd = float(data.std())
    spec = LoopSpec(iterations=cfg.iterations, lr=cfg.lr, ema_decay=cfg.ema_decay, grad_clip=cfg.grad_clip)
    model = train_loop(ConsistencyModel(student, sd, cfg.sigma_min), consistency_loss(oracle, cfg, 2),
                       lambda g: draw(g), spec, generator=torch.Generator().manual_seed(2), quiet=True).model
    noise = torch.randn(4000, 2, generator=torch.Generator().manual_seed(5))
    nll = [_nll(mix, consistency_sample(model, noise, sample_sigmas(k, cfg, sd), torch.Generator().manual_seed(3)))
           for k in (1, 2, 3)]
    assert float(nll[0].mean()) - mix.entropy(50000) < 1.2
    for fewer, more in zip(nll, nll[1:]):
        diff = more - fewer
        assert float(diff.mean()) <= 2 * float(diff.std()) / math.sqrt(diff.numel())
