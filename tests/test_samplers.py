"""Samplers (distillrun.samplers) against outside references: the probability-flow ODE solved by
scipy.integrate.solve_ivp, the order of accuracy of Euler/Heun, the closed-form data distribution of Gaussian
data, the Euler = DDIM(eta=0) equivalence, and the DDIM-vs-ancestral ordering of Song et al. 2021."""
from __future__ import annotations

import math

import numpy as np
import pytest
import torch
from scipy.integrate import solve_ivp

from distillrun import metrics as M
from distillrun.data.mixture import archipelago
from distillrun.nets.oracle import OracleDenoiser
from distillrun.samplers import karras_grid, sample, uniform_grid
from distillrun.schedule import Schedule

torch.set_num_threads(1)

MEAN, STD = (1.0, -2.0), 0.5  # the Gaussian test data N(m, s^2 I), d = 2


class GaussianDenoiser:
    """Exact denoiser of data x0 ~ N(m, s^2 I) under x_t = alpha x0 + sigma eps, written independently of distillrun.

    x_t ~ N(alpha m, (alpha^2 s^2 + sigma^2) I) jointly Gaussian with x0, so (Gaussian conditioning, e.g. Bishop
    2006, Eq. 2.116) E[x0 | x_t] = m + alpha s^2 / (alpha^2 s^2 + sigma^2) (x_t - alpha m);
    eps_hat = (x_t - alpha x0_hat) / sigma. Implements the Denoiser interface (`schedule`, `predict`).
    """

    def __init__(self, schedule: Schedule, mean=MEAN, std: float = STD):
        self.m = torch.as_tensor(mean, dtype=torch.float64)
        self.s = float(std)
        self.schedule = schedule

    def predict(self, x_t, t, cond=None):
        alpha, sigma = self.schedule.alpha_sigma(torch.as_tensor(t, dtype=torch.float64))
        if alpha.dim() == 1:  # per-sample times (B,)
            alpha, sigma = alpha[:, None], sigma[:, None]
        x_t = x_t.to(torch.float64)
        x0_hat = self.m + alpha * self.s**2 / (alpha**2 * self.s**2 + sigma**2) * (x_t - alpha * self.m)
        return x0_hat, (x_t - alpha * x0_hat) / sigma


def _coef(sch: Schedule, t: float):
    a, s = sch.alpha_sigma(torch.tensor(t, dtype=torch.float64))
    return float(a), float(s)


def _noise(n: int, seed: int = 0) -> torch.Tensor:
    return torch.randn(n, 2, generator=torch.Generator().manual_seed(seed), dtype=torch.float64)


# ------------------------------------------------------------------------------ probability-flow ODE
T0, T1 = 0.9, 0.02  # start below t = 1 (finite sigma_ve) and stop above t = 0 (eps_hat is 0/0 at sigma = 0)


def ode_reference(kind: str, noise: torch.Tensor) -> np.ndarray:
    """Probability-flow ODE from x_{T0} = sigma_{T0} noise to T1 with scipy (DOP853, rtol 1e-10).

    cosine: the variance-exploding frame of Karras et al. 2022, Eq. 4 / Sec. 4: y = x / alpha, sigma_ve = sigma / alpha,
      dy/dsigma_ve = (y - D(y)) / sigma_ve = eps_hat.
    linear: the VP frame of Song et al. 2021, Eq. 13 with the VP SDE f = -beta(t) x / 2, g^2 = beta(t),
      beta(t) = 0.1 + 19.9 t (their Eq. 32): dx/dt = -beta(t) / 2 (x + score), score = -eps_hat / sigma_t.
    They are the same ODE: with f = d log alpha/dt and g^2 = alpha^2 d(sigma_ve^2)/dt (any VP process), substituting
    x = alpha y, score_x = -eps_hat / sigma into dx/dt = f x - g^2 score / 2 gives dy/dt = eps_hat dsigma_ve/dt.
    Doing one schedule in each frame checks the sampler against both forms.
    """
    sch = Schedule(kind)
    den = GaussianDenoiser(sch)
    shape = noise.shape
    _, s0 = _coef(sch, T0)
    x_start = (s0 * noise).numpy().ravel()
    if kind == "cosine":
        def rhs(sig, y):
            t = sch.t_from_sigma_ve(torch.tensor(sig, dtype=torch.float64))
            alpha = float(sch.alpha_sigma(t)[0])
            return den.predict(torch.from_numpy(alpha * y).reshape(shape), t)[1].numpy().ravel()
        ve = lambda t: float(sch.sigma_ve(torch.tensor(t, dtype=torch.float64)))  # noqa: E731
        a0, a1 = _coef(sch, T0)[0], _coef(sch, T1)[0]
        sol = solve_ivp(rhs, (ve(T0), ve(T1)), x_start / a0, method="DOP853", rtol=1e-10, atol=1e-12)
        return a1 * sol.y[:, -1].reshape(shape)

    def rhs(t, x):
        beta = 0.1 + 19.9 * t
        _, sigma = _coef(sch, t)
        eps_hat = den.predict(torch.from_numpy(x).reshape(shape), t)[1].numpy().ravel()
        return -0.5 * beta * (x - eps_hat / sigma)
    sol = solve_ivp(rhs, (T0, T1), x_start, method="DOP853", rtol=1e-10, atol=1e-12)
    return sol.y[:, -1].reshape(shape)


