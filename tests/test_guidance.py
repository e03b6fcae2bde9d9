"""Classifier-free guidance and the guided-distillation building blocks (distillrun.guidance) against outside
references: the definition x_w = (1 + w) x(z, c) - w x(z, null) (Ho & Salimans 2022, Eq. 6, written with w = 0 the
conditional model as in Meng et al. 2023, Eq. 2), Tweedie's formula on densities from scipy.stats, the
probability-flow ODE solved by scipy.integrate.solve_ivp, and the stochastic sampler as Meng et al. 2023 describe it."""
from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp
from scipy.stats import multivariate_normal

from distillrun.data.mixture import archipelago
from distillrun.denoiser import GuidanceCond, NetDenoiser
from distillrun.guidance import Guided, WithWeight, guided, renoise, stochastic_sample
from distillrun.methods.teacher import drop_labels
from distillrun.nets import build_net
from distillrun.nets.oracle import OracleDenoiser
from distillrun.samplers import sample, uniform_grid
from distillrun.schedule import Schedule

torch.set_num_threads(1)
K = 6  # archipelago islands = labels; label K is the null label


def _points(n: int, seed: int = 0) -> tuple[torch.Tensor, torch.Tensor]:
    g = torch.Generator().manual_seed(seed)
    return torch.randn(n, 2, generator=g, dtype=torch.float64) * 1.3, torch.randint(0, K, (n,), generator=g)


def _coef(sch: Schedule, t: float):
    a, s = sch.alpha_sigma(torch.tensor(t, dtype=torch.float64))
    return float(a), float(s)


# ----------------------------------------------------------------------------------- the exact guided teacher
@pytest.mark.parametrize("t", [0.05, 0.3, 0.7, 0.95])
def test_guided_at_w0_is_the_conditional_denoiser(t):
    # Definition (Meng et al. 2023, Eq. 2 with w = 0): the guided prediction is the class-conditional one.
    oracle = OracleDenoiser(archipelago(), labelled=True)
    x, labels = _points(64)
    want = oracle.predict(x, t, labels)
    got = Guided(oracle, K, w=0.0).predict(x, t, labels)
    for a, b in zip(got, want):
        torch.testing.assert_close(a, b, rtol=0, atol=1e-12)
    # ... and at w != 0 it is not (the combination is really applied):
    assert (Guided(oracle, K, w=1.0).predict(x, t, labels)[0] - want[0]).abs().max() > 1e-3


def _log_density(x: np.ndarray, mix, alpha: float, sigma: float, label: int | None) -> float:
    """log p_t(x | label) (one Gaussian) or log p_t(x) (the mixture), with scipy.stats, from the definition of the
    noisy marginal: x_t = alpha x0 + sigma eps turns N(mu, S) into N(alpha mu, alpha^2 S + sigma^2 I)."""
    means, covs, weights = mix.means.numpy(), mix.covs.numpy(), mix.weights.numpy()
    dens = [multivariate_normal(alpha * means[k], alpha**2 * covs[k] + sigma**2 * np.eye(2)).pdf(x) for k in range(K)]
    if label is not None:
        return math.log(dens[label])
    return math.log(sum(w * d for w, d in zip(weights, dens)))


@pytest.mark.parametrize("w", [0.0, 1.0, 3.0])
@pytest.mark.parametrize("t", [0.2, 0.6])
def test_guided_denoiser_matches_tweedie_on_scipy_densities(w, t):
    # One Gaussian per label (the archipelago's islands): the guided eps-prediction is the tilted score
    # eps_w = -sigma [(1 + w) grad log p_t(x | c) - w grad log p_t(x)] (Tweedie's formula, Efron 2011: eps_hat =
    # -sigma grad log p_t; the combination is linear). Densities from scipy.stats, gradients by central differences.
    mix = archipelago()
    sch = Schedule("cosine")
    alpha, sigma = _coef(sch, t)
    x, labels = _points(12, seed=3)
    got_x0, got_eps = Guided(OracleDenoiser(mix, sch, labelled=True), K, w=w).predict(x, t, labels)
    h = 1e-5
    for i in range(len(x)):
        grad = np.zeros(2)
        for j in range(2):
            e = np.zeros(2)
            e[j] = h
            xp, xm = x[i].numpy() + e, x[i].numpy() - e
            lc = (_log_density(xp, mix, alpha, sigma, int(labels[i])) - _log_density(xm, mix, alpha, sigma, int(labels[i])))
            lu = (_log_density(xp, mix, alpha, sigma, None) - _log_density(xm, mix, alpha, sigma, None))
            grad[j] = ((1 + w) * lc - w * lu) / (2 * h)
        eps = -sigma * grad
        x0 = (x[i].numpy() + sigma**2 * grad) / alpha  # Tweedie in x0 form: E[x0|x_t] = (x_t + sigma^2 score) / alpha
        np.testing.assert_allclose(got_eps[i].numpy(), eps, rtol=1e-5, atol=1e-6)
        np.testing.assert_allclose(got_x0[i].numpy(), x0, rtol=1e-5, atol=1e-6)


