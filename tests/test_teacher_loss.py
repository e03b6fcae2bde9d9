"""The teacher's denoising loss on Gaussian data, against the closed-form posterior.

Data x0 ~ N(m, s^2 I) and x_t = alpha x0 + sigma eps make (x0, x_t) jointly Gaussian, so (Bishop 2006, Eqs. 2.116
and 2.117, the linear-Gaussian model)
    E[x0 | x_t]   = m + alpha s^2 / (alpha^2 s^2 + sigma^2) (x_t - alpha m)         (Tweedie's formula agrees)
    Var[x0 | x_t] = s^2 sigma^2 / (alpha^2 s^2 + sigma^2)            per coordinate.
The other targets are linear in (x0, x_t): eps = (x_t - alpha x0) / sigma and v = alpha eps - sigma x0
(Salimans & Ho 2022, Sec. 4), so E[eps | x_t] and E[v | x_t] follow from E[x0 | x_t], and
Var[eps | x_t] = alpha^2 / sigma^2 Var[x0 | x_t], Var[v | x_t] = Var[x0 | x_t] / sigma^2.

A squared-error loss is minimised by the conditional mean of its target (common practice: the regression
function). So with a network that outputs the closed-form conditional mean, the loss residual out - target must
have zero mean given x_t (checked against 1 and x_t, the features the conditional mean is linear in), and the loss
must equal the average posterior variance. Both fail if the loss uses a wrong target for a parameterisation.
"""
import math

import pytest
import torch

from distillrun.denoiser import NetDenoiser
from distillrun.methods.teacher import denoising_loss
from distillrun.schedule import Schedule

M, S = torch.tensor([0.3, -0.2], dtype=torch.float64), 0.5
BATCH = 20000


class PosteriorMeanNet(torch.nn.Module):
    """Outputs E[target | x_t] in closed form for N(M, S^2 I) data; keeps its last input and output."""

    def __init__(self, parameterization: str, schedule: Schedule):
        super().__init__()
        self.parameterization, self.schedule = parameterization, schedule

    def forward(self, x_t, t, cond=None):
        x = x_t.to(torch.float64)
        alpha, sigma = (c.to(torch.float64)[:, None] for c in self.schedule.alpha_sigma(t.to(torch.float64)))
        x0 = M + alpha * S**2 / (alpha**2 * S**2 + sigma**2) * (x - alpha * M)  # Bishop 2006, Eq. 2.116
        eps = (x - alpha * x0) / sigma
        out = {"x0": x0, "eps": eps, "v": alpha * eps - sigma * x0}[self.parameterization]
        self.x_t, self.t, self.alpha, self.sigma = x, t, alpha, sigma
        self.out = out.to(x_t.dtype).requires_grad_(True)
        return self.out


@pytest.mark.parametrize("kind", ["cosine", "linear"])
@pytest.mark.parametrize("parameterization", ["eps", "x0", "v"])
def test_denoising_loss_is_minimised_by_the_closed_form_posterior_mean(parameterization, kind):
    net = PosteriorMeanNet(parameterization, Schedule(kind))
    model = NetDenoiser(net, parameterization, Schedule(kind))
    x0 = (M + S * torch.randn(BATCH, 2, dtype=torch.float64, generator=torch.Generator().manual_seed(0))).float()
    loss = denoising_loss(model, model, (x0, None), torch.Generator().manual_seed(1))
    loss.backward()
    # The loss is mean((out - target)^2) over all B x d entries, so d loss / d out = 2 (out - target) / (B d).
    residual = (net.out.grad * net.out.numel() / 2).to(torch.float64)  # out - target, per entry
    torch.testing.assert_close(float(loss.detach()), float(residual.pow(2).mean()), rtol=1e-4, atol=0)

    # 1. Zero conditional mean: E[residual * phi(x_t)] = 0 for phi = 1, x_t[0], x_t[1] (each within 5 se).
    for phi in (torch.ones(BATCH, 1, dtype=torch.float64), net.x_t[:, :1], net.x_t[:, 1:]):
        prod = residual * phi
        z = prod.mean(0) / (prod.std(0) / math.sqrt(BATCH))
        assert bool((z.abs() < 5).all()), (parameterization, z)

    # 2. The loss is the average posterior variance of the target (Bishop 2006, Eq. 2.117).
    var_x0 = S**2 * net.sigma**2 / (net.alpha**2 * S**2 + net.sigma**2)
    var = {"x0": var_x0, "eps": net.alpha**2 / net.sigma**2 * var_x0, "v": var_x0 / net.sigma**2}[parameterization]
    per_sample = residual.pow(2).mean(1)
    se = float(per_sample.std()) / math.sqrt(BATCH)
    assert abs(float(per_sample.mean()) - float(var.mean())) < 5 * se, (float(per_sample.mean()), float(var.mean()), se)