def _ode_error(kind: str, sampler: str, steps: int, noise: torch.Tensor, ref: np.ndarray) -> float:
    grid = torch.linspace(T0, T1, steps + 1, dtype=torch.float64)
    out = sample(GaussianDenoiser(Schedule(kind)), noise, grid, sampler)
    return float(np.abs(out.numpy() - ref).max())


def test_ode_reference_matches_closed_form():
    # The reference itself, against the closed form of the VE-frame ODE for Gaussian data (our derivation):
    # eps_hat = (y - m) sigma / (s^2 + sigma^2), so y(sigma) - m = (y0 - m) sqrt((s^2 + sigma^2) / (s^2 + sigma0^2)).
    noise = _noise(4)
    for kind in ("cosine", "linear"):
        sch = Schedule(kind)
        (a0, s0), (a1, s1) = _coef(sch, T0), _coef(sch, T1)
        m = np.asarray(MEAN)
        y0 = (s0 * noise.numpy()) / a0
        y1 = m + (y0 - m) * math.sqrt((STD**2 + (s1 / a1) ** 2) / (STD**2 + (s0 / a0) ** 2))
        np.testing.assert_allclose(ode_reference(kind, noise), a1 * y1, rtol=1e-8, atol=1e-9)


@pytest.mark.parametrize("kind", ["cosine", "linear"])
def test_ddim_converges_to_probability_flow_ode(kind):
    # Song et al. 2021 (DDIM, Sec. 4.3): DDIM with eta = 0 is an Euler discretisation of the probability-flow ODE,
    # so with many steps it reaches the scipy solution; first order, so error ~ C / N, and the Richardson
    # combination 2 x_(2N) - x_(N) cancels the C / N term (numerical analysis: Hairer, Norsett & Wanner, Sec. II.4).
    noise = _noise(4)
    ref = ode_reference(kind, noise)
    den = GaussianDenoiser(Schedule(kind))
    grid = lambda n: torch.linspace(T0, T1, n + 1, dtype=torch.float64)  # noqa: E731
    x_n, x_2n = sample(den, noise, grid(512), "ddim"), sample(den, noise, grid(1024), "ddim")
    assert np.abs(x_2n.numpy() - ref).max() < 5e-3  # measured 1.4e-3 (cosine), 2.2e-3 (linear)
    assert np.abs((2 * x_2n - x_n).numpy() - ref).max() < 2e-5  # measured 1.6e-6, 4.5e-6
    assert np.abs(sample(den, noise, grid(512), "heun").numpy() - ref).max() < 1e-4  # 2nd order; measured 8e-6, 2.3e-5


@pytest.mark.parametrize("kind", ["cosine", "linear"])
@pytest.mark.parametrize("sampler,ratio", [("ddim", 2.0), ("euler", 2.0), ("heun", 4.0)])
def test_order_of_accuracy(kind, sampler, ratio):
    # Numerical analysis (e.g. Hairer, Norsett & Wanner 1993, Ch. II): the global error of Euler is O(h) and of
    # Heun O(h^2), so doubling the steps divides the error by ~2 and ~4 (Karras et al. 2022, Sec. 3 uses this
    # to prefer Heun). Measured ratios: 1.93-1.99 and 3.95-4.06 for 32 -> 64 -> 128 steps.
    noise = _noise(4)
    ref = ode_reference(kind, noise)
    errs = [_ode_error(kind, sampler, n, noise, ref) for n in (32, 64, 128)]
    for coarse, fine in zip(errs[:-1], errs[1:]):
        assert coarse / fine == pytest.approx(ratio, rel=0.075)