def test_null_label_and_none_are_the_unconditional_denoiser():
    oracle = OracleDenoiser(archipelago(), labelled=True)
    x, _ = _points(32)
    uncond = oracle.predict(x, 0.4)
    torch.testing.assert_close(oracle.predict(x, 0.4, torch.full((32,), K))[0], uncond[0], rtol=0, atol=0)
    # the unlabelled oracle (the existing unconditional teacher) ignores labels
    torch.testing.assert_close(OracleDenoiser(archipelago()).predict(x, 0.4, torch.zeros(32, dtype=torch.long))[0],
                               uncond[0], rtol=0, atol=0)
    with pytest.raises(ValueError, match="labels must lie"):
        oracle.predict(x, 0.4, torch.full((32,), K + 1))


T0, T1 = 0.9, 0.02


def test_guided_ddim_converges_to_guided_probability_flow_ode():
    # DDIM (eta = 0) is an Euler discretisation of the probability-flow ODE (Song et al. 2021, DDIM Sec. 4.3); the ODE
    # in the variance-exploding frame y = x / alpha, dy/dsigma_ve = eps_hat (Karras et al. 2022, Eq. 4), here with the
    # guided eps of the exact teacher, solved by scipy (DOP853, rtol 1e-10). First order: error ~ C / N.
    sch = Schedule("cosine")
    den = Guided(OracleDenoiser(archipelago(), sch, labelled=True), K, w=2.0)
    x, labels = _points(8, seed=5)
    noise = x / 1.3
    _, s0 = _coef(sch, T0)
    a0, a1 = _coef(sch, T0)[0], _coef(sch, T1)[0]

    def rhs(sig, y):
        t = sch.t_from_sigma_ve(torch.tensor(sig, dtype=torch.float64))
        alpha = float(sch.alpha_sigma(t)[0])
        return den.predict(torch.from_numpy(alpha * y).reshape(8, 2), float(t), labels)[1].numpy().ravel()

    ve = lambda t: float(sch.sigma_ve(torch.tensor(t, dtype=torch.float64)))  # noqa: E731
    sol = solve_ivp(rhs, (ve(T0), ve(T1)), (s0 * noise).numpy().ravel() / a0, method="DOP853", rtol=1e-10, atol=1e-12)
    ref = a1 * sol.y[:, -1].reshape(8, 2)
    errs = []
    for steps in (256, 1024):
        grid = torch.linspace(T0, T1, steps + 1, dtype=torch.float64)
        errs.append(float(np.abs(sample(den, noise, grid, "ddim", cond=labels).numpy() - ref).max()))
    # measured: 64 steps 7.8e-3, 256 steps 2.0e-3, 1024 steps 5.0e-4 (first order: ratio ~4)
    assert errs[1] < 1e-3, errs
    assert 3.0 < errs[0] / errs[1] < 5.0, errs


# ----------------------------------------------------------------------------------------- cost in evaluations
class Recorder:
    """A Denoiser that records each call's times and batch rows (its answer: the Gaussian-data closed form)."""

    def __init__(self, schedule=Schedule("cosine")):
        self.schedule, self.calls = schedule, []

    def predict(self, x_t, t, cond=None):
        t = torch.as_tensor(t, dtype=torch.float64)
        self.calls.append((t.reshape(-1)[0].item(), x_t.shape[0], cond))
        alpha, sigma = self.schedule.alpha_sigma(t)
        alpha = alpha.reshape(-1, 1) if alpha.dim() else alpha
        sigma = sigma.reshape(-1, 1) if sigma.dim() else sigma
        x0 = alpha * 0.25 / (alpha**2 * 0.25 + sigma**2) * x_t.double()  # data N(0, 0.5^2 I)
        return x0.to(x_t.dtype), ((x_t.double() - alpha * x0) / sigma).to(x_t.dtype)


