"""Schedules, the VE frame, the Karras grid and the eps/x0/v conversions (distillrun.schedule), each checked
against its published formula recomputed independently with numpy."""
from __future__ import annotations

import numpy as np
import pytest
import torch

from distillrun.schedule import (Schedule, eps_from_x0, karras_sigmas, v_from_x0_eps, x0_eps_from_v,
                                 x0_from_eps)

KINDS = ("cosine", "linear")


def _t(values) -> torch.Tensor:
    return torch.as_tensor(np.asarray(values, dtype=np.float64))


# ------------------------------------------------------------------------------------------ linear beta
def _discrete_linear_log_alpha_bar() -> np.ndarray:
    """log prod_{j<=i} (1 - beta_j), beta_j linear from 1e-4 to 0.02 over 1000 steps (Ho et al. 2020, Sec. 4)."""
    beta = np.linspace(1e-4, 0.02, 1000)
    return np.cumsum(np.log1p(-beta))


def test_linear_schedule_matches_discrete_product_for_small_t():
    # Source: Ho et al. 2020 (discrete betas 1e-4 -> 0.02, T = 1000); Song et al. 2021, Eq. 32 (continuous limit
    # beta(t) = 0.1 + 19.9 t). Where the betas are small (t <= 0.1, beta <= 0.002) the continuous alpha_t^2
    # agrees with prod(1 - beta_i) at t = i / 1000 to 1e-3 relative (measured max 8.2e-4 at t = 0.1).
    i = np.arange(1, 101)
    disc = np.exp(_discrete_linear_log_alpha_bar()[i - 1])
    cont = np.exp(Schedule("linear").log_alpha2(_t(i / 1000)).numpy())
    np.testing.assert_allclose(cont, disc, rtol=1e-3, atol=0)


def test_linear_schedule_gap_to_discrete_product_is_the_second_order_term():
    # Source: as above. Over the full range the relative gap grows to ~7 % at t = 1, and its size is predicted:
    # log(1 - b) = -b - b^2/2 - b^3/3 - ..., and the continuous form keeps only the first-order term, so
    #   log abar_disc(i) - log alpha^2(i/1000) = [int beta - sum_j beta_j] - sum_j beta_j^2 / 2 - sum_j beta_j^3 / 3 ...
    # The Riemann-sum error of the linear ramp is 1e-8 i^2 - 9.96e-6 i (closed form, |.| <= 2.5e-3) and the
    # cubic term is <= 1000 * 0.02^3 / 12 = 6.7e-4, so after removing the quadratic term the rest is < 4e-3.
    beta = np.linspace(1e-4, 0.02, 1000)
    i = np.arange(1, 1001)
    gap = _discrete_linear_log_alpha_bar() - Schedule("linear").log_alpha2(_t(i / 1000)).numpy()
    second_order = -np.cumsum(beta**2) / 2
    assert np.abs(gap - second_order).max() < 4e-3
    assert abs(gap[-1]) > 0.05  # the quadratic term really matters at t = 1 (so the bound above is not vacuous)


# ---------------------------------------------------------------------------------------------- cosine
def test_cosine_alpha2_matches_nichol_dhariwal_formula():
    # Source: Nichol & Dhariwal 2021, Eq. 17: alpha_bar(t) = f(t) / f(0), f(t) = cos^2(pi/2 (t + s)/(1 + s)), s = 0.008.
    t = np.linspace(0.0, 1.0, 1001)
    s = 0.008
    f = np.cos(np.pi / 2 * (t + s) / (1 + s)) ** 2
    expected = f / f[0]
    alpha, sigma = Schedule("cosine").alpha_sigma(_t(t))
    np.testing.assert_allclose(alpha.numpy() ** 2, expected, rtol=1e-10, atol=1e-14)
    np.testing.assert_allclose(sigma.numpy() ** 2, 1 - expected, rtol=1e-10, atol=1e-14)


@pytest.mark.parametrize("kind", KINDS)
def test_variance_preserving(kind):
    # Definition of a VP process (Song et al. 2021, VP SDE): alpha^2 + sigma^2 = 1.
    alpha, sigma = Schedule(kind).alpha_sigma(_t(np.linspace(0, 1, 513)))
    np.testing.assert_allclose((alpha**2 + sigma**2).numpy(), 1.0, rtol=0, atol=1e-14)
    assert float(alpha[0]) == 1.0 and float(sigma[0]) == 0.0  # t = 0 is the data itself


@pytest.mark.parametrize("kind", KINDS)
def test_logsnr_matches_definition_and_decreases(kind):
    # Definition (Kingma et al. 2021): lambda = log(alpha^2 / sigma^2), strictly decreasing in t.
    t = _t(np.linspace(1e-4, 1.0, 2001))
    sch = Schedule(kind)
    lam = sch.logsnr(t)
    alpha, sigma = sch.alpha_sigma(t)
    inner = slice(0, -1) if kind == "cosine" else slice(None)  # cosine alpha_1 ~ 6e-17: compare log only inside
    np.testing.assert_allclose(lam[inner].numpy(), np.log(alpha[inner].numpy() ** 2 / sigma[inner].numpy() ** 2),
                               rtol=1e-9, atol=1e-9)
    assert bool((lam[1:] < lam[:-1]).all())