# ------------------------------------------------------------------------------------- final samples
def _assert_gaussian(x: torch.Tensor, bias_allowance: float) -> None:
    """Sample mean and covariance of x (n, 2) against N(m, s^2 I), within 4 standard errors
    (SE of a mean s / sqrt(n), of a variance s^2 sqrt(2 / n), of a covariance s^2 / sqrt(n): normal theory,
    e.g. Anderson 2003, Sec. 3.4) plus an allowance for the sampler's own discretisation bias."""
    n = x.shape[0]
    x = x.numpy()
    mean, cov = x.mean(0), np.cov(x.T)
    np.testing.assert_allclose(mean, MEAN, rtol=0, atol=4 * STD / math.sqrt(n))
    var_tol = 4 * STD**2 * math.sqrt(2 / n) + bias_allowance
    np.testing.assert_allclose(np.diag(cov), STD**2, rtol=0, atol=var_tol)
    assert abs(cov[0, 1]) < 4 * STD**2 / math.sqrt(n) + bias_allowance


@pytest.mark.parametrize("kind", ["cosine", "linear"])
@pytest.mark.parametrize("sampler,steps", [("ddim", 500), ("heun", 100)])
def test_deterministic_samples_have_data_mean_and_cov(kind, sampler, steps):
    # Closed form: the data is N(m, s^2 I). Discretisation bias of the variance, measured: DDIM ~0.42 / N
    # (0.0008 at 500 steps), Heun ~0.0015 at 50 steps; the allowance 1 / N covers both. On the linear schedule the
    # start x_1 = sigma_1 noise ignores alpha_1 m (alpha_1 = 0.0066); its effect on the end point is ~3e-3 s m
    # (y0 is off by m, scaled by s / sqrt(s^2 + sigma_ve^2)), well inside the tolerance.
    n = 20000
    x = sample(GaussianDenoiser(Schedule(kind)), _noise(n, 1), uniform_grid(steps), sampler)
    _assert_gaussian(x, 1.0 / steps)


def test_deterministic_samples_fail_at_few_steps():
    # Sanity for the check above (it is not vacuous): DDIM at 10 steps shrinks the variance by ~25 % (measured).
    x = sample(GaussianDenoiser(Schedule("cosine")), _noise(20000, 1), uniform_grid(10), "ddim")
    with pytest.raises(AssertionError):
        _assert_gaussian(x, 0.0)


def test_ancestral_samples_have_data_mean_and_cov():
    # Closed form N(m, s^2 I) again. Ancestral sampling (DDIM eta = 1 = DDPM posterior steps, Song et al. 2021,
    # Sec. 4.1; Ho et al. 2020) uses the mean of q(x_s | x_t, x0_hat) and ignores Var[x0 | x_t], so its variance is
    # biased low by ~1.5 / N (measured); allowance 3 / N at N = 1000.
    n, steps = 10000, 1000
    x = sample(GaussianDenoiser(Schedule("cosine")), _noise(n, 2), uniform_grid(steps), "ancestral",
               generator=torch.Generator().manual_seed(3))
    _assert_gaussian(x, 3.0 / steps)


class _FixedPrediction:
    """A denoiser that predicts x0_hat = 1 and eps_hat = 1 everywhere, to look at one step's noise alone."""

    def __init__(self, schedule: Schedule):
        self.schedule = schedule

    def predict(self, x_t, t, cond=None):
        return torch.ones_like(x_t), torch.ones_like(x_t)


@pytest.mark.parametrize("kind,t,s", [("cosine", 0.6, 0.5), ("linear", 0.3, 0.1), ("cosine", 1.0, 0.75)])
def test_ancestral_step_has_the_ddpm_posterior_variance(kind, t, s):
    # One DDIM step at eta = 1 (Song et al. 2021, Eq. 12 and 16): x_s = alpha_s x0_hat + sqrt(sigma_s^2 - c^2) eps_hat
    # + c z with c^2 the variance of q(x_s | x_t, x0), i.e. DDPM's beta-tilde (Ho et al. 2020, Eq. 7), which in VP
    # form is sigma_s^2 (1 - alpha_t^2 sigma_s^2 / (alpha_s^2 sigma_t^2)). Checked on 200k draws, within 4 SE.
    from distillrun.samplers import ddim_step

    sch = Schedule(kind)
    (a_t, s_t), (a_s, s_s) = _coef(sch, t), _coef(sch, s)
    c2 = s_s**2 * (1 - a_t**2 * s_s**2 / (a_s**2 * s_t**2))
    n = 200_000
    x = ddim_step(_FixedPrediction(sch), torch.zeros(n, 1, dtype=torch.float64), t, s, eta=1.0,
                  generator=torch.Generator().manual_seed(6))
    mean = a_s + math.sqrt(s_s**2 - c2)
    assert abs(float(x.mean()) - mean) < 4 * math.sqrt(c2 / n)
    assert abs(float(x.var()) - c2) < 4 * c2 * math.sqrt(2 / n)