def test_guided_teacher_costs_two_evaluations_per_step_student_one():
    rec = Recorder()
    den = Guided(rec, K, w=1.5)
    noise, labels = torch.randn(10, 2), torch.arange(10) % K
    sample(den, noise, uniform_grid(8), "ddim", cond=labels)
    assert den.evaluations == 16
    assert len(rec.calls) == 8 and all(rows == 20 for _, rows, _ in rec.calls)  # one pass of 2B rows per step
    assert all(torch.equal(c[10:], torch.full((10,), K)) and torch.equal(c[:10], labels) for _, _, c in rec.calls)
    rec2 = Recorder()
    sample(WithWeight(rec2, 1.5), noise, uniform_grid(8), "ddim", cond=labels)
    assert len(rec2.calls) == 8 and all(rows == 10 for _, rows, _ in rec2.calls)
    assert all(isinstance(c, GuidanceCond) and torch.all(c.w == 1.5) for _, _, c in rec2.calls)


def test_guided_combination_is_per_row():
    a, b = torch.ones(3, 2), torch.zeros(3, 2)
    torch.testing.assert_close(guided(a, b, torch.tensor([0.0, 1.0, 2.5])),
                               torch.tensor([[1.0, 1.0], [2.0, 2.0], [3.5, 3.5]]))


# ------------------------------------------------------------------------------------- stochastic sampler
def test_stochastic_sampler_follows_meng_et_al_description():
    # Meng et al. 2023, Sec. 4 (stochastic sampling; from memory of the paper's description), transcribed
    # independently here: on the N-step grid, from t_i
    # one deterministic DDIM step of twice the step length (to t_{i+2}), then one stochastic step back (to t_{i+1})
    # with the forward process q(x_{t_{i+1}} | x_{t_{i+2}}); the last step is deterministic to 0.
    sch = Schedule("cosine")
    steps, noise = 4, torch.randn(6, 2, generator=torch.Generator().manual_seed(1), dtype=torch.float64)
    rec = Recorder(sch)
    got = stochastic_sample(rec, noise, steps, generator=torch.Generator().manual_seed(7))
    assert [round(t, 12) for t, _, _ in rec.calls] == [1.0, 0.75, 0.5, 0.25]  # one evaluation per step

    g, ref = torch.Generator().manual_seed(7), Recorder(sch)
    x = noise * _coef(sch, 1.0)[1]
    ts = [1.0, 0.75, 0.5, 0.25, 0.0]
    for i in range(steps):
        x0, eps = ref.predict(x, ts[i])
        if i == steps - 1:
            x = _coef(sch, 0.0)[0] * x0 + _coef(sch, 0.0)[1] * eps
            break
        (a2, s2), (a1, s1) = _coef(sch, ts[i + 2]), _coef(sch, ts[i + 1])
        x2 = a2 * x0 + s2 * eps
        z = torch.randn(x.shape, generator=g, dtype=x.dtype)
        x = (a1 / a2) * x2 + math.sqrt(s1**2 - (a1 / a2) ** 2 * s2**2) * z
    torch.testing.assert_close(got, x, rtol=0, atol=1e-12)


def test_renoise_is_the_forward_transition():
    # If x_s has the marginal of x_s = alpha_s x0 + sigma_s eps (x0 ~ N(0, v)), renoise(x_s) to t > s must have the
    # marginal of time t: variance alpha_t^2 v + sigma_t^2 (VP forward process, Kingma et al. 2021, Eq. 33).
    sch, v, n = Schedule("cosine"), 0.3, 400_000
    (a_s, s_s), (a_t, s_t) = _coef(sch, 0.3), _coef(sch, 0.55)
    g = torch.Generator().manual_seed(0)
    x_s = math.sqrt(a_s**2 * v + s_s**2) * torch.randn(n, generator=g, dtype=torch.float64)
    x_t = renoise(x_s, a_s, s_s, a_t, s_t, torch.randn(n, generator=g, dtype=torch.float64))
    want = a_t**2 * v + s_t**2
    assert abs(float(x_t.var()) - want) < 4 * want * math.sqrt(2 / n)  # 4 standard errors of a sample variance