@pytest.mark.parametrize("kind", KINDS)
def test_t_from_logsnr_inverts_logsnr(kind):
    # Inverse function: t(lambda(t)) = t (closed forms of both schedules, Nichol & Dhariwal 2021; Song et al. 2021).
    sch = Schedule(kind)
    t = _t(np.linspace(1e-3, 0.999, 999))
    np.testing.assert_allclose(sch.t_from_logsnr(sch.logsnr(t)).numpy(), t.numpy(), rtol=0, atol=1e-9)
    lam = _t(np.linspace(-12, 12, 97))
    np.testing.assert_allclose(sch.logsnr(sch.t_from_logsnr(lam)).numpy(), lam.numpy(), rtol=0, atol=1e-7)


@pytest.mark.parametrize("kind", KINDS)
def test_sigma_ve_is_noise_to_signal_ratio(kind):
    # Karras et al. 2022, Sec. 2 / Appendix C.1: the VE view x / alpha has noise level sigma_ve = sigma / alpha
    # = exp(-lambda / 2); t_from_sigma_ve inverts it.
    sch = Schedule(kind)
    t = _t(np.linspace(0.01, 0.99, 99))
    alpha, sigma = sch.alpha_sigma(t)
    ve = sch.sigma_ve(t)
    np.testing.assert_allclose(ve.numpy(), np.exp(-0.5 * sch.logsnr(t).numpy()), rtol=1e-12)
    np.testing.assert_allclose(ve.numpy(), (sigma / alpha).numpy(), rtol=1e-9)
    np.testing.assert_allclose(sch.t_from_sigma_ve(ve).numpy(), t.numpy(), atol=1e-9)


def test_cosine_top_time_has_zero_snr():
    # Common practice (no single source): sampling starts from pure noise, so the top time must have SNR ~ 0.
    alpha, sigma = Schedule("cosine").alpha_sigma(torch.tensor(1.0, dtype=torch.float64))
    assert float(alpha) < 1e-8
    assert float(sigma) == pytest.approx(1.0, abs=1e-15)


# ----------------------------------------------------------------------------------------- Karras grid
@pytest.mark.parametrize("n,sigma_min,sigma_max,rho",
                         [(18, 0.002, 80.0, 7.0), (5, 0.01, 20.0, 3.0), (2, 0.1, 1.0, 1.0)])
def test_karras_sigmas_eq5(n, sigma_min, sigma_max, rho):
    # Source: Karras et al. 2022, Eq. 5 (without the appended sigma_N = 0), computed by hand with numpy.
    i = np.arange(n)
    expected = (sigma_max ** (1 / rho) + i / (n - 1) * (sigma_min ** (1 / rho) - sigma_max ** (1 / rho))) ** rho
    got = karras_sigmas(n, sigma_min, sigma_max, rho).numpy()
    np.testing.assert_allclose(got, expected, rtol=1e-12)
    assert got[0] == pytest.approx(sigma_max, rel=1e-12) and got[-1] == pytest.approx(sigma_min, rel=1e-12)
    assert np.all(np.diff(got) < 0)


def test_karras_sigmas_rejects_single_point():
    with pytest.raises(ValueError):
        karras_sigmas(1, 0.002, 80.0)


# ------------------------------------------------------------------------------------------ conversions
@pytest.mark.parametrize("kind", KINDS)
def test_parameterization_round_trips(kind):
    # Salimans & Ho 2022, Sec. 4 and Appendix D: x_t = alpha x0 + sigma eps, v = alpha eps - sigma x0, and with
    # alpha^2 + sigma^2 = 1: x0 = alpha x_t - sigma v, eps = sigma x_t + alpha v.
    g = torch.Generator().manual_seed(0)
    x0 = torch.randn(64, 3, generator=g, dtype=torch.float64)
    eps = torch.randn(64, 3, generator=g, dtype=torch.float64)
    t = torch.rand(64, 1, generator=g, dtype=torch.float64) * 0.98 + 0.01
    alpha, sigma = Schedule(kind).alpha_sigma(t)
    x_t = alpha * x0 + sigma * eps
    torch.testing.assert_close(eps_from_x0(x_t, x0, alpha, sigma), eps, rtol=1e-9, atol=1e-9)
    torch.testing.assert_close(x0_from_eps(x_t, eps, alpha, sigma), x0, rtol=1e-9, atol=1e-9)
    v = v_from_x0_eps(x0, eps, alpha, sigma)
    torch.testing.assert_close(v, alpha * eps - sigma * x0, rtol=0, atol=0)
    x0_back, eps_back = x0_eps_from_v(x_t, v, alpha, sigma)
    torch.testing.assert_close(x0_back, x0, rtol=1e-12, atol=1e-12)
    torch.testing.assert_close(eps_back, eps, rtol=1e-12, atol=1e-12)


def test_v_by_hand():
    # Salimans & Ho 2022, Sec. 4: v = alpha eps - sigma x0; with alpha = 0.6, sigma = 0.8: v = 0.6 * 2 - 0.8 * 1 = 0.4.
    one = torch.tensor([1.0], dtype=torch.float64)
    assert float(v_from_x0_eps(one, 2 * one, 0.6, 0.8)) == pytest.approx(0.4, abs=1e-15)
    x0, eps = x0_eps_from_v(0.6 * one + 0.8 * 2 * one, 0.4 * one, 0.6, 0.8)
    assert float(x0) == pytest.approx(1.0, abs=1e-15) and float(eps) == pytest.approx(2.0, abs=1e-15)


def test_unknown_schedule_rejected():
    with pytest.raises(ValueError, match="unknown"):
        Schedule("quadratic")