def test_ancestral_is_stochastic_given_the_start_noise():
    # Ancestral sampling adds fresh noise at every step (Ho et al. 2020, Alg. 2); DDIM at eta = 0 does not.
    den, noise, grid = GaussianDenoiser(Schedule("cosine")), _noise(256, 4), uniform_grid(20)
    a = sample(den, noise, grid, "ancestral", generator=torch.Generator().manual_seed(0))
    b = sample(den, noise, grid, "ancestral", generator=torch.Generator().manual_seed(1))
    assert (a - b).abs().mean() > 0.05
    assert torch.equal(sample(den, noise, grid, "ddim"), sample(den, noise, grid, "ddim"))


# ------------------------------------------------------------------------------------- Euler = DDIM
@pytest.mark.parametrize("kind", ["cosine", "linear"])
def test_euler_equals_ddim_eta0(kind):
    # Karras et al. 2022, Sec. 3 / Appendix B.2: DDIM (eta = 0) is Euler's method on dy/dsigma_ve = eps_hat in the
    # VE frame y = x / alpha. Euler written out by hand here: y_s = y_t + (sigma_ve_s - sigma_ve_t) eps_hat(x_t).
    sch = Schedule(kind)
    den = GaussianDenoiser(sch)
    noise = _noise(64, 5)
    grid = karras_grid(12, sch, 0.01, 50.0)  # a non-uniform grid, ending at t = 0
    ddim, euler = sample(den, noise, grid, "ddim"), sample(den, noise, grid, "euler")
    assert torch.equal(ddim, euler)
    ts = [float(v) for v in grid]
    x = _coef(sch, ts[0])[1] * noise
    for t, s in zip(ts[:-1], ts[1:]):
        (a_t, s_t), (a_s, s_s) = _coef(sch, t), _coef(sch, s)
        eps_hat = den.predict(x, t)[1]
        x = a_s * (x / a_t + (s_s / a_s - s_t / a_t) * eps_hat) if s > 0 else den.predict(x, t)[0]
    torch.testing.assert_close(ddim, x, rtol=1e-10, atol=1e-10)


# --------------------------------------------------------------------------- DDIM versus ancestral
@pytest.mark.parametrize("steps", [3, 4])
def test_ddim_beats_ancestral_at_few_steps(steps):
    # Song et al. 2021, Table 1: at few steps DDIM (eta = 0) is far better than eta = 1 (CIFAR-10, 10 steps: FID ~13
    # vs ~41; values from memory). Checked here as an ordering on the archipelago mixture with the exact oracle
    # denoiser. Metric: MMD^2 (Gretton et al. 2012; RBF bandwidth 0.3, about one island's size: our choice) of
    # n = 8000 samples against 8000 exact draws, as the mean over 16 paired blocks of 500 (same reference block for
    # both samplers), so the SE of the difference is std(block differences) / 4. Measured over 8 seeds: ancestral is
    # 14-29 % worse, z = 3.2-8.8; we assert DDIM better by more than 2 SE. (Gap is smaller than on CIFAR-10: an
    # exact denoiser on 2D data leaves DDIM little to lose.)
    mix = archipelago()
    oracle = OracleDenoiser(mix)
    n, blocks = 8000, 16
    ref = mix.sample(n, torch.Generator().manual_seed(100))[0].double()
    noise = _noise(n, 0)
    ddim = sample(oracle, noise, uniform_grid(steps), "ddim")
    anc = sample(oracle, noise, uniform_grid(steps), "ancestral", generator=torch.Generator().manual_seed(1000))

    def block_mmd(x):
        return np.array([M.mmd2_rbf(a, r, 0.3) for a, r in zip(x.tensor_split(blocks), ref.tensor_split(blocks))])
    diff = block_mmd(ddim) - block_mmd(anc)
    se = diff.std(ddof=1) / math.sqrt(blocks)
    assert diff.mean() < -2 * se