# ------------------------------------------------------------------------------------ nets: null label, w
@pytest.mark.parametrize("kind,shape", [("mlp", (2,)), ("unet", (1, 8, 8))])
def test_w_embedding_starts_with_zero_effect_and_learns(kind, shape):
    torch.manual_seed(0)
    kw = dict(width=32, depth=2) if kind == "mlp" else dict(base=8, mults=(1, 2))
    teacher = build_net(kind, shape, K, **kw)
    student = build_net(kind, shape, K, guidance=True, **kw)
    missing, unexpected = student.load_state_dict(teacher.state_dict(), strict=False)
    assert not unexpected and missing and all(k.startswith("embed.guidance_mlp") for k in missing)
    x, t, labels = torch.randn(5, *shape), torch.rand(5), torch.arange(5)
    for w in (0.0, 1.0, 4.0):
        out = student(x, t, GuidanceCond(labels, torch.full((5,), w)))
        torch.testing.assert_close(out, teacher(x, t, labels), rtol=0, atol=0)
    loss = student(x, t, GuidanceCond(labels, torch.linspace(0, 4, 5))).square().mean()
    loss.backward()
    assert student.embed.guidance_mlp[-1].weight.grad.abs().sum() > 0  # w can start to matter after one step
    with pytest.raises(ValueError, match="guidance weight"):
        student(x, t, labels)


def test_label_dropout_rate_and_no_draw_at_zero():
    g = torch.Generator().manual_seed(0)
    cond = torch.randint(0, K, (200_000,), generator=g)
    state = g.get_state()
    assert drop_labels(cond, 0.0, K, g) is cond and torch.equal(g.get_state(), state)
    out = drop_labels(cond, 0.15, K, g)
    share = float((out == K).float().mean())
    assert abs(share - 0.15) < 4 * math.sqrt(0.15 * 0.85 / len(cond))  # binomial: 4 standard errors
    assert torch.equal(out[out != K], cond[out != K])


@pytest.mark.slow
def test_trained_teacher_with_label_dropout_learns_the_unconditional_denoiser():
    # Ho & Salimans 2022, Alg. 1: with label dropout one network also learns the unconditional denoiser.
    # Measured (1500 iterations, MLP 128 x 3): RMS x0 error of the null-label output against the exact unconditional
    # denoiser 0.052 with dropout 0.2, 0.64 without (the null embedding never trained). Tolerance 0.1 (data std ~1).
    errs = _trained_teacher_check()
    assert errs[0.2] < 0.1, errs
    assert errs[0.0] > 5 * errs[0.2], errs


def _trained_teacher_check(iterations: int = 1500):
    """Train a class-conditional MLP with the denoising loss on the labelled archipelago, with label dropout 0.2
    and without; the null-label output is compared with the exact unconditional denoiser (RMS of x0 errors over
    x_t from the noisy marginal at t in {0.1, 0.3, 0.5, 0.7, 0.9})."""
    from distillrun.methods.teacher import denoising_loss_with_dropout
    from distillrun.training import LoopSpec, train_loop

    mix = archipelago()
    sch = Schedule("cosine")
    x_all, lab_all = mix.sample(65536, torch.Generator().manual_seed(0))
    oracle = OracleDenoiser(mix, sch, labelled=True)

    def draw(g):
        idx = torch.randint(0, len(x_all), (512,), generator=g)
        return x_all[idx], lab_all[idx]

    errs = {}
    for p in (0.2, 0.0):
        torch.manual_seed(0)
        den = NetDenoiser(build_net("mlp", (2,), K, width=128, depth=3), "v", sch)
        res = train_loop(den, denoising_loss_with_dropout(p, K), draw,
                         LoopSpec(iterations=iterations, lr=2e-3, warmup=100, decay="cosine", save_every=10**9),
                         generator=torch.Generator().manual_seed(1), quiet=True)
        net = res.model
        g = torch.Generator().manual_seed(2)
        sq = []
        for t in (0.1, 0.3, 0.5, 0.7, 0.9):
            a, s = _coef(sch, t)
            x0, _ = mix.sample(2000, g)
            x_t = a * x0 + s * torch.randn(2000, 2, generator=g)
            with torch.no_grad():
                got = net.predict(x_t, torch.full((2000,), t), torch.full((2000,), K))[0]
            sq.append(((got.double() - oracle.predict(x_t, t)[0].double()) ** 2).sum(1).mean())
        errs[p] = float(torch.stack(sq).mean().sqrt())
    return errs
