"""The optimisation loop's parts against torch's own reference implementations.

training.py swaps three pieces for faster ones (benchmarks/overhead.py): a foreach EMA with warm-up, a clip
that rescales only when needed, and the fused Adam kernel. Each must do what the plain version does.
"""
import copy

import numpy as np
import pytest
import torch
from torch import nn
from torch.optim.swa_utils import AveragedModel, get_ema_multi_avg_fn

from distillrun.training import clip_gradients, make_ema, make_optimizer


def _net(seed=0):
    torch.manual_seed(seed)
    return nn.Sequential(nn.Linear(3, 8), nn.SiLU(), nn.Linear(8, 2))


def test_ema_warm_up_matches_the_recursion_computed_by_hand():
    # Warm-up rate min(decay, (1 + n) / (10 + n)) after n updates (common practice, from memory); the first
    # update copies. Reference: the recursion in float64 numpy over the same weight sequence.
    decay, net = 0.99, _net()
    ema = make_ema(net, decay)
    seq = []
    for k in range(30):
        with torch.no_grad():
            for p in net.parameters():
                p.add_(0.1 * torch.randn_like(p))
        ema.update_parameters(net)
        seq.append(net[0].weight.detach().double().numpy().copy())
    want = seq[0]
    for n, w in enumerate(seq[1:], start=1):
        rate = min(decay, (1 + n) / (10 + n))
        want = rate * want + (1 - rate) * w
    np.testing.assert_allclose(ema.module[0].weight.double().numpy(), want, rtol=1e-5, atol=1e-6)


def test_ema_past_warm_up_equals_torch_ema():
    # Once (1 + n) / (10 + n) > decay the rate is the decay: the same update as torch.optim.swa_utils'
    # get_ema_multi_avg_fn (reference implementation).
    decay, net = 0.5, _net()
    ours, ref = make_ema(net, decay), AveragedModel(net, multi_avg_fn=get_ema_multi_avg_fn(decay), use_buffers=True)
    for _ in range(10):  # (1 + n) / (10 + n) >= 0.5 from n = 8 on: warm up both equally first
        ours.update_parameters(net)
    ref.load_state_dict(ours.state_dict())
    for _ in range(5):
        with torch.no_grad():
            for p in net.parameters():
                p.mul_(1.1).add_(0.01)
        ours.update_parameters(net)
        ref.update_parameters(net)
    for a, b in zip(ours.parameters(), ref.parameters()):
        torch.testing.assert_close(a, b, rtol=0, atol=0)


@pytest.mark.parametrize("scale,max_norm", [(1e-3, 1.0), (10.0, 1.0), (10.0, 0.0)])
def test_clip_matches_clip_grad_norm(scale, max_norm):
    # Reference: torch.nn.utils.clip_grad_norm_ (norm returned before clipping; rescale to max_norm when above).
    a, b = _net(), _net()
    for net in (a, b):
        torch.manual_seed(1)
        for p in net.parameters():
            p.grad = scale * torch.randn_like(p)
    norm = clip_gradients(a, max_norm)
    ref = torch.nn.utils.clip_grad_norm_(b.parameters(), max_norm if max_norm > 0 else float("inf"))
    torch.testing.assert_close(norm, ref)
    for pa, pb in zip(a.parameters(), b.parameters()):
        torch.testing.assert_close(pa.grad, pb.grad)
    if scale * 10 < max_norm:  # below the limit the gradients are left untouched, bit for bit
        torch.manual_seed(1)
        for p in a.parameters():
            assert torch.equal(p.grad, scale * torch.randn_like(p))


def test_clip_reports_a_non_finite_norm_without_clipping():
    net = _net()
    for p in net.parameters():
        p.grad = torch.ones_like(p)
    next(net.parameters()).grad[0, 0] = float("nan")
    assert not torch.isfinite(clip_gradients(net, 1.0))


def test_fused_adam_follows_the_reference_adam():
    # Reference: torch.optim.Adam's per-tensor loop (foreach=False), Kingma & Ba 2015 Alg. 1.
    a = _net()
    b = copy.deepcopy(a)
    opt_a, opt_b = make_optimizer(a, 1e-2), torch.optim.Adam(b.parameters(), lr=1e-2, foreach=False)
    x = torch.randn(64, 3)
    for _ in range(20):
        for net, opt in ((a, opt_a), (b, opt_b)):
            opt.zero_grad()
            (net(x) ** 2).mean().backward()
            opt.step()
    for pa, pb in zip(a.parameters(), b.parameters()):
        torch.testing.assert_close(pa, pb, rtol=1e-5, atol=1e-6)
